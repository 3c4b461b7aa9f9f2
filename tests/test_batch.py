"""Batch runs of several files: read merged by record time (tracewatch/batch.py TimeMerge)."""

from __future__ import annotations

import fcntl
import json
import os
import pty
import re
import struct
import subprocess
import sys
import termios
from datetime import datetime, timedelta, timezone

import pytest

from tracewatch.batch import assign_sources, run_files
from tracewatch.config import load_config
from tracewatch.pipeline import Pipeline

from .conftest import run_cli
from .conftest import ROOT
from .daemon_helpers import fitted, workspace  # noqa: F401


def _files(folder, lines: list[str], n: int):
    """The day as one file, and as ``n`` files where line i goes to file i % n: each file stays
    in time order, as each host's log is, and every session's records are spread over all."""
    whole = folder / "whole.log"
    whole.write_text("\n".join(lines) + "\n")
    parts = [folder / f"host{i}.log" for i in range(n)]
    for i, path in enumerate(parts):
        path.write_text("\n".join(lines[i::n]) + "\n")
    return whole, parts


def _alerts(cfg_path, *paths) -> list[tuple[str, tuple[str, ...], float]]:
    out = run_cli("score", "--config", str(cfg_path), *map(str, paths), check=True).stdout
    return sorted((a["session_key"], tuple(a["reasons"]), round(a["score"], 9)) for a in map(json.loads, out.splitlines()))


def test_sessions_spread_over_three_files_score_as_the_one_file(fitted, tmp_path):
    root, cfg_path, _, lines, _ = fitted
    whole, parts = _files(tmp_path, lines, 3)
    expected = _alerts(cfg_path, whole)
    assert len(expected) >= 10
    # the files given in reverse order too: the merge, not the order of the arguments, decides
    assert _alerts(cfg_path, *parts) == expected
    assert _alerts(cfg_path, *reversed(parts)) == expected


def test_a_fit_over_split_files_collects_whole_sessions(fitted, tmp_path):
    root, cfg_path, _, lines, _ = fitted
    cfg = load_config(cfg_path)
    whole, parts = _files(tmp_path, lines, 4)
    one, many = Pipeline(cfg), Pipeline(cfg)
    run_files(one, assign_sources(cfg, [str(whole)]))
    run_files(many, assign_sources(cfg, [str(p) for p in parts]))
    sessions = sorted((key, len(seq)) for _, key, seq in one.collected)
    assert len(sessions) > 200
    assert sorted((key, len(seq)) for _, key, seq in many.collected) == sessions
    assert many.records == one.records


# -- progress on a terminal ------------------------------------------------------------------------
def _run(args: list[str], folder, *, tty: bool) -> tuple[int, str, str]:
    """The real command with stderr on a pseudo-terminal of 100x30 (``tty``) or on a pipe:
    its return code, stdout and everything written to stderr."""
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    env.pop("TQDM_DISABLE", None)
    argv = [sys.executable, "-m", "tracewatch", *args]
    if not tty:
        proc = subprocess.run(argv, env=env, capture_output=True, text=True, timeout=300)
        return proc.returncode, proc.stdout, proc.stderr
    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 30, 100, 0, 0))
    with open(folder / "stdout", "w") as out:  # a file, not a pipe: a full pipe would block the child
        proc = subprocess.Popen(argv, env=env, stdout=out, stderr=slave)
    os.close(slave)
    seen = b""
    while True:  # until the child closes the terminal (EIO on Linux, or end of file)
        try:
            chunk = os.read(master, 65536)
        except OSError:
            break
        if not chunk:
            break
        seen += chunk
    os.close(master)
    proc.wait(timeout=300)
    return proc.returncode, (folder / "stdout").read_text(), seen.decode("utf-8", "replace")


@pytest.mark.parametrize("command", ["fit", "score"])
def test_progress_only_on_a_terminal(fitted, tmp_path, command):
    root, _, base, _, expected = fitted
    cfg_path = workspace(fitted, tmp_path)
    args = [command, "--config", str(cfg_path), str(base if command == "fit" else root / "day.txt")]
    rc, out, err = _run(args, tmp_path, tty=True)
    assert rc == 0
    label = "fit: reading" if command == "fit" else "score"
    # tqdm's bar, e.g. "score:   0%|          | 0.00/52.1k [00:00<?, ?B/s]"
    assert re.search(rf"{label}: +\d+%\|.*B/s", err), err
    piped_rc, piped_out, piped_err = _run(args, tmp_path, tty=False)
    assert piped_rc == 0 and piped_err == ""  # no progress, nothing else either
    if command == "score":  # the bar never reaches stdout: the alerts are the same either way
        assert out == piped_out and len(out.splitlines()) == len(expected)
@pytest.mark.parametrize("source", [
    "format = 'syslog'\nsession_key = 'req=(?P<key>\\S+)'",
    "line_pattern = '^(?P<ts>\\w{3} [ \\d]\\d \\S+) gw app: req=(?P<key>\\S+) (?P<message>.*)$'\n"
    "ts_format = '%b %d %H:%M:%S'",
], ids=["rfc3164", "strptime-yearless"])
def test_a_replayed_file_takes_the_year_of_its_modification_time(tmp_path, source):
    """BSD syslog stamps carry no year (RFC 3164 section 4.1.2: ``Mmm dd hh:mm:ss``). Replaying
    a file written over the new year 2024/2025 long after (the wall clock is in another year),
    ``score`` places its stamps against the file's modification time: every session starts and
    ends at the epoch seconds of 2024-12-31 and 2025-01-01, one session across midnight."""
    def stamp(t: datetime) -> str:
        return f"{t:%b} {t.day:2d} {t:%H:%M:%S}"

    def write(path, start: datetime, n: int) -> None:
        rows = []
        for i in range(n):
            t0 = start + timedelta(seconds=40 * i)
            for j, step in enumerate(("pickup code checked", "door 4 opened", "door 4 closed")):
                rows.append(f"{stamp(t0 + timedelta(seconds=5 * j))} gw app: req=r{i} {step}")
        path.write_text("\n".join(rows) + "\n")

    cfg = tmp_path / "tracewatch.toml"
    cfg.write_text(f"state_dir = 'state'\n[[sources]]\nname = 'gw'\n{source}\n[sessions]\nidle_timeout_s = 20\n"
                   "[model]\nfalse_alarm_rate = 0.05\n")
    write(tmp_path / "base.log", datetime(2024, 11, 3, 8, 0, tzinfo=timezone.utc), 200)
    run_cli("fit", "--config", str(cfg), str(tmp_path / "base.log"), check=True)
    day = tmp_path / "day.log"
    first = datetime(2024, 12, 31, 23, 58, 30, tzinfo=timezone.utc)
    write(day, first, 6)  # sessions 40 s apart: the third one runs from 23:59:50 to 00:00:00
    written = datetime(2025, 1, 1, 0, 5, tzinfo=timezone.utc).timestamp()
    os.utime(day, (written, written))
    assert datetime.now(timezone.utc).year not in (2024, 2025)  # else the wall clock would give the same years
    out = run_cli("score", "--all", "--config", str(cfg), str(day), check=True).stdout
    got = sorted((v["session_key"], v["start"], v["end"], v["events"]) for v in map(json.loads, out.splitlines()))
    expected = sorted((f"r{i}", first.timestamp() + 40 * i, first.timestamp() + 40 * i + 10, 3) for i in range(6))
    assert got == expected
