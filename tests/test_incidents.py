"""Incident grouping (tracewatch/alerts/incidents.py): online average linkage on cosine
distance within a time window, the medoid as representative, statuses, and notifications per
incident — on hand-computed toy alerts and on a generated storm scored by the real pipeline."""

from __future__ import annotations

import math
from collections import Counter

import pytest

from tracewatch.alerts.incidents import IncidentTracker, alert_vector, dot, set_status
from tracewatch.alerts.store import IncidentStore
from tracewatch.config import parse_config
from tracewatch.errors import IncidentNotFound, InvalidTransition
from tracewatch.service.incidents import Incidents

from .incident_data import RETRY, UNSEEN, Receiver, config, storm, toy_alert

T0 = 1_800_000_000.0


@pytest.fixture
def store(tmp_path):
    s = IncidentStore.open(tmp_path / "state")
    yield s
    s.close()


def tracker(store, **incidents) -> IncidentTracker:
    cfg = parse_config({"incidents": incidents}).incidents
    return IncidentTracker(store, cfg, clock=lambda: T0)


def events(store) -> list[tuple[int, str]]:
    return [(p["id"], ev) for _, ev, p in store.outbox_after(0)]


# -- vectors and linkage, on paper -------------------------------------------------------------------
def test_toy_vectors_on_paper():
    # an alert with never-seen event A and an empty sequence has two terms: the event (weight 2)
    # and the sequence's one bigram "(start) (end)" (norm 0.5): the vector is (2, 0.5)/√4.25
    a, ab, c = alert_vector(toy_alert("1", "A")), alert_vector(toy_alert("2", "A", "B")), alert_vector(toy_alert("3", "C"))
    assert sorted(a.values()) == pytest.approx([0.5 / math.sqrt(4.25), 2 / math.sqrt(4.25)])
    assert dot(a, a) == pytest.approx(1.0)
    assert dot(a, ab) == pytest.approx(4.25 / math.sqrt(4.25 * 8.25))  # cos = 0.7177…
    assert dot(a, c) == pytest.approx(0.25 / 4.25)  # they share only the sequence term


@pytest.mark.parametrize("cut, joins", [(0.60, False), (0.65, True)], ids=["cut-0.60-apart", "cut-0.65-joins"])
def test_average_linkage(store, cut, joins):
    # incident = {A}, {A,B}; new alert {B}: distances 1 - 0.25/4.25 = 0.941 and 1 - 4.25/√(4.25·8.25)
    # = 0.282; average linkage = their mean 0.612 (single linkage would say 0.282, complete 0.941)
    tr = tracker(store, cut=cut)
    first = tr.add(toy_alert("a1", "A"))
    assert tr.add(toy_alert("a2", "A", "B")) == first  # 0.282 ≤ cut
    assert (tr.add(toy_alert("x", "B")) == first) is joins


def test_medoid_is_the_representative(store):
    tr = tracker(store)
    iid = tr.add(toy_alert("ab", "A", "B"))
    for n in range(3):
        tr.add(toy_alert(f"a{n}", "A"))
    rep = store.incident(iid)["representative"]
    # the three {A} alerts are each at distance 0, 0, 0.282 from the others (sum 0.282); {A,B}
    # is at 0.282 from all three (sum 0.846): the medoid is an {A} alert
    assert rep["alert_id"] in {"a0", "a1", "a2"}
    assert store.incident(iid)["title"] == "never-seen event 'event A <var>'"


def test_time_window(store):
    tr = tracker(store, window_s=600, recur_s=0)  # recur_s 0: the same signature, too, joins only within the window
    first = tr.add(toy_alert("1", "A", t=T0))
    assert tr.add(toy_alert("2", "A", t=T0 + 599)) == first
    later = tr.add(toy_alert("3", "A", t=T0 + 599 + 601))  # quiet for longer than the window
    assert later != first
    assert events(store) == [(first, "opened"), (later, "opened")]


def test_replayed_alert_counted_once_and_state_survives_a_restart(store, tmp_path):
    tr = tracker(store)
    iid = tr.add(toy_alert("1", "A"))
    assert tr.add(toy_alert("1", "A")) == iid
    store.close()
    again = IncidentStore.open(tmp_path / "state")  # a new process: nothing in memory
    tr2 = tracker(again)
    assert tr2.add(toy_alert("1", "A")) == iid  # raised again after a restart: recognised
    assert tr2.add(toy_alert("2", "A")) == iid  # grouping goes on with the stored incident
    assert again.incident(iid)["count"] == 2
    assert [e for _, e in events(again)] == ["opened"]
    again.close()


def test_statuses_and_their_notifications(store):
    tr = tracker(store, escalation_steps=[3, 5])
    iid = tr.add(toy_alert("1", "A"))
    tr.add(toy_alert("2", "A"))
    tr.add(toy_alert("3", "A"))  # count 3: escalation
    assert set_status(store, iid, "ack", by="test")["status"] == "acknowledged"
    for n in range(4, 7):
        tr.add(toy_alert(str(n), "A"))  # count 5 while acknowledged: no escalation
    assert set_status(store, iid, "ack", by="test")["status"] == "acknowledged"  # already: no change, no error
    assert set_status(store, iid, "resolve", by="test")["status"] == "resolved"
    with pytest.raises(InvalidTransition, match=f"incident {iid} is resolved; it cannot be marked acknowledged"):
        set_status(store, iid, "ack", by="test")  # a resolved incident is not acknowledged
    with pytest.raises(IncidentNotFound, match="no incident 999"):
        set_status(store, 999, "ack", by="test")
    with pytest.raises(IncidentNotFound):
        set_status(store, 1 << 70, "ack", by="test")  # more than SQLite holds: no such incident
    with pytest.raises(ValueError, match="unknown action 'shout'"):
        set_status(store, iid, "shout", by="test")
    new = tr.add(toy_alert("7", "A"))  # a resolved incident takes no alerts: a new one opens
    assert new != iid
    assert events(store) == [(iid, "opened"), (iid, "escalated"), (iid, "resolved"), (new, "opened")]


def test_expected_incident_absorbs_alerts_silently(store):
    tr = tracker(store, window_s=60)
    iid = tr.add(toy_alert("1", "A"))
    set_status(store, iid, "expected", by="test", note="nightly batch")
    before = events(store)
    for n in range(2, 30):  # also long after the window: an expected pattern stays expected
        assert tr.add(toy_alert(str(n), "A", t=T0 + 3600 * n)) == iid
    assert store.incident(iid)["count"] == 29 and store.incident(iid)["note"] == "nightly batch"
    assert events(store) == before  # opened, resolved — nothing for the 28 expected alerts


class Wall:
    """A wall clock the test moves (far from the alerts' event times, as in a replay)."""

    def __init__(self, t: float) -> None:
        self.t = t

    def __call__(self) -> float:
        return self.t


def test_auto_resolve_on_tick(store):
    wall = Wall(T0 + 86_400)
    tr = IncidentTracker(store, parse_config({"incidents": {"auto_resolve_s": 300}}).incidents, clock=wall)
    iid = tr.add(toy_alert("1", "A", t=T0))
    wall.t += 299
    assert tr.tick(T0 + 299) == []
    wall.t += 2
    assert tr.tick(T0 + 301) == [iid]
    assert store.incident(iid)["status"] == "resolved"
    assert store.incident(iid)["status_by"].startswith("auto")
    assert events(store) == [(iid, "opened"), (iid, "resolved")]


@pytest.mark.parametrize("recur_s, joins", [(86_400, True), (0, False)])
def test_a_problem_back_after_auto_resolve_reopens_its_incident(store, recur_s, joins):
    # the same never-seen event at 08:00 and at 11:00 (event time): quiet for three hours, so the
    # first incident was resolved automatically; within recur_s it is the same incident again
    wall = Wall(T0 + 86_400)
    tr = IncidentTracker(store, parse_config({"incidents": {"auto_resolve_s": 1800, "window_s": 1800,
                                                             "recur_s": recur_s}}).incidents, clock=wall)
    iid = tr.add(toy_alert("1", "A", t=T0))
    other = tr.add(toy_alert("2", "B", t=T0 + 3 * 3600))  # another problem: an incident of its own
    wall.t += 2
    assert tr.tick(T0 + 3 * 3600) == [iid]  # the event clock is at 11:00: 08:00's incident is quiet
    again = tr.add(toy_alert("3", "A", t=T0 + 3 * 3600 + 60))
    assert other != iid
    if joins:
        assert again == iid
        row = store.incident(iid)
        assert row["status"] == "open" and row["count"] == 2 and row["status_by"].startswith("auto")
        assert events(store) == [(iid, "opened"), (other, "opened"), (iid, "resolved"), (iid, "opened")]
        assert [p.get("reopened") for _, ev, p in store.outbox_after(0)] == [None, None, None, True]
    else:
        assert again not in (iid, other) and store.incident(iid)["status"] == "resolved"


def test_a_problem_back_after_someone_resolved_it_opens_a_new_incident(store):
    wall = Wall(T0 + 86_400)
    tr = IncidentTracker(store, parse_config({"incidents": {}}).incidents, clock=wall)
    iid = tr.add(toy_alert("1", "A", t=T0))
    set_status(store, iid, "resolve", by="oncall")  # a person said it is over: a recurrence is news
    assert tr.add(toy_alert("2", "A", t=T0 + 3600)) != iid


def test_auto_resolve_runs_on_event_time_across_a_restart(tmp_path):
    # a replay of yesterday's logs: alerts an hour apart in event time, a few wall seconds apart
    wall = Wall(T0 + 86_400)
    cfg = parse_config({"incidents": {"auto_resolve_s": 1800, "window_s": 600}}).incidents
    store = IncidentStore.open(tmp_path)
    tr = IncidentTracker(store, cfg, clock=wall)
    ids = []
    for n in range(5):
        ids.append(tr.add(toy_alert(f"r{n}", f"E{n}", t=T0 + 900 * n)))
        wall.t += 1
        tr.tick(T0 + 900 * n)
    # event time T0 + 3600: the incidents of T0 and T0 + 900 are quiet for over 1800 s, the rest not
    assert [store.incident(i)["status"] for i in ids] == ["resolved", "resolved", "open", "open", "open"]
    store.close()

    # a restart: before any new record the daemon's clock falls back to the wall clock, a day ahead
    store = IncidentStore.open(tmp_path)
    try:
        tr = IncidentTracker(store, cfg, clock=wall)
        wall.t += 5
        assert tr.tick(wall.t) == []  # the event clock resumes at the newest alert, T0 + 3600
        assert [store.incident(i)["status"] for i in ids[2:]] == ["open"] * 3
        wall.t += 500  # quiet for 500 s more: T0 + 4100 on the event clock; T0 + 1800 is now quiet
        assert tr.tick(wall.t) == [ids[2]]
        wall.t += 1800  # and then, with no alert at all, the rest in turn
        assert sorted(tr.tick(wall.t)) == ids[3:]
    finally:
        store.close()


# -- the storm -----------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def storm_data(tmp_path_factory):
    return storm(tmp_path_factory.getbasetemp() / "incident-storm")


def test_storm_gives_two_incidents_not_hundreds_of_notifications(storm_data, tmp_path):
    _, alerts, labels = storm_data
    faulty = Counter(labels[a["session_key"]] for a in alerts)
    assert faulty[RETRY] >= 150 and faulty[UNSEEN] >= 150  # the storm: hundreds of alerts, two faults
    receiver = Receiver().start()
    inc = Incidents(config(tmp_path, notify={"webhook_url": receiver.url + "/hook"}))
    try:
        inc.start()  # the notifier thread delivers while alerts come in
        by_incident: dict[int, Counter] = {}
        for a in alerts:
            by_incident.setdefault(inc.add(a), Counter())[labels[a["session_key"]]] += 1
        rows = inc.store.incidents()
        queued = len(inc.store.outbox_after(0))
        received = receiver.wait_for(queued)
    finally:
        inc.close()
        receiver.stop()
    print(f"\n{len(alerts)} alerts -> {len(rows)} incidents, {len(received)} notifications")
    assert len(rows) == 2
    # each fault is one incident, and each incident is one fault
    assert sorted(sorted(c) for c in by_incident.values()) == [[RETRY], [UNSEEN]]
    titles = sorted(r["title"] for r in rows)
    assert titles[0].startswith("never-seen event 'latch sensor on door <var> reports jammed bolt'")
    assert titles[1].startswith("retry of 'door <var> opened on locker <var>' repeated ")
    # per incident: opened, escalated at 10 and at 100 alerts — six in all, not hundreds
    assert len(received) == queued == 6
    got = Counter((b["incident"]["id"], b["event"], b["incident"].get("step")) for b in received)
    assert got == Counter({(r["id"], ev, step): 1 for r in rows
                           for ev, step in (("opened", None), ("escalated", 10), ("escalated", 100))})


def test_storm_incidents_are_critical(tmp_path_factory, tmp_path):
    from tracewatch.alerts.summary import brief

    from .incident_data import storm_verdicts

    verdicts = storm_verdicts(tmp_path_factory.getbasetemp() / "incident-storm")
    _, alerts, _ = storm(tmp_path_factory.getbasetemp() / "incident-storm")
    assert len(verdicts) == 500 and [v for v in verdicts if v["alert"]] == alerts  # 400 faulty, 100 normal
    inc = Incidents(config(tmp_path))  # as the daemon: every verdict, alert or not
    try:
        for v in verdicts:
            inc.add(v)
        inc.tracker.flush()
        rows = [brief(r) for r in inc.store.incidents()]
    finally:
        inc.close()
    # both faults hit about 200 of the 500 sessions of four minutes: at least 10 alerts and 20%
    assert len(rows) == 2 and sum(r["rate"]["sessions"] for r in rows) <= 2 * 500
    for r in rows:
        assert r["severity"] == "critical" and 0.3 <= r["reach"]["share"] <= 0.5, (r["title"], r["rate"], r["reach"])


def _by_hand(value: str) -> str:
    """The title's redaction of a plain value, by hand: first and last character, or "…"."""
    return "…" if len(value) <= 2 else f"{value[0]}…{value[-1]}"


def test_storm_titles_carry_a_redacted_example_of_the_first_alert(storm_data, tmp_path_factory, tmp_path):
    import re

    _, alerts, labels = storm_data
    log = (tmp_path_factory.getbasetemp() / "incident-storm" / "storm.log").read_text().splitlines()
    # the line of the never-seen event is among an alert's samples wherever it stands in the session
    unseen = [a for a in alerts if labels[a["session_key"]] == UNSEEN]
    assert all(any("reports jammed bolt" in x for x in a["samples"]) and len(a["samples"]) <= 6 for a in unseen)
    assert sum(not any("reports jammed bolt" in x for x in a["samples"][:3]) for a in unseen) > 50  # past the first 3
    store = IncidentStore.open(tmp_path / "state")
    try:
        tr = tracker(store)
        first: dict[int, dict] = {}
        for a in alerts:
            first.setdefault(tr.add(a), a)
        shapes = {UNSEEN: (r"latch sensor on door (\S+) reports jammed bolt", "latch sensor on door {} reports jammed bolt"),
                  RETRY: (r"door (\S+) opened on locker (\S+)", "door {} opened on locker {}")}
        for iid, a in first.items():
            pattern, shape = shapes[labels[a["session_key"]]]
            line = next(x for x in log if f" req={a['session_key']} " in x and re.search(pattern, x))
            values = re.search(pattern, line).groups()  # the first alert's own values, from the log
            assert store.incident(iid)["title"].endswith(f" (e.g. {shape.format(*map(_by_hand, values))})")
    finally:
        store.close()


# -- a damaged stored incident -----------------------------------------------------------------------------
@pytest.mark.parametrize("sql", ["UPDATE incidents SET count = 0 WHERE id = 1",  # was a division by zero
                                 "UPDATE incidents SET centroid = '[0.5]' WHERE id = 1",
                                 "DELETE FROM members WHERE incident_id = 1",
                                 "UPDATE members SET vector = '{\"x\": 1e999}' WHERE incident_id = 1"],
                         ids=["count-0", "centroid-a-list", "no-members", "vector-term-and-value"])
def test_a_damaged_incident_is_left_out_of_grouping_and_logged_once(store, caplog, sql):
    iid = tracker(store).add(toy_alert("1", "A"))
    store.db.execute(sql)
    tr = tracker(store)  # a new process: nothing cached
    second = tr.add(toy_alert("2", "A"))  # would have joined incident 1
    assert second != iid and tr.add(toy_alert("3", "A")) == second
    damaged = [r for r in caplog.records if "is damaged" in r.getMessage()]
    assert len(damaged) == 1 and f"incident {iid}" in damaged[0].getMessage()
    assert store.incident(second)["count"] == 2


# -- grouping by what is wrong ------------------------------------------------------------------------
def test_six_kinds_day_groups_by_signature(tmp_path_factory):
    from .incident_data import KINDS, six_kinds_day

    cfg, alerts, labels = six_kinds_day(tmp_path_factory.mktemp("six"))
    assert len(alerts) >= 150
    assert {labels[a["session_key"]] for a in alerts} == set(KINDS)  # no false alarm among them
    store = IncidentStore.open(tmp_path_factory.mktemp("six-state"))
    try:
        tr = IncidentTracker(store, cfg.incidents, clock=lambda: T0)
        kinds_of: dict[int, Counter] = {}
        for a in alerts:
            kinds_of.setdefault(tr.add(a), Counter())[labels[a["session_key"]]] += 1
        assert len(kinds_of) <= 12, {i: dict(c) for i, c in kinds_of.items()}
        for iid, kinds in kinds_of.items():
            assert len(kinds) == 1, (iid, dict(kinds))
            (kind,) = kinds
            title = store.incident(iid)["title"]
            assert KINDS[kind][3] in title, (kind, title)
            assert title.startswith({"missing": "step ", "retry": "retry of ", "unseen": "never-seen event "}[
                kind.split("_")[0]]), title
        # one incident per kind: the signature joins what similarity alone splits (10 incidents here
        # when every signature is blanked out)
        assert sorted(next(iter(k)) for k in kinds_of.values()) == sorted(KINDS)
    finally:
        store.close()


def test_one_log_line_per_incident_opened(store, caplog):
    import logging

    caplog.set_level(logging.INFO, logger="tracewatch.incidents")
    tr = tracker(store)
    first = tr.add(toy_alert("1", "A", source="api\x1b[2J"))
    assert tr.add(toy_alert("2", "A", source="api\x1b[2J", t=T0 + 5)) == first  # joins: no line
    second = tr.add(toy_alert("3", "C"))
    lines = [r.getMessage() for r in caplog.records if " opened" in r.getMessage()]
    assert lines == [f"incident {first} opened: never-seen event 'event A <var>' (source api?[2J, session k-1)",
                     f"incident {second} opened: never-seen event 'event C <var>' (source api, session k-3)"]


# -- rate, reach and severity --------------------------------------------------------------------------
def _sessions_per_minute(log) -> Counter:
    """Sessions per minute of their last line, read from the generated log itself (not from the
    pipeline): the ``req=`` key and the ISO time of each line."""
    from datetime import datetime

    last: dict[str, float] = {}
    for line in log.read_text().splitlines():
        stamp, _, rest = line.partition(" ")
        key = rest.split(" req=", 1)[1].split(" ", 1)[0]
        last[key] = max(last.get(key, 0.0), datetime.fromisoformat(stamp.replace("Z", "+00:00")).timestamp())
    return Counter(int(t // 60) for t in last.values())


def test_rate_reach_and_severity_on_a_generated_day(tmp_path_factory):
    from tracewatch.alerts.summary import detail, rate_text, reach

    from .incident_data import KINDS, six_kinds_day

    root = tmp_path_factory.mktemp("rate")
    cfg, verdicts, labels = six_kinds_day(root, every_session=True)  # every session, alert or not
    per_minute = _sessions_per_minute(root / "day.log")
    assert sum(per_minute.values()) == len(verdicts) == len(labels)  # every generated session was scored
    store = IncidentStore.open(tmp_path_factory.mktemp("rate-state"))
    try:
        tr = IncidentTracker(store, cfg.incidents, clock=lambda: T0)
        times: dict[int, list[float]] = {}
        for v in verdicts:
            iid = tr.add(v)
            if iid is not None:
                times.setdefault(iid, []).append(v["end"])
        tr.flush()
        rows = store.incidents()
        assert len(rows) == len(KINDS)
        each = store.alert_counts_each(300, [r["id"] for r in rows])  # (the incident list's one query)
        assert each == {r["id"]: store.alert_counts(300, incident_id=r["id"]) for r in rows}
        mid = (rows[0]["first_seen"] + rows[0]["last_seen"]) / 2
        later = store.alert_counts(300, incident_id=rows[0]["id"], from_ts=mid)
        assert 0 < sum(later.values()) < rows[0]["count"]
        assert store.alert_counts_each(300, [rows[0]["id"]], from_ts=mid) == {rows[0]["id"]: later}
        for row in rows:
            # its timeline: the alerts' own end times, per bar
            tl = detail(row, alert_counts=lambda b: store.alert_counts(b, incident_id=row["id"]))["timeline"]
            b = tl["bucket_s"]
            assert b == 300  # under four hours (48 bars of 5 min): 5 min each
            assert sum(tl["alerts"]) == row["count"]
            assert Counter({tl["start"] // b + i: n for i, n in enumerate(tl["alerts"]) if n}) == Counter(
                int(t // b) for t in times[row["id"]])
            got = reach(row)
            first, last = int(row["first_seen"] // 60), int(row["last_seen"] // 60)
            sessions = sum(n for m, n in per_minute.items() if first <= m <= last)
            assert got["rate"] == {"alerts": row["count"], "sessions": sessions, "window_s": 60 * (last - first + 1)}
            assert got["reach"] == {"share": round(row["count"] / sessions, 4), "sources": 1}
            # each kind hits 32 of the day's 492 sessions over three hours: 3 or more alerts and
            # at least 2% of the sessions, under 20% — "high" by the rule
            assert 0.02 <= got["reach"]["share"] < 0.2 and got["severity"] == "high", (row["title"], got)
            assert rate_text({**row, **got, "sources": ["locker-api"]}).startswith(
                f"{row['count']} of {sessions} sessions of locker-api in ")
    finally:
        store.close()


# -- `score --incidents`: a replay grouped as the daemon groups ----------------------------------------
def test_score_incidents_groups_a_replay_as_the_daemon_does(tmp_path):
    import json

    from tracewatch.demo.scenario import parcel_lockers

    from .conftest import run_cli
    from .incident_data import KINDS, six_kinds_day

    root = tmp_path / "day"
    cfg, alerts, labels = six_kinds_day(root)
    assert len(alerts) >= 150 and {labels[a["session_key"]] for a in alerts} == set(KINDS)
    conf = root / "tw.toml"  # the config six_kinds_day scored with (incident_data.config), as a file
    conf.write_text(f"state_dir = 'state'\n[[sources]]\nname = 'locker-api'\nline_pattern = '''"
                    f"{parcel_lockers().line_pattern}'''\n[sessions]\nidle_timeout_s = 30\n"
                    "[model]\nfalse_alarm_rate = 0.01\n")
    day = str(root / "day.log")
    replayed = [json.loads(x) for x in run_cli("score", "--config", str(conf), "--incidents", day,
                                               check=True).stdout.splitlines()]
    kind_of = {a["alert_id"]: labels[a["session_key"]] for a in alerts}
    assert len(replayed) <= 12
    assert [len(i["alert_ids"]) for i in replayed] == [i["count"] for i in replayed]
    assert sorted(a for i in replayed for a in i["alert_ids"]) == sorted(kind_of)  # every alert, once
    for inc in replayed:
        assert len({kind_of[a] for a in inc["alert_ids"]}) == 1, inc["title"]  # each of one kind
        assert inc["severity"] in ("high", "critical") and sum(inc["timeline"]["alerts"]) == inc["count"]
    # the same incidents as the daemon's grouping of the same alerts in a store
    store = IncidentStore.open(tmp_path / "state")
    try:
        tr = IncidentTracker(store, cfg.incidents, clock=lambda: T0)
        members: dict[int, set[str]] = {}
        for a in alerts:
            members.setdefault(tr.add(a), set()).add(a["alert_id"])
        daemon = sorted((store.incident(i)["title"], sorted(ids)) for i, ids in members.items())
    finally:
        store.close()
    assert sorted((i["title"], sorted(i["alert_ids"])) for i in replayed) == daemon
    text = run_cli("score", "--config", str(conf), "--incidents", "-o", "text", day, check=True).stdout
    assert text.splitlines()[0].split()[:3] == ["ID", "STATUS", "ALERTS"] and text.count("incident #") == len(replayed)
    assert "alerts over time" in text
    proc = run_cli("score", "--config", str(conf), "--incidents", "--all", day)
    assert proc.returncode == 2 and "choose one" in proc.stderr
