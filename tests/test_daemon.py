"""The daemon end to end: the real `tracewatch run` as a subprocess on real files and a real
loopback port, and the same Daemon object in-process for hot reload, eviction and readiness.

What must hold: for the same lines, the alerts the daemon journals equal what `tracewatch
score` prints in one batch — across a rotation by rename, a copytruncate, a clean restart and
several kill -9 — with no line lost and no alert twice."""

from __future__ import annotations

import json
import os
import shutil
import socket
import sqlite3
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from prometheus_client.parser import text_string_to_metric_families

from tracewatch.baselines import baselines_dir, load_baseline
from tracewatch.fs import atomic_write
from tracewatch.batch import assign_sources, fit_files
from tracewatch.config import load_config
from tracewatch.pipeline import Pipeline
from tracewatch.sessions import LiveTime

from .conftest import run_cli
from .daemon_helpers import (IDLE_S, DaemonProcess, FakeWall, InProcess, fitted, free_port,  # noqa: F401
                             no_daemon_left, workspace, write_burst, write_config)

PAUSE_S = 0.05  # writer pauses stay far below IDLE_S - 0.3 s (the live/batch rule in sessions.py)


def _comparable(alerts: list[dict]) -> dict[str, dict]:
    """Alerts by id, without what depends on how the lines were delivered: file offsets, and
    whether the session was closed by the idle timeout (live) or the end of the input (batch)."""
    return {a["alert_id"]: {k: v for k, v in a.items() if k not in ("closed_by", "first_offset")}
            for a in alerts}


def _rotate(logs: Path) -> None:
    os.rename(logs / "app.log", logs / "app.log.1")  # the new app.log is created by the next burst


def _copytruncate(logs: Path) -> None:
    shutil.copy(logs / "app.log", logs / "app.log.2")
    os.truncate(logs / "app.log", 0)


def _journal(cfg_path: Path) -> list[dict]:
    return [json.loads(x) for x in (cfg_path.parent / "state" / "alerts.jsonl").read_text().splitlines()]


def test_live_alerts_equal_the_batch_through_rotation_copytruncate_and_restart(fitted, tmp_path):
    _, _, _, lines, expected = fitted
    cfg_path = workspace(fitted, tmp_path)
    logs = tmp_path / "logs"
    daemon = DaemonProcess(cfg_path, "--log-format", "json").ready()
    bursts = [lines[i:i + 150] for i in range(0, len(lines), 150)]
    third = len(bursts) // 3
    for i, burst in enumerate(bursts):
        if i == third:
            _rotate(logs)
        elif i == 2 * third:
            _copytruncate(logs)
        elif i == 2 * third + 2:  # a clean restart: open sessions go on from the checkpoint
            assert daemon.terminate() == 0
            assert all(json.loads(x)["level"] for x in daemon.stderr().splitlines())  # JSON lines
            daemon = DaemonProcess(cfg_path).ready()
        write_burst(logs / "app.log", burst)
        time.sleep(PAUSE_S)  # the application's pace between bursts; the test waits on nothing here
    status = daemon.caught_up(len(lines))
    _, metrics = daemon.get("/metrics")
    samples = {(s.name, tuple(sorted(s.labels.items()))): s.value
               for fam in text_string_to_metric_families(metrics.decode()) for s in fam.samples}
    assert samples[("tracewatch_records_total", (("source", "api"),))] == len(lines)
    assert samples[("tracewatch_baseline_info", (("version", "v0001"),))] == 1
    _, body = daemon.get("/api/alerts?since=0&limit=1000")
    assert daemon.terminate() == 0
    assert "Traceback" not in daemon.stderr()

    got = _journal(cfg_path)
    assert len(got) == len({a["alert_id"] for a in got}), "an alert was journalled twice"
    assert _comparable(got) == _comparable(expected)
    assert [a["alert_id"] for a in json.loads(body)["alerts"]] == [a["alert_id"] for a in got]
    assert status["sessions_evicted"] == 0 and status["sources"][0]["lag_bytes"] == 0
    # every session scored, alert or not, counted once for the incidents' rates, across the restart
    db = sqlite3.connect(cfg_path.parent / "state" / "incidents.db")
    try:
        assert db.execute("SELECT SUM(count) FROM sessions").fetchone()[0] == status["sources"][0]["sessions_scored"]
    finally:
        db.close()


def _kill_points(cfg_path: Path, n_lines: int) -> list:
    """When to kill -9 each started daemon: conditions on what it did since it was ready, each
    a different moment — alerts appended and not checkpointed yet, just after a checkpoint, in
    the middle of the day's records (status counters, the journal's size, the checkpoint's time)."""
    state = cfg_path.parent / "state"

    def journal_lines() -> int:
        path = state / "alerts.jsonl"
        return path.read_bytes().count(b"\n") if path.exists() else 0

    def after_new_alerts(daemon: DaemonProcess):
        before = journal_lines()
        return lambda: journal_lines() >= before + 2

    def after_a_checkpoint(daemon: DaemonProcess):
        before = (state / "checkpoint.json").stat().st_mtime_ns
        return lambda: (daemon.status()["sources"][0]["records"] >= n_lines // 2
                        and (state / "checkpoint.json").stat().st_mtime_ns > before)

    def in_the_middle(daemon: DaemonProcess):
        return lambda: daemon.status()["sources"][0]["records"] >= n_lines * 3 // 4

    return [after_new_alerts, after_a_checkpoint, in_the_middle]


def test_kill_9_while_writing_loses_nothing_and_repeats_nothing(fitted, tmp_path):
    _, _, _, lines, expected = fitted
    cfg_path = workspace(fitted, tmp_path)
    logs = tmp_path / "logs"
    bursts = [lines[i:i + 60] for i in range(0, len(lines), 60)]

    def writer() -> None:  # an application writing its log, whatever happens to the daemon
        for i, burst in enumerate(bursts):
            if i == len(bursts) // 2:
                _rotate(logs)
            write_burst(logs / "app.log", burst)
            time.sleep(0.15)  # the application's pace: far below the idle timeout, as in real traffic

    daemon = DaemonProcess(cfg_path).ready()
    thread = threading.Thread(target=writer)
    thread.start()
    try:
        for kill_point in _kill_points(cfg_path, len(lines)):
            daemon.until(kill_point(daemon), f"the moment to kill ({kill_point.__name__})")
            daemon.kill()  # SIGKILL: no chance to save anything
            daemon = DaemonProcess(cfg_path).ready()
    finally:
        thread.join()
    status = daemon.caught_up(len(lines))
    assert daemon.terminate() == 0
    got = _journal(cfg_path)
    assert status["sources"][0]["records"] == len(lines)
    assert len(got) == len({a["alert_id"] for a in got}), "an alert was journalled twice"
    assert _comparable(got) == _comparable(expected)


@pytest.mark.parametrize("problem, code, message", [
    ("no-baseline", 1, "fit one first with 'tracewatch fit"),
    ("port-in-use", 2, "is already in use"),
    ("missing-folder", 1, "does not exist"),
], ids=["no-baseline", "port-in-use", "missing-folder"])
def test_start_up_errors_are_one_clear_line(fitted, tmp_path, problem, code, message):
    cfg_path = write_config(tmp_path, free_port()) if problem == "no-baseline" else workspace(fitted, tmp_path)
    blocker = None
    if problem == "port-in-use":
        blocker = socket.socket()
        blocker.bind(("127.0.0.1", int(load_config(cfg_path).server.listen.rsplit(":", 1)[1])))
        blocker.listen()
    elif problem == "missing-folder":
        shutil.rmtree(tmp_path / "logs")
    try:
        proc = run_cli("run", "--config", str(cfg_path))
    finally:
        if blocker is not None:
            blocker.close()
    assert proc.returncode == code, proc.stderr
    assert message in proc.stderr and "Traceback" not in proc.stderr
    assert len([x for x in proc.stderr.splitlines() if x.startswith("tracewatch:")]) == 1


@pytest.mark.parametrize("stop", ["kill-9", "sigterm"], ids=["after-the-checkpoint", "before-the-checkpoint"])
def test_a_damaged_journal_line_is_counted_once_and_nothing_else_is_lost(fitted, tmp_path, stop):
    # kill -9 with only the start's checkpoint: every alert is after the checkpoint's mark, so a
    # restart raises them all again — the damaged one is no record and is appended again, the
    # others are recognised. SIGTERM: every alert is before the mark and nothing is raised again.
    _, _, _, lines, expected = fitted
    cfg_path = workspace(fitted, tmp_path, checkpoint_s=3600)
    journal = tmp_path / "state" / "alerts.jsonl"
    daemon = DaemonProcess(cfg_path).ready()
    write_burst(tmp_path / "logs" / "app.log", lines)
    daemon.caught_up(len(lines))
    daemon.until(lambda: journal.read_bytes().count(b"\n") == len(expected), "every alert journalled")
    if stop == "kill-9":
        daemon.kill()
    else:
        assert daemon.terminate() == 0
    rows = journal.read_bytes().split(b"\n")
    damaged_id = json.loads(rows[2])["alert_id"]
    rows[2] = rows[2][:40] + b"\x00" * 16  # what a power loss can leave of a line
    journal.write_bytes(b"\n".join(rows))

    daemon = DaemonProcess(cfg_path).ready()  # before: the orjson error stopped `tracewatch run` here
    status = daemon.caught_up(len(lines))
    assert status["alert_lines_damaged"] == 1
    served = json.loads(daemon.get("/api/alerts?since=0&limit=1000")[1])["alerts"]
    assert daemon.terminate() == 0
    log = daemon.stderr()
    assert "Traceback" not in log and log.count("damaged line") == 1, log
    kept = [json.loads(r) for i, r in enumerate(journal.read_bytes().split(b"\n")) if r and i != 2]
    assert len(kept) == len({a["alert_id"] for a in kept}), "an alert was journalled twice"
    want = {k: v for k, v in _comparable(expected).items() if stop == "kill-9" or k != damaged_id}
    assert _comparable(kept) == want
    assert {a["alert_id"] for a in served} == set(want)


# -- in-process: the same Daemon object, driven from a thread --------------------------------------
def test_hot_reload_refuses_a_corrupt_baseline_and_keeps_open_sessions(fitted, tmp_path):
    _, _, base, lines, _ = fitted
    cfg_path = workspace(fitted, tmp_path, idle=600)  # nothing closes while the test refits
    cfg = load_config(cfg_path)
    live = InProcess(cfg_path)
    try:
        write_burst(tmp_path / "logs" / "app.log", lines[:200])
        live.until(lambda: live.metric("tracewatch_records_total", {"source": "api"}) == 200, "200 records")
        open_before = live.daemon.status()["sessions_open"]
        assert open_before > 0

        root = baselines_dir(cfg.state_dir)
        shutil.copytree(root / "v0001", root / "v0002")
        model = root / "v0002" / "model.npz"
        data = bytearray(model.read_bytes())
        data[len(data) // 2] ^= 0xFF
        model.write_bytes(bytes(data))
        atomic_write(root / "CURRENT", b"v0002\n")
        live.until(lambda: live.metric("tracewatch_baseline_reload_failures_total") == 1, "the refusal")
        assert live.metric("tracewatch_baseline_info", {"version": "v0001"}) == 1

        fit_files(cfg, assign_sources(cfg, [str(base)]))  # v0003, made current
        live.until(lambda: live.metric("tracewatch_baseline_info", {"version": "v0003"}) == 1, "the switch")
        assert live.daemon.status()["sessions_open"] == open_before  # none lost, none closed early
    finally:
        live.stop()
    assert {a["baseline_version"] for a in _journal(cfg_path)} <= {"v0001", "v0003"}


def test_a_reload_retries_a_refused_baseline_and_each_state_is_announced_once(fitted, tmp_path):
    cfg_path = workspace(fitted, tmp_path)
    root = baselines_dir(load_config(cfg_path).state_dir)
    states: list[str] = []
    live = InProcess(cfg_path, on_state=states.append)
    try:
        assert states == ["ready"]
        first = live.daemon.pipe.baseline
        shutil.copytree(root / "v0001", root / "v0002")  # a copy: its manifest still names v0001
        model = root / "v0002" / "model.npz"
        good = model.read_bytes()
        model.write_bytes(good[:len(good) // 2] + bytes([good[len(good) // 2] ^ 0xFF]) + good[len(good) // 2 + 1:])
        atomic_write(root / "CURRENT", b"v0002\n")
        live.until(lambda: live.metric("tracewatch_baseline_reload_failures_total") == 1, "the refusal")
        model.write_bytes(good)  # repaired in place: its manifest did not change, the watch sees nothing
        live.daemon.request_reload()  # what SIGHUP will ask for
        live.until(lambda: live.daemon.pipe.baseline is not first, "the switch to the repaired copy")
        live.until(lambda: states == ["ready", "reloading", "ready"], "the reload announced")
    finally:
        live.stop()
    assert states == ["ready", "reloading", "ready", "stopping"]


def test_max_open_sessions_evicts_the_oldest_and_counts_it(fitted, tmp_path):
    cfg_path = workspace(fitted, tmp_path, max_open=20)
    live = InProcess(cfg_path)
    try:
        write_burst(tmp_path / "logs" / "app.log",
                    [f"2026-11-30T10:00:{i:02d}.000Z INFO [locker-api] req=k{i:03d} health probe from monitor "
                     f"10.0.0.{i}" for i in range(50)])
        live.until(lambda: live.metric("tracewatch_records_total", {"source": "api"}) == 50, "50 records")
        live.until(lambda: live.metric("tracewatch_sessions_evicted_total") == 30, "30 evictions")
        assert live.metric("tracewatch_sessions_open") == 20
    finally:
        live.stop()


def test_readiness_follows_the_watched_folder(fitted, tmp_path):
    cfg_path = workspace(fitted, tmp_path)
    live = InProcess(cfg_path)
    try:
        assert live.daemon.ready() == (True, "")
        shutil.rmtree(tmp_path / "logs")
        live.until(lambda: not live.daemon.ready()[0], "not ready")
        assert "source api is not attached: folder" in live.daemon.ready()[1]
        (tmp_path / "logs").mkdir()
        live.until(lambda: live.daemon.ready()[0], "ready again")
        write_burst(tmp_path / "logs" / "app.log", fitted[3][:10])  # watched again: new files are read
        live.until(lambda: live.metric("tracewatch_records_total", {"source": "api"}) == 10, "10 records")
    finally:
        live.stop()


# -- the live clock ---------------------------------------------------------------------------------
def test_live_time_follows_records_and_moves_on_only_while_quiet():
    wall, mark = FakeWall(), [0.0]
    live = LiveTime(lambda: mark[0], wall)
    assert live() == wall.t  # no timestamps yet: the wall clock
    mark[0] = 100.0
    assert live() == 100.0
    wall.t += 3
    assert live() == 103.0  # quiet for 3 s: event time moved on 3 s
    live.hold()  # input still waiting: the time spent reading does not count
    wall.t += 10
    live.hold()
    assert live() == 103.0
    mark[0] = 104.0
    assert live() == 104.0


def test_idle_session_closes_live_after_quiet_time_not_during_a_backlog(fitted):
    root, cfg_path = fitted[0], fitted[1]
    cfg = load_config(cfg_path)
    wall = FakeWall()
    verdicts: list[dict] = []
    pipe: Pipeline | None = None
    live = LiveTime(lambda: pipe.watermark, wall)
    pipe = Pipeline(cfg, load_baseline(root / "state"), on_verdict=verdicts.append, score_all=True, clock=live)
    pipe.feed_line("api", "f", "2026-11-30T10:00:00.000Z INFO [locker-api] req=a health probe from monitor 10.0.0.1")
    pipe.tick(live())
    wall.t += IDLE_S * 4
    live.hold()  # the follower reported unread input all along
    pipe.tick(live())
    assert pipe.sessionizer.open and not verdicts
    wall.t += IDLE_S + 0.1  # now quiet for longer than the idle timeout
    pipe.tick(live())
    assert not pipe.sessionizer.open and [v["closed_by"] for v in verdicts] == ["idle"]
    assert np.isfinite(verdicts[0]["score"])


def test_run_warns_once_when_the_config_settings_differ(fitted, tmp_path):
    """The baseline was fitted with false_alarm_rate 0.05 (daemon_helpers.write_config)."""
    daemon = DaemonProcess(workspace(fitted, tmp_path, false_alarm_rate=0.2)).ready()
    assert daemon.terminate() == 0
    warned = [line for line in daemon.stderr().splitlines() if "fitted with other settings" in line]
    assert len(warned) == 1 and "WARNING" in warned[0].upper()
    assert warned[0].endswith("baseline v0001 was fitted with other settings than the config's: "
                              "model.false_alarm_rate 0.05 (config: 0.2); it scores with its own — fit again "
                              "to apply the config's")
