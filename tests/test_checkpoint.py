"""Checkpoints and the alert journal: a pipeline stopped and restored mid-stream gives exactly
the verdicts of one uninterrupted run; alerts are journalled once across crashes."""

from __future__ import annotations

import json
import math
import os
import shutil
import subprocess
from pathlib import Path

import orjson
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from prometheus_client import CollectorRegistry

from tracewatch.baselines import load_baseline
from tracewatch.config import parse_config
from tracewatch.errors import StateError, TracewatchError
from tracewatch.pipeline import Pipeline
from tracewatch.service.daemon import Daemon
from tracewatch.sources.follow import Follower
from tracewatch.sources.checkpoint import (COUNTERS, AlertJournal, JournalMark, capture, capture_chunks,
                                          load_checkpoint, restore, save_checkpoint)

from .daemon_helpers import DaemonProcess, free_port, no_daemon_left  # noqa: F401


@pytest.fixture(scope="module")
def fitted(demo_fit):
    return demo_fit.cfg, demo_fit.day.read_text().splitlines()


def _feed(pipe: Pipeline, lines: list[str], start: int) -> None:
    pipe.feed_block("api", "day", list(lines), list(range(start, start + len(lines))))


def test_restored_pipeline_gives_the_verdicts_of_an_uninterrupted_run(fitted, tmp_path):
    cfg, lines = fitted
    whole: list[dict] = []
    pipe = Pipeline(cfg, load_baseline(cfg.state_dir), on_verdict=whole.append, score_all=True)
    _feed(pipe, lines, 0)
    pipe.flush()

    cut = len(lines) * 6 // 10
    parts: list[dict] = []
    first = Pipeline(cfg, load_baseline(cfg.state_dir), on_verdict=parts.append, score_all=True)
    _feed(first, lines[:cut], 0)
    first.tick(first.watermark)  # what the daemon does before a checkpoint: score the closed ones
    assert len(first.miner.templates) > first.miner.n_seen, "the test needs templates learned since the fit"
    assert first.sessionizer.open, "the test needs sessions open at the checkpoint"
    path = tmp_path / "checkpoint.json"
    path.write_bytes(capture(first, [], {"offset": 0, "count": 0}))

    second = Pipeline(cfg, load_baseline(cfg.state_dir), on_verdict=parts.append, score_all=True)
    restore(second, load_checkpoint(path))
    _feed(second, lines[cut:], cut)
    second.flush()

    def comparable(verdicts: list[dict]) -> list[dict]:
        # how a session closed depends on when the last tick ran ("idle" vs "flush" at the end
        # of the input); which events it holds, and so its verdict, does not
        return sorted(({k: v for k, v in x.items() if k != "closed_by"} for x in verdicts),
                      key=lambda v: v["alert_id"])

    assert comparable(parts) == comparable(whole)
    assert second.records == pipe.records and second.sessions_scored == pipe.sessions_scored
    assert second.alerts == pipe.alerts
    assert [t.id for t in second.miner.templates] == [t.id for t in pipe.miner.templates]


def test_missing_damaged_and_foreign_checkpoints(tmp_path):
    path = tmp_path / "checkpoint.json"
    assert load_checkpoint(path) is None
    path.write_bytes(b'{"schema_version": 1, "kind": "tracewatch-checkpoint", "files": [')
    with pytest.raises(StateError, match="damaged.*move it away"):
        load_checkpoint(path)
    path.write_bytes(orjson.dumps({"schema_version": 1, "kind": "something-else"}))
    with pytest.raises(StateError, match="damaged"):
        load_checkpoint(path)


def test_a_session_naming_an_unknown_template_is_refused(fitted, tmp_path):
    cfg, lines = fitted
    pipe = Pipeline(cfg, load_baseline(cfg.state_dir))
    _feed(pipe, lines[:50], 0)
    state = orjson.loads(capture(pipe, [], {"offset": 0, "count": 0}))
    state["pipeline"]["sessions"]["open"][0][2] = [10**6]
    path = tmp_path / "checkpoint.json"
    path.write_bytes(orjson.dumps(state))
    with pytest.raises(StateError, match="template that does not exist"):
        restore(Pipeline(cfg, load_baseline(cfg.state_dir)), load_checkpoint(path))


def test_checkpoint_written_in_pieces_is_the_same_document(fitted, tmp_path):
    # the daemon writes the open sessions a few at a time; the file must be one valid checkpoint
    cfg, lines = fitted
    pipe = Pipeline(cfg, load_baseline(cfg.state_dir), clock=lambda: 0.0)  # ticks only when told, as the daemon's
    _feed(pipe, lines[:200], 0)
    n_open = len(pipe.sessionizer.open)
    assert n_open > 3
    pieces = list(capture_chunks(pipe, [], {"offset": 0, "count": 0}, per_chunk=2))
    assert len(pieces) >= 2 + (n_open + 1) // 2
    path = tmp_path / "checkpoint.json"
    save_checkpoint(path, iter(pieces))
    ckpt = load_checkpoint(path)
    assert len(ckpt.pipeline.sessions.open) == n_open
    assert orjson.loads(path.read_bytes())["pipeline"]["sessions"]["open"] == \
        orjson.loads(capture(pipe, [], {"offset": 0, "count": 0}))["pipeline"]["sessions"]["open"]


def _alert(n: int) -> dict:
    return {"alert": True, "alert_id": f"id{n}", "score": float(n)}


def _ids(path) -> list[str]:
    return [orjson.loads(line)["alert_id"] for line in path.read_bytes().splitlines()]


def test_journal_appends_once_across_two_crashes(tmp_path):
    path = tmp_path / "alerts.jsonl"
    j = AlertJournal(path)
    j.open(None)
    for n in (1, 2, 3):
        assert j.append(_alert(n))
    mark1 = JournalMark(**j.sync())
    j.append(_alert(4))
    j.append(_alert(5))
    j.close()  # crash: no checkpoint after 4 and 5

    j = AlertJournal(path)
    j.open(mark1)  # restart from the checkpoint: 4 and 5 will be raised again
    assert j.count == 5
    assert not j.append(_alert(4))
    assert j.append(_alert(6))
    mark2 = JournalMark(**j.sync())  # 5 was not raised again yet: it is carried in the mark
    assert mark2.pending == ["id5"]
    j.close()  # crash again

    j = AlertJournal(path)
    j.open(mark2)
    assert not j.append(_alert(5))
    assert j.append(_alert(7))
    j.close()
    assert _ids(path) == ["id1", "id2", "id3", "id4", "id5", "id6", "id7"]
    assert j.replayed == 1


def test_journal_cuts_a_torn_last_line(tmp_path, caplog):
    path = tmp_path / "alerts.jsonl"
    j = AlertJournal(path)
    j.open(None)
    j.append(_alert(1))
    mark = JournalMark(**j.sync())
    j.close()
    with open(path, "ab") as fh:
        fh.write(b'{"alert": true, "alert_id": "id2", "sco')  # killed mid-write
    j = AlertJournal(path)
    j.open(mark)
    assert "partial line" in caplog.text
    assert j.append(_alert(2))  # raised again after the restart, and now written whole
    j.close()
    assert _ids(path) == ["id1", "id2"]


def test_journal_numbering_and_since(tmp_path):
    path = tmp_path / "alerts.jsonl"
    j = AlertJournal(path, keep=3)
    j.open(None)
    for n in range(1, 6):
        j.append(_alert(n))
    got = j.since(0, 10)
    assert [a["alert_id"] for a in got["alerts"]] == ["id3", "id4", "id5"]
    assert got["next"] == 5 and got["total"] == 5 and got["missed"] == 2
    assert j.since(4, 10)["alerts"] == [_alert(5)] and j.since(4, 10)["missed"] == 0
    assert j.since(5, 10) == {"alerts": [], "next": 5, "total": 5, "missed": 0}
    j.close()
    reopened = AlertJournal(path, keep=3)
    reopened.open(None)  # numbering survives a restart: read back from the file
    assert reopened.since(3, 1)["alerts"] == [_alert(4)]
    reopened.close()


def test_damaged_lines_keep_their_numbers_and_their_alerts_are_appended_again(tmp_path, caplog):
    path = tmp_path / "alerts.jsonl"
    j = AlertJournal(path)
    j.open(None)
    for n in (1, 2, 3):
        j.append(_alert(n))
    mark = JournalMark(**j.sync())
    j.append(_alert(4))
    j.append(_alert(5))
    j.close()
    # a restart will raise 2 and 3 again (pending), 4 and 5 too (after the mark); 3 and 5 are damaged
    mark = mark.model_copy(update={"pending": ["id2", "id3"]})
    lines = path.read_bytes().split(b"\n")
    lines[2] = b"\x00" * len(lines[2])  # id3: what a power loss can leave
    lines[4] = b'["not", "an", "alert"]'  # id5
    path.write_bytes(b"\n".join(lines))
    j = AlertJournal(path)
    j.open(mark)
    assert j.damaged == 2 and [r.getMessage().count("damaged line") for r in caplog.records].count(1) == 1
    assert [n for n, _ in j.recent] == [1, 2, 4] and j.count == 5  # numbers kept
    assert [j.append(_alert(n)) for n in (2, 3, 4, 5)] == [False, True, False, True]
    j.close()
    assert [orjson.loads(x)["alert_id"] for i, x in enumerate(path.read_bytes().splitlines()) if i not in (2, 4)] == [
        "id1", "id2", "id4", "id3", "id5"]


# -- tampered checkpoints: one clear line, never a hang, a traceback or someone else's file ----------------
def _paths(doc, prefix=()):
    """Every place in a JSON document: the keys and indices that lead to it."""
    yield prefix
    items = doc.items() if isinstance(doc, dict) else enumerate(doc) if isinstance(doc, list) else ()
    for key, value in items:
        if isinstance(doc, list) and key > 2:
            break  # the first entries of a list stand for the rest
        yield from _paths(value, prefix + (key,))


def _tampered(doc, where: tuple, value, how: str):
    doc = json.loads(json.dumps(doc))
    if not where:
        return value
    parent = doc
    for key in where[:-1]:
        parent = parent[key]
    if how == "delete" and isinstance(parent, dict):
        del parent[where[-1]]
    elif how == "extra" and isinstance(parent, dict):
        parent["unexpected"] = value
    else:
        parent[where[-1]] = value
    return doc


HOSTILE = st.one_of(
    st.sampled_from([-1, -(2**63), 2**63, 2**64 + 1, 10**30, 10**400, 0, 1, 1024, 10**9]),
    st.sampled_from([1e308, -1e308, 1e-308, float("nan"), float("inf"), float("-inf"), 0.5]),
    st.sampled_from(["", "x" * 200_000, "../../../../etc", "v0001/../../x", "v0001\n", "0" * 32, "/etc/passwd",
                     "\n\nTraceback"]),
    st.sampled_from([None, True, [], {}, [[[[]]]], [0] * 20_000, [[0, 1]] * 3, {"": None}]),
    st.integers(), st.text(max_size=40), st.lists(st.integers(), max_size=12),
)


@pytest.fixture(scope="module")
def tamper_base(demo_fit, tmp_path_factory):
    """A state folder, a daemon config following its logs/ and a checkpoint with every part
    filled in: a followed file, open sessions, templates learned since the fit, counters, an
    alert pending."""
    root = tmp_path_factory.mktemp("tamper")
    state = Path(shutil.copytree(demo_fit.cfg.state_dir, root / "state"))
    (root / "logs").mkdir()
    lines = demo_fit.day.read_text().splitlines()
    cut = len(lines) // 2
    (root / "logs" / "app.log").write_text("\n".join(lines[:cut]) + "\n")
    cfg = parse_config({"state_dir": str(state), "server": {"listen": f"127.0.0.1:{free_port()}"},
                        "sources": [{"name": "api", "paths": [str(root / "logs" / "*.log")], "start_at": "beginning",
                                     "line_pattern": demo_fit.cfg.sources[0].line_pattern}],
                        "sessions": {"idle_timeout_s": 5}})
    pipe = Pipeline(cfg, load_baseline(state), clock=lambda: 0.0)
    follower = Follower(cfg.sources, pipe)
    follower.attach(None)
    follower.poll()
    pipe.tick(pipe.watermark)
    doc = orjson.loads(capture(pipe, follower.positions(), {"offset": 0, "count": 0, "pending": ["a1b2c3"]}))
    follower.close()
    assert doc["files"] and doc["pipeline"]["sessions"]["open"] and doc["pipeline"]["templates"]["templates"]
    return cfg, doc


def _start_once(cfg) -> tuple[str | None, dict]:
    """Start the real Daemon on the state as it is and stop it: the one line the command would
    print (None when it started), and what it started with."""
    daemon = Daemon(cfg, registry=CollectorRegistry())
    try:
        daemon.start()
    except TracewatchError as exc:
        return f"tracewatch: {exc}", {}
    pipe = daemon.pipe
    state = {"followed": [(t.path, t.offset, os.fstat(t.fd).st_size) for t in daemon.follower.tails],
             "times": [pipe.watermark] + [x for s in pipe.sessionizer.open.values()
                                           for x in (s.first_ts, s.last_ts, s.last_seen)],
             "counts": [pipe.sessionizer.evicted] + [n for name in COUNTERS for n in getattr(pipe, name).values()]}
    daemon.close(checkpoint=False)
    return None, state


def _sane(cfg, state: dict) -> None:
    """What a daemon may start with: real times, counts a counter can hold, files inside the
    folder it follows and offsets within them."""
    folder = Path(cfg.sources[0].paths[0]).parent
    assert all(math.isfinite(t) and abs(t) < 1e11 for t in state["times"]), state["times"][:5]
    assert all(0 <= n < 2**63 for n in state["counts"])
    assert all(Path(p).parent == folder and 0 <= offset <= size for p, offset, size in state["followed"]), \
        state["followed"]


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                                   HealthCheck.too_slow])
@given(data=st.data(), value=HOSTILE, how=st.sampled_from(["replace", "replace", "replace", "delete", "extra"]))
def test_a_tampered_checkpoint_is_refused_in_one_line_or_used_safely(tamper_base, data, value, how):
    """Any one place of the checkpoint replaced by a hostile value (out of range, of the wrong
    type or shape, huge), deleted, or joined by an unexpected key: the real daemon refuses to
    start with one line naming the checkpoint — never another exception — or starts sane."""
    cfg, doc = tamper_base
    where = data.draw(st.sampled_from(list(_paths(doc))), label="where")
    path = Path(cfg.state_dir) / "checkpoint.json"
    path.write_text(json.dumps(_tampered(doc, where, value, how)))  # json: NaN and Infinity as they would be
    line, state = _start_once(cfg)
    if line is not None:
        assert "\n" not in line and "checkpoint" in line and len(line) < 1000, line
    else:
        _sane(cfg, state)


TAMPERS = {  # place, value: each one a start must refuse
    "offset-past-any-file": (("files", 0, "offset"), 2**64),
    "negative-inode": (("files", 0, "ino"), -5),
    "huge-head-length": (("files", 0, "fp_len"), 10**9),
    "head-not-a-hash": (("files", 0, "fp"), "../../x"),
    "path-too-long": (("files", 0, "path"), "/" + "x" * 10_000),
    "offset-past-the-size": (("files", 0, "size"), 1),
    "watermark-nan": (("pipeline", "watermark"), float("nan")),
    "session-time-infinite": (("pipeline", "sessions", "open", 0, 4), float("inf")),
    "session-event-negative": (("pipeline", "sessions", "open", 0, 2), [-1]),
    "session-too-many-samples": (("pipeline", "sessions", "open", 0, 8), ["x"] * 50),
    "session-wrong-shape": (("pipeline", "sessions", "open", 0), ["api", "k"]),
    "evicted-huge": (("pipeline", "sessions", "evicted"), 10**400),
    "template-without-tokens": (("pipeline", "templates", "templates", 0, "tokens"), []),
    "template-path-longer-than-tokens": (("pipeline", "templates", "templates", 0, "path"), ["a"] * 40),
    "unknown-counter": (("pipeline", "counters", "surprise"), []),
    "counter-negative": (("pipeline", "counters", "records"), [[["api"], -3]]),
    "baseline-outside-the-state-folder": (("baseline_version",), "../../../../etc"),
    "pending-not-ids": (("alerts", "pending"), [["nested"]]),
}


@pytest.mark.parametrize("name", list(TAMPERS))
def test_an_out_of_range_checkpoint_is_refused_in_one_line(tamper_base, name):
    cfg, doc = tamper_base
    where, value = TAMPERS[name]
    (Path(cfg.state_dir) / "checkpoint.json").write_text(json.dumps(_tampered(doc, where, value, "replace")))
    line, _ = _start_once(cfg)
    assert line is not None and "\n" not in line and "checkpoint is damaged" in line, line


def test_a_tampered_checkpoint_stops_the_command_with_one_line(tamper_base, tmp_path):
    """Through the real command: exit 1, one line, no traceback."""
    cfg, doc = tamper_base
    state = Path(shutil.copytree(cfg.state_dir, tmp_path / "state"))
    toml = tmp_path / "tracewatch.toml"
    toml.write_text(f'state_dir = "state"\n[server]\nlisten = "127.0.0.1:{free_port()}"\n[[sources]]\nname = "api"\n'
                    f'paths = ["{Path(cfg.sources[0].paths[0])}"]\nline_pattern = \'{cfg.sources[0].line_pattern}\'\n')
    (state / "checkpoint.json").write_text(json.dumps(_tampered(doc, ("pipeline", "watermark"), float("nan"), "replace")))
    daemon = DaemonProcess(toml)
    try:
        code = daemon.proc.wait(timeout=60)
    except subprocess.TimeoutExpired:
        raise AssertionError("the daemon started on a checkpoint whose time is not a number") from None
    err = daemon.stderr()
    assert code == 1 and err.count("\n") == 1 and err.startswith("tracewatch: ") and "checkpoint" in err, err
