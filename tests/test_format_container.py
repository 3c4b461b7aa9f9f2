"""Formats ``cri`` and ``docker-json`` against the runtimes' own writing rules
(tests/container_writers.py: containerd's CRI logger, Docker's json-file driver) and kubelet's
file names: long lines cut at 16 KiB joined back, stdout and stderr interleaved, the
application's lines read by the inner format with the source's own options, the container's
names on session keys and alerts, a checkpoint's resume point that reads nothing twice, and the
live daemon through kubelet's rotation giving the alerts a batch score of the same lines gives."""

from __future__ import annotations

import json
import os
import shutil
import time
from datetime import datetime, timezone
from pathlib import Path

import pytest

from tracewatch.batch import assign_sources, score_files
from tracewatch.config import parse_config
from tracewatch.formats import feed_lines, make_format
from tracewatch.formats.container import HOLD_LINES, container_labels
from tracewatch.records import Record, Rejection

from .container_writers import CRI_MAX, DOCKER_BUF, cri_pieces, docker_pieces, interleave, rfc3339nano
from .daemon_helpers import DaemonProcess, fitted, no_daemon_left, workspace  # noqa: F401

POD_ID = "7c6c42ab" * 8
LINK = f"/var/log/containers/locker-api-7d9f8c-x2k4p_lockers_api-{POD_ID}.log"
PODS = "/var/log/pods/lockers_locker-api-7d9f8c-x2k4p_0f1e2d3c-4b5a-6978-8a9b-0c1d2e3f4a5b/api/0.log"
T0 = 1_764_496_800.0


def _source(fmt: str, **options):
    return parse_config({"sources": [{"name": "api", "format": fmt, **options}]}).sources[0]


def _records(fmt: str, lines: list[str], stream: str = LINK, **options) -> list:
    return feed_lines(make_format(_source(fmt, **options), stream), lines)


def _messages(out: list) -> list[str]:
    return [x.message for x in out if type(x) is Record]


@pytest.mark.parametrize("size", [1, CRI_MAX - 1, CRI_MAX, CRI_MAX + 1, 2 * CRI_MAX, 40_000])
def test_cri_lines_cut_by_containerd_are_joined_back(size):
    line = ("x" * (size - 1) + "!").encode()
    pieces = cri_pieces("stdout", line + b"\n", T0)
    # containerd's own test (TestLongContainerLog): 16383 and 16384 bytes are one F, 16385 a P and an F
    assert [p.split(" ")[2] for p in pieces] == ["P"] * ((size - 1) // CRI_MAX) + ["F"]
    out = _records("cri", pieces, max_line_bytes=1 << 20)
    assert _messages(out) == [line.decode()]
    assert not [x for x in out if type(x) is Rejection]


@pytest.mark.parametrize("size", [1, DOCKER_BUF - 1, DOCKER_BUF, DOCKER_BUF + 1, 40_000])
def test_docker_lines_cut_at_16k_are_joined_back(size):
    line = ("y" * (size - 1) + "?").encode()
    pieces = docker_pieces("stderr", line + b"\n", T0)
    assert sum(json.loads(p)["log"].endswith("\n") for p in pieces) == 1  # only the last piece ends the line
    assert _messages(_records("docker-json", pieces, max_line_bytes=1 << 20)) == [line.decode()]


def test_stdout_and_stderr_interleaved_come_out_in_the_order_their_lines_began():
    out_lines = [b"INFO req=a1 " + b"o" * 100 + b" end", b"INFO req=a1 short"]
    err_lines = [b"WARN req=a1 " + b"e" * 70, b"ERROR req=a1 gave up"]
    pieces = interleave(cri_pieces("stdout", b"\n".join(out_lines) + b"\n", T0, max_len=32),
                        cri_pieces("stderr", b"\n".join(err_lines) + b"\n", T0 + 0.001, max_len=32))
    got = _records("cri", pieces, line_pattern=r"^(?P<level>[A-Z]+) req=(?P<key>\w+) (?P<message>.*)$")
    recs = [x for x in got if type(x) is Record]
    # pieces in the file: o1 e1 o1 e1 o1 e1 o1 e2 o2 — stdout's first line in 4 pieces, stderr's in 3
    assert [p.split(" ", 3)[1:3] for p in pieces[:7]] == [["stdout", "P"], ["stderr", "P"]] * 2 + [
        ["stdout", "P"], ["stderr", "F"], ["stdout", "F"]]
    assert [r.raw for r in recs] == [x.decode() for x in (out_lines[0], err_lines[0], err_lines[1], out_lines[1])]
    assert [r.level for r in recs] == ["INFO", "WARN", "ERROR", "INFO"]
    assert {r.key for r in recs} == {"lockers/locker-api-7d9f8c-x2k4p/api:a1"}
    assert recs[0].ts == T0  # the inner line has no time: the runtime's time of its first piece


def test_a_checkpoint_resumes_at_the_first_waiting_piece_and_reads_nothing_twice():
    """Cut the stream anywhere; a new format from ``held_from`` on (a restart from a checkpoint)
    gives exactly the records the one reader would have given after the cut."""
    pieces = interleave(cri_pieces("stdout", b"A " + b"a" * 90 + b"\nB b\n", T0, max_len=20),
                        cri_pieces("stderr", b"C c\nD " + b"d" * 50 + b"\n", T0, max_len=20))
    offsets = list(range(0, 100 * len(pieces), 100))
    src = _source("cri")
    whole = [x for x in feed_lines(make_format(src, LINK), pieces)]
    for cut in range(len(pieces) + 1):
        first = make_format(src, LINK)
        before = [x for line, off in zip(pieces[:cut], offsets[:cut]) for x in first.feed(line, off)]
        resume = first.held_from if first.held_from is not None else 100 * cut
        again = make_format(src, LINK)
        after = [x for line, off in zip(pieces, offsets) if off >= resume for x in again.feed(line, off)]
        after += again.flush()
        assert [r.message for r in before + after] == [r.message for r in whole], cut


def test_the_inner_format_reads_json_application_lines_with_the_sources_options():
    app = [json.dumps({"ts": "2026-11-30T10:00:00.5Z", "lvl": "WARN", "ctx": {"req": "r9"}, "msg": "door 5 slow"}),
           json.dumps({"lvl": "INFO", "ctx": {"req": "r9"}, "msg": "x" * 20_000})]
    pieces = cri_pieces("stdout", ("\n".join(app) + "\n").encode(), T0)
    out = _records("cri", pieces, stream=PODS, payload_format="jsonl", message_field="msg", time_field="ts",
                   level_field="lvl", session_key="ctx.req")
    recs = [x for x in out if type(x) is Record]
    assert [(r.key, r.level, r.message[:11]) for r in recs] == [
        ("lockers/locker-api-7d9f8c-x2k4p/api:r9", "WARN", "door 5 slow"),
        ("lockers/locker-api-7d9f8c-x2k4p/api:r9", "INFO", "xxxxxxxxxxx")]
    assert recs[0].ts == datetime(2026, 11, 30, 10, 0, 0, 500000, timezone.utc).timestamp() and recs[1].ts == T0  # its own time first, else the runtime's


def test_bad_lines_unfinished_and_too_long_lines_are_counted_and_kept():
    lines = ["not a cri line", f"{rfc3339nano(T0)} stdin F wrong stream", f"{rfc3339nano(T0)} stdout P half"]
    out = _records("cri", lines)
    assert [(x.reason, x.record.message if x.record else None) for x in out if type(x) is Rejection] == [
        ("bad_container_line", "not a cri line"), ("bad_container_line", lines[1]), ("partial_unfinished", "half")]
    long = cri_pieces("stdout", b"z" * 3000 + b"\n", T0, max_len=1000)
    out = _records("cri", long, max_line_bytes=1024)
    assert [(x.reason, len(x.record.message)) for x in out] == [("joined_too_long", 1024)]
    # an incomplete line does not hold the others back for ever
    stuck = [f"{rfc3339nano(T0)} stderr P waiting for input: "] + [f"{rfc3339nano(T0)} stdout F line {i}"
                                                                   for i in range(HOLD_LINES + 5)]
    fmt = make_format(_source("cri"), LINK)
    given = [x for i, line in enumerate(stuck) for x in fmt.feed(line, i)]
    assert given[0].reason == "partial_unfinished" and given[0].record.offset == 0
    assert [x.message for x in given[1:]] == [f"line {i}" for i in range(HOLD_LINES + 5)]
    assert fmt.held_from is None


def test_container_names_come_from_kubelets_file_names():
    want = {"namespace": "lockers", "pod": "locker-api-7d9f8c-x2k4p", "container": "api"}
    assert container_labels(LINK) == want
    assert container_labels(PODS) == want
    assert container_labels(f"{LINK}@2049:131") == want  # the follower's stream name
    assert container_labels("/var/lib/docker/containers/ab12/ab12-json.log") is None
    out = _records("cri", [f"{rfc3339nano(T0)} stdout F INFO req=q1 hello"], stream="/srv/other.log",
                   line_pattern=r"^(?P<level>\S+) req=(?P<key>\S+) (?P<message>.*)$")
    assert out[0].key == "q1"  # not a kubelet name: keys as the application wrote them
    off = _records("cri", [f"{rfc3339nano(T0)} stdout F INFO req=q1 hello"], container_key_prefix=False,
                   line_pattern=r"^(?P<level>\S+) req=(?P<key>\S+) (?P<message>.*)$")
    assert off[0].key == "q1"


def _wrapped(lines: list[str], *, max_len: int = CRI_MAX) -> list[str]:
    """The demo's text lines as containerd writes them: WARN and ERROR lines on stderr, the rest on
    stdout, each at its own time."""
    out = []
    for i, line in enumerate(lines):
        stream = "stderr" if line.split(" ", 2)[1] in ("WARN", "ERROR") else "stdout"
        out += cri_pieces(stream, line.encode() + b"\n", T0 + i / 1000, max_len=max_len)
    return out


def _unprefixed(alerts: list[dict]) -> list[dict]:
    """Alerts without what the container adds (its names on the key, hence another alert id) and
    what depends on delivery (offsets, how the session was closed)."""
    out = []
    for a in alerts:
        a = {k: v for k, v in a.items() if k not in ("alert_id", "container", "closed_by", "first_offset")}
        a["session_key"] = a["session_key"].split(":", 1)[-1]
        out.append(a)
    return sorted(out, key=lambda a: (a["start"], a["session_key"]))


def test_batch_score_of_a_container_log_equals_the_applications_own_lines(demo_fit, demo_state, tmp_path):
    """The demo day, as containerd writes it under kubelet's name (lines cut at 64 bytes so that
    most are joined), scored with the baseline fitted on the plain lines: the same alerts, each
    naming its container."""
    text_alerts: list[dict] = []
    score_files(demo_fit.cfg, assign_sources(demo_fit.cfg, [str(demo_fit.day)]), demo_fit.baseline,
                text_alerts.append)
    assert len(text_alerts) >= 10
    folder = tmp_path / "containers"
    folder.mkdir()
    path = folder / Path(LINK).name
    path.write_text("\n".join(_wrapped(demo_fit.day.read_text().splitlines(), max_len=64)) + "\n")
    src = demo_fit.cfg.sources[0].model_dump(exclude_unset=True)
    cfg = parse_config({"state_dir": str(demo_state), "sources": [{**src, "format": "cri"}],
                        "sessions": {"idle_timeout_s": 5}, "model": {"false_alarm_rate": 0.02}})
    cri_alerts: list[dict] = []
    pipe = score_files(cfg, assign_sources(cfg, [str(path)]), demo_fit.baseline, cri_alerts.append)
    assert not pipe.rejected, pipe.rejected
    assert _unprefixed(cri_alerts) == _unprefixed(text_alerts)
    assert all(a["container"] == {"namespace": "lockers", "pod": "locker-api-7d9f8c-x2k4p", "container": "api"}
               and a["session_key"].startswith("lockers/locker-api-7d9f8c-x2k4p/api:") for a in cri_alerts)


def _kubelet_rotate(log: Path, n: int) -> None:
    """kubelet's container log manager: the live file renamed to ``<name>.<YYYYMMDD-hhmmss>`` and
    the runtime told to reopen it (a new file at the path)."""
    log.rename(log.with_name(f"{log.name}.20261130-10{n:04d}"))
    log.touch()


def test_the_daemon_reads_kubelets_pod_logs_through_rotation_like_the_batch(fitted, tmp_path):  # noqa: F811
    """`tracewatch run` following /var/log/pods-style folders (the source of kubelet's links):
    lines cut at 64 bytes, stderr beside stdout, delivered in bursts cut inside a piece, the file
    rotated as kubelet does twice, the daemon restarted once: the alerts `tracewatch score` gives
    for the plain lines, every line once."""
    _, _, _, lines, expected = fitted
    cfg_path = workspace(fitted, tmp_path)
    pods = tmp_path / "logs" / "pods" / "lockers_locker-api-7d9f8c-x2k4p_0f1e2d3c-4b5a-6978-8a9b-0c1d2e3f4a5b" / "api"
    pods.mkdir(parents=True)
    text = cfg_path.read_text().replace('format = "text"', 'format = "cri"')
    cfg_path.write_text(text.replace(f'paths = ["{tmp_path}/logs/*.log"]', f'paths = ["{tmp_path}/logs/pods/*/*/*.log"]'))
    log = pods / "0.log"
    log.touch()
    daemon = DaemonProcess(cfg_path).ready()
    bursts = [lines[i:i + 150] for i in range(0, len(lines), 150)]
    for i, burst in enumerate(bursts):
        if i in (len(bursts) // 3, 2 * len(bursts) // 3):
            _kubelet_rotate(log, i)
        if i == len(bursts) // 2:
            assert daemon.terminate() == 0
            daemon = DaemonProcess(cfg_path).ready()
        data = "".join(x + "\n" for x in _wrapped(burst, max_len=64)).encode()
        with open(log, "ab") as fh:
            fh.write(data[:len(data) // 2 + 7])
            fh.flush()
            time.sleep(0.005)  # the writer's pace inside a piece; nothing waits here
            fh.write(data[len(data) // 2 + 7:])
        time.sleep(0.05)
    daemon.until(lambda: daemon.status()["sources"][0]["records"] == len(lines) and
                 daemon.status()["sessions_open"] == 0, f"{len(lines)} records and every session closed")
    status = daemon.status()
    assert daemon.terminate() == 0
    assert not status["sources"][0]["rejected"], status["sources"][0]["rejected"]
    got = [json.loads(x) for x in (tmp_path / "state" / "alerts.jsonl").read_text().splitlines()]
    assert len(got) == len({a["alert_id"] for a in got}), "an alert was journalled twice"
    assert _unprefixed(got) == _unprefixed(expected)
    assert {a["container"]["pod"] for a in got} == {"locker-api-7d9f8c-x2k4p"}
    assert sorted(os.listdir(pods)) == ["0.log", f"0.log.20261130-10{len(bursts) // 3:04d}",
                                        f"0.log.20261130-10{2 * len(bursts) // 3:04d}"]
    shutil.rmtree(pods)
