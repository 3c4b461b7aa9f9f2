"""`tracewatch init`: starter configs guessed from real programs' output (Python's logging module,
strace, the OpenTelemetry SDK), accepted by check-config and usable by fit and score as written."""

from __future__ import annotations

import json
import logging
import random
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from tests.conftest import run_cli
from tracewatch.starter import SAMPLE_LINES, key_share

HERE = Path(__file__).resolve().parent


def python_log(path: Path, requests: int, *, seed: int, faulty: set[int] = frozenset()) -> list[str]:
    """A log written by Python's own logging module with the formatter
    "%(asctime)s %(levelname)s [req=%(req)s] %(message)s"; request i in ``faulty`` retries its
    door five times. The request ids, in order."""
    rng = random.Random(seed)
    handler = logging.FileHandler(path, mode="w", encoding="utf-8")
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s [req=%(req)s] %(message)s"))
    log = logging.getLogger(f"lockers-{path.name}")
    log.propagate = False
    log.setLevel(logging.INFO)
    log.addHandler(handler)
    ids = []
    try:
        for i in range(requests):
            req = {"req": f"{rng.getrandbits(48):012x}"}
            ids.append(req["req"])
            log.info("pickup code checked for parcel PX%d at LK-%d", rng.randint(1, 999), rng.randint(1, 40), extra=req)
            for _ in range(5 if i in faulty else 1):
                log.info("door %d opened", rng.randint(1, 30), extra=req)
            if rng.random() < 0.3:
                log.warning("door %d slow to close (%d ms)", rng.randint(1, 30), rng.randint(500, 900), extra=req)
            log.info("door closed, parcel collected", extra=req)
    finally:
        log.removeHandler(handler)
        handler.close()
    return ids


def guesses(proc: subprocess.CompletedProcess) -> dict[str, str]:
    """The printed guesses: one line each, "what: value — sureness (...)"."""
    out = {}
    for line in proc.stdout.splitlines():
        if " — " in line:
            what, rest = line.split(": ", 1)
            out[what] = rest
    return out


def init_fit_score(tmp_path: Path, log: Path, day: Path, *extra: str) -> tuple[dict, list[dict]]:
    """init on ``log``, check-config, fit on the config's own paths, score ``day`` (every session)."""
    cfg = tmp_path / "tw.toml"
    made = run_cli("init", str(log), "--out", str(cfg), check=True)
    run_cli("check-config", "--config", str(cfg), check=True)
    run_cli("fit", "--config", str(cfg), check=True)
    scored = run_cli("score", "--config", str(cfg), "--all", str(day), *extra)
    assert scored.returncode in (0, 3), scored.stderr
    return guesses(made), [json.loads(line) for line in scored.stdout.splitlines()]


def test_python_logging_file(tmp_path):
    python_log(tmp_path / "monday.log", 1000, seed=1)  # 250 to calibrate: enough for 0.005
    ids = python_log(tmp_path / "tuesday.log", 100, seed=2, faulty={7, 40})
    found, verdicts = init_fit_score(tmp_path, tmp_path / "monday.log", tmp_path / "tuesday.log")
    assert found["format"].startswith("text — sure (100%")
    assert found["time"].startswith("iso8601 — sure")  # asctime: "2026-12-03 06:16:32,554"
    sampled = {line.split("[req=")[1][:12] for line in (tmp_path / "monday.log").read_text().splitlines()[:SAMPLE_LINES]}
    assert found["session key"].startswith(f"req= — sure (100%; {len(sampled)} distinct values")
    assert {v["session_key"] for v in verdicts} == set(ids)  # every request is one session
    flagged = {v["session_key"] for v in verdicts if v["alert"]}
    assert {ids[7], ids[40]} <= flagged


def test_opentelemetry_sdk_file(tmp_path):
    base, day = tmp_path / "base.jsonl", tmp_path / "day.jsonl"
    for out, args in ((base, ["--normal", "900", "--seed", "1"]), (day, ["--normal", "40", "--faulty", "2", "--seed", "2"])):
        subprocess.run([sys.executable, str(HERE / "otel_app.py"), str(out), str(out) + ".labels", *args],
                       check=True, timeout=120)
    labels = [json.loads(x) for x in Path(str(day) + ".labels").read_text().splitlines()]
    found, verdicts = init_fit_score(tmp_path, base, day)
    assert found["format"].startswith("otlp-json — sure (100%")
    sampled = {span["traceId"] for line in base.read_text().splitlines()[:SAMPLE_LINES]
               for rs in json.loads(line)["resourceSpans"] for ss in rs["scopeSpans"] for span in ss["spans"]}
    assert found["session key"].startswith(f"traceId — sure (100%; {len(sampled)} distinct values")
    faulty = {x["trace_id"] for x in labels if x["label"] != "normal"}
    assert len(faulty) == 8 and faulty <= {v["session_key"] for v in verdicts if v["alert"]}  # 2 of each fault


def pids_of(lines: list[str]) -> set[str]:
    return {line.split(None, 1)[0] for line in lines if line[:1].isdigit()}


def test_strace_output(tmp_path):
    strace = shutil.which("strace")
    if strace is None:
        pytest.skip("strace is not installed (make test installs it with apt-get when it can)")
    (tmp_path / "data.txt").write_text("parcel PX1 compartment 7\n")
    runs = {}
    for name, n in (("monday", 120), ("tuesday", 10)):
        runs[name] = tmp_path / f"{name}.strace"
        proc = subprocess.run([strace, "-f", "-tt", "-o", str(runs[name]), "sh", "-c",
                               f"for i in $(seq {n}); do cat data.txt >/dev/null; done"], cwd=tmp_path,
                              env={"PATH": "/usr/bin:/bin", "LC_ALL": "C"}, capture_output=True, text=True, timeout=120)
        if proc.returncode != 0:
            pytest.skip(f"strace cannot trace here: {proc.stderr.strip()[:200]}")
    found, verdicts = init_fit_score(tmp_path, runs["monday"], runs["tuesday"])
    assert found["format"].startswith("strace — sure (100%")
    sampled = pids_of(runs["monday"].read_text().splitlines()[:SAMPLE_LINES])
    assert found["session key"].startswith(f"pid — sure (100%; {len(sampled)} distinct values")
    pids = pids_of(runs["tuesday"].read_text().splitlines())
    # one session per process: sh, seq and 10 cats
    assert len(pids) == 12 and {v["session_key"] for v in verdicts} == pids


def _shapes(kind: str, n: int = 200) -> list[str]:
    """Invented parcel-locker lines in three more shapes: JSON lines (key ctx.request_id, message
    msg), kubelet's CRI container log around them, RFC 5424 syslog and `journalctl -o json`
    entries (key req= in the message, and a process id that is the same on every line)."""
    rng = random.Random(5)
    out = []
    for i in range(n):
        req = f"{rng.getrandbits(40):010x}"
        for j, msg in enumerate(("compartment reserved", "door opened", "deposit recorded")):
            t = f"2026-11-30T10:{i // 60:02d}:{i % 60:02d}.{j}00Z"
            doc = json.dumps({"time": t, "level": "INFO", "msg": msg,
                              "ctx": {"request_id": req, "locker": f"LK-{rng.randint(1, 3)}"}})
            out.append({"jsonl": doc, "cri": f"{t[:-1]}000000Z stdout F {doc}",
                        "syslog": f"<134>1 {t} gw-3 locker-api 812 - - req={req} {msg}",
                        "journald": json.dumps({"__REALTIME_TIMESTAMP": str(1764496800000000 + i * 10**6 + j),
                                                "PRIORITY": "6", "_SYSTEMD_UNIT": "locker-api.service",
                                                "_PID": "812", "MESSAGE": f"req={req} {msg}"})}[kind])
    return out


@pytest.mark.parametrize("kind,expect", [
    ("jsonl", {"format": "jsonl", "session_key": "ctx.request_id", "message_field": "msg", "time_field": "time",
               "ts_format": "iso8601", "level_field": "level"}),
    ("cri", {"format": "cri", "payload_format": "jsonl", "session_key": "ctx.request_id", "message_field": "msg"}),
    ("syslog", {"format": "syslog", "session_key": r'\breq=(?P<key>[^\s\]\[,;()"]+)'}),
    ("journald", {"format": "journald", "session_key": r'\breq=(?P<key>[^\s\]\[,;()"]+)'}),
], ids=["jsonl", "cri", "syslog", "journald"])
def test_other_shapes(tmp_path, kind, expect):
    import tomllib

    log = tmp_path / "app.log"
    log.write_text("\n".join(_shapes(kind)) + "\n")
    run_cli("init", str(log), "--out", str(tmp_path / "tw.toml"), check=True)
    run_cli("check-config", "--config", str(tmp_path / "tw.toml"), check=True)
    source = tomllib.loads((tmp_path / "tw.toml").read_text())["sources"][0]
    assert {k: source.get(k) for k in expect} == expect
    assert source["paths"] == ["app.log"]


def test_init_says_whether_the_false_alarm_rate_is_reachable(tmp_path):
    """A split-conformal p-value of n calibration sessions is at least 1/(n + 1): the starter's
    false_alarm_rate 0.005 needs 199 of them, a quarter (calibration_fraction) of 796 sessions.
    200 requests give 50 (1/51 is the lowest rate, as the fit then reports); 1000 give 250."""
    log, cfg = tmp_path / "app.log", tmp_path / "tw.toml"
    log.write_text("\n".join(_shapes("jsonl", 200)) + "\n")
    said = run_cli("init", str(log), "--out", str(cfg), check=True).stdout.splitlines()
    assert [line for line in said if line.startswith("false_alarm_rate")] == [
        "false_alarm_rate 0.005 is NOT reachable with this many sessions: the 600 sampled lines hold 200 sessions; "
        "a fit on as many would calibrate on 50, whose lowest p-value is 1/51 = 0.0196, above the rate, so only "
        "never-seen events would raise alerts; fit on at least 796 sessions (199 to calibrate), or set "
        "false_alarm_rate to 0.0197 or more"]
    report = json.loads(run_cli("fit", "--config", str(cfg), "--json", check=True).stdout)
    assert report["calibration_sessions"] == 50 and report["lowest_false_alarm_rate"] == round(1 / 51, 6)
    log.write_text("\n".join(_shapes("jsonl", 1000)) + "\n")
    said = run_cli("init", str(log), "--out", str(cfg), "--force", check=True).stdout
    assert ("false_alarm_rate 0.005 is reachable: the 3000 sampled lines hold 1000 sessions; a fit on as many "
            "would calibrate on 250, whose lowest p-value is 1/251 = 0.00398\n") in said


def test_an_existing_file_is_kept_without_force(tmp_path):
    python_log(tmp_path / "app.log", 20, seed=1)
    cfg = tmp_path / "tw.toml"
    cfg.write_text("# mine\n")
    refused = run_cli("init", str(tmp_path / "app.log"), "--out", str(cfg))
    assert refused.returncode == 2 and cfg.read_text() == "# mine\n"
    assert refused.stderr.strip().splitlines() == [f"tracewatch: {cfg}: already exists; give --force to overwrite "
                                                   "it or --out another file"]
    run_cli("init", str(tmp_path / "app.log"), "--out", str(cfg), "--force", check=True)
    assert "[[sources]]" in cfg.read_text()


@pytest.mark.parametrize("content", [None, ""], ids=["missing", "empty"])
def test_an_unusable_log_gives_one_line(tmp_path, content):
    log = tmp_path / "app.log"
    if content is not None:
        log.write_text(content)
    proc = run_cli("init", str(log), "--out", str(tmp_path / "tw.toml"))
    assert proc.returncode == 1 and len(proc.stderr.strip().splitlines()) == 1
    assert proc.stderr.startswith(f"tracewatch: {log}: ") and not (tmp_path / "tw.toml").exists()


def test_a_request_id_beats_a_field_of_few_values():
    """locker= is on every line with 3 values; req= on every line, 90 requests of 3 lines and
    30 of one line (cut off by the sample's ends, say)."""
    from tracewatch.starter import guess

    lines = [f"2026-11-30T10:00:{i % 60:02d}Z INFO locker=LK-{i % 3} req=r{i // 3} door opened" for i in range(270)]
    lines += [f"2026-11-30T10:01:{i:02d}Z INFO locker=LK-{i % 3} req=single{i} door opened" for i in range(30)]
    found = {g.what: g for g in guess(lines).guesses}
    assert found["session key"].value == "req=" and found["session key"].share == pytest.approx(0.9)
    assert "120 distinct values" in found["session key"].detail


@pytest.mark.parametrize("keys,share,distinct", [
    (["a", "a", "b", "b", "c"], 0.8, 3),  # c never repeats: 4 of 5 records
    (["a", "a", "a"], 0.0, 1),  # one value is no session key
    (["a", "b", "c"], 0.0, 3),  # nothing repeats
    (["a", None, "a", "b", "b", None], 4 / 6, 2),
], ids=["mostly", "one-value", "unique", "with-gaps"])
def test_key_share(keys, share, distinct):
    got = key_share(keys)
    assert got[0] == pytest.approx(share) and got[1] == distinct
