"""Sessions: closing on idle, end pattern, max events, max duration; eviction; time windows."""

from __future__ import annotations

from tracewatch.config import SessionsConfig
from tracewatch.sessions import Sessionizer


def _add(sz, key, t, ev, closed, msg="step", source="s"):
    sz.add(source, key, t, t, ev, f"{t} {key} {msg}", 0, msg, closed)


def test_idle_timeout_by_record_time_and_by_tick():
    sz = Sessionizer(SessionsConfig(idle_timeout_s=10))
    closed = []
    _add(sz, "a", 0.0, 1, closed)
    _add(sz, "a", 5.0, 2, closed)
    _add(sz, "a", 16.0, 3, closed)  # 11 s after the last event: the old session closes first
    assert [(s.key, s.events, s.close_reason) for s in closed] == [("a", [1, 2], "idle")]
    sz.tick(26.5, closed)
    assert closed[-1].events == [3] and closed[-1].close_reason == "idle"
    assert not sz.open


def test_end_pattern_and_max_events():
    sz = Sessionizer(SessionsConfig(end_pattern=r"signed off", max_events=3))
    closed = []
    _add(sz, "a", 0, 1, closed)
    _add(sz, "a", 1, 2, closed, msg="courier signed off")
    assert closed[-1].close_reason == "end" and closed[-1].events == [1, 2]
    for i in range(4):
        _add(sz, "b", i, i, closed)
    assert closed[-1].close_reason == "max_events" and closed[-1].events == [0, 1, 2]
    sz.flush(closed)
    assert closed[-1].events == [3] and closed[-1].close_reason == "flush"


def test_max_duration():
    sz = Sessionizer(SessionsConfig(idle_timeout_s=100, max_duration_s=50))
    closed = []
    for t in range(0, 60, 20):
        _add(sz, "a", float(t), t, closed)
    _add(sz, "a", 60.0, 60, closed)
    assert closed[0].close_reason == "max_duration" and closed[0].events == [0, 20, 40]


def test_max_duration_by_tick_closes_exactly_the_sessions_past_it():
    # every session is busy (never idle), so only the maximum duration can close one by tick
    sz = Sessionizer(SessionsConfig(idle_timeout_s=1000, max_duration_s=50))
    closed = []
    for t in range(100):
        _add(sz, f"k{t}", float(t), 0, closed)
        _add(sz, "long", float(t), 1, closed)  # re-opened every 50 s
        sz.tick(float(t), closed)
    by_tick = {s.key for s in closed if s.close_reason == "max_duration"}
    # sessions k0..k48 started more than 50 s before t = 99 (hand count: 99 - 50 = 49 > start)
    assert by_tick == {f"k{t}" for t in range(49)} | {"long"}
    assert {s.key for s in sz.open.values()} == {f"k{t}" for t in range(49, 100)} | {"long"}


def test_a_span_session_whose_start_moves_earlier_closes_by_its_new_deadline():
    # spans of one trace read out of time order (two services' files): the session starts at
    # its earliest span, 40, so max_duration 50 ends it at 90, not at 150 (its first span read, 100)
    sz = Sessionizer(SessionsConfig(idle_timeout_s=1000, max_duration_s=50), by_time=frozenset({"api"}))
    closed = []
    sz.add("api", "t1", 100.0, 100.0, 0, "b", 0, "b", closed)
    sz.add("api", "t1", 40.0, 100.0, 1, "a", 1, "a", closed)
    sz.tick(91.0, closed)
    assert [(s.key, s.close_reason, s.first_ts, s.events) for s in closed] == [("t1", "max_duration", 40.0, [1, 0])]


def test_max_duration_bookkeeping_stays_bounded():
    sz = Sessionizer(SessionsConfig(idle_timeout_s=1000, max_duration_s=3600, end_pattern="done"))
    closed = []
    for t in range(20_000):  # short sessions closed by their end line, each one tracked
        _add(sz, f"k{t}", float(t) / 100, 0, closed)
        _add(sz, f"k{t}", float(t) / 100, 1, closed, msg="done")
        if t % 100 == 0:
            sz.tick(float(t) / 100, closed)
    assert len(closed) == 20_000 and not sz.open
    assert len(sz._deadlines) <= 1024 + 100  # rebuilt from the open ones, not one per session ever


def test_open_sessions_are_bounded_oldest_evicted():
    sz = Sessionizer(SessionsConfig(max_open_sessions=3))
    closed = []
    for i, key in enumerate("abcd"):
        _add(sz, key, float(i), i, closed)
    _add(sz, "b", 4.0, 9, closed)
    _add(sz, "e", 5.0, 5, closed)
    assert [s.key for s in closed] == ["a", "c"] and all(s.close_reason == "evicted" for s in closed)
    assert sz.evicted == 2 and len(sz.open) == 3


def test_evicted_sessions_and_their_rest_are_partial():
    sz = Sessionizer(SessionsConfig(max_open_sessions=2, idle_timeout_s=10))
    closed = []
    _add(sz, "a", 0.0, 1, closed)
    _add(sz, "b", 1.0, 1, closed)
    _add(sz, "c", 2.0, 1, closed)  # evicts a
    assert [(s.key, s.close_reason, s.partial) for s in closed] == [("a", "evicted", True)]
    _add(sz, "a", 3.0, 2, closed)  # the rest of a (evicts b): cut short, so partial too
    assert sz.open[("s", "a")].partial and closed[-1].key == "b"
    _add(sz, "d", 4.0, 1, closed)  # evicts c
    _add(sz, "b", 30.0, 1, closed)  # b again, long after its idle timeout: a session of its own
    assert not sz.open[("s", "b")].partial
    assert sz.evicted == 4


def test_keyless_records_fall_into_time_windows():
    sz = Sessionizer(SessionsConfig(window_s=60, idle_timeout_s=1000))
    closed = []
    for t in (0.0, 30.0, 59.9, 60.0, 119.0):
        _add(sz, None, t, int(t), closed)
    sz.flush(closed)
    assert sorted((s.key, len(s.events)) for s in closed) == [("window@0", 3), ("window@60", 2)]
