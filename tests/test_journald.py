"""The ``journald`` format and the live journal source on real journal files: entries written in
the journal export format (systemd.io/JOURNAL_EXPORT_FORMATS) into a journal file by Debian's
``systemd-journal-remote``, read back by the real ``journalctl --file … -o json`` (batch) and
``journalctl --follow`` run by the daemon (live), through a kill -9 and a restart from the saved
cursor: every entry read once, and the alerts a batch score of the same entries gives.

`make test` installs systemd-journal-remote with apt-get when it is missing; without it (or
without journalctl) these tests skip and say why."""

from __future__ import annotations

import json
import shutil
import struct
import subprocess
import time
from datetime import datetime
from pathlib import Path

import pytest

from tracewatch.config import parse_config
from tracewatch.formats import feed_lines, make_format
from tracewatch.records import Record, Rejection
from tracewatch.sources.journal import last_cursor

from .conftest import run_cli
from .daemon_helpers import DaemonProcess, free_port, no_daemon_left, scaled_lines  # noqa: F401

REMOTE = next((p for p in (shutil.which("systemd-journal-remote"), "/lib/systemd/systemd-journal-remote",
                           "/usr/lib/systemd/systemd-journal-remote") if p and Path(p).exists()), None)
JOURNALCTL = shutil.which("journalctl")
pytestmark = pytest.mark.skipif(REMOTE is None or JOURNALCTL is None, reason=(
    "systemd-journal-remote and journalctl are needed (Debian packages systemd-journal-remote and "
    "systemd; `make test` installs them with apt-get when run as root with a package mirror reachable)"))
BOOT = "2d1e3f4a5b6c7d8e9f0a1b2c3d4e5f60"
PRIORITY = {"DEBUG": "7", "INFO": "6", "WARN": "4", "ERROR": "3"}


def export_entry(fields: dict[str, str | bytes]) -> bytes:
    """One entry in the journal export format: ``KEY=value`` lines; a value holding a newline or
    bytes that are not text as ``KEY``, newline, its size as a little-endian 64-bit integer, the
    bytes, newline; a blank line ends the entry."""
    out = b""
    for key, value in fields.items():
        raw = value if isinstance(value, bytes) else value.encode()
        try:
            raw.decode("utf-8")
            text = b"\n" not in raw
        except UnicodeDecodeError:
            text = False
        out += key.encode() + (b"=" + raw if text else b"\n" + struct.pack("<Q", len(raw)) + raw) + b"\n"
    return out + b"\n"


def write_journal(path: Path, entries: list[dict]) -> None:
    """Append entries to a journal file with systemd-journal-remote (it creates or extends it)."""
    data = b"".join(export_entry(e) for e in entries)
    subprocess.run([REMOTE, f"--output={path}", "-"], input=data, check=True, capture_output=True, timeout=60)


def journal_json(path: Path) -> list[str]:
    done = subprocess.run([JOURNALCTL, f"--file={path}", "--output=json", "--all", "--no-pager"],
                          capture_output=True, check=True, timeout=60)
    return done.stdout.decode().splitlines()


_monotonic = iter(range(10**6, 10**12))


def demo_entries(lines: list[str]) -> list[dict]:
    """The demo's text lines as journal entries of one unit: time, priority, ``req=<key> <message>``."""
    out = []
    for line in lines:
        ts, level, _, rest = line.split(" ", 3)
        micros = int(datetime.fromisoformat(ts.replace("Z", "+00:00")).timestamp() * 1e6)
        out.append({"__REALTIME_TIMESTAMP": str(micros), "__MONOTONIC_TIMESTAMP": str(next(_monotonic)),
                    "_BOOT_ID": BOOT, "MESSAGE": rest, "PRIORITY": PRIORITY[level],
                    "_SYSTEMD_UNIT": "locker-api.service", "_PID": "812", "SYSLOG_IDENTIFIER": "locker-api"})
    return out


def test_journalctl_json_of_a_real_journal_file_becomes_records(tmp_path):
    journal = tmp_path / "lockers.journal"
    write_journal(journal, [
        {"__REALTIME_TIMESTAMP": "1796032800250000", "__MONOTONIC_TIMESTAMP": "1000", "_BOOT_ID": BOOT,
         "MESSAGE": "door 5 opened on LK-4", "PRIORITY": "6", "_SYSTEMD_UNIT": "locker-api.service", "_PID": "812"},
        {"__REALTIME_TIMESTAMP": "1796032801000000", "__MONOTONIC_TIMESTAMP": "1001", "_BOOT_ID": BOOT,
         "MESSAGE": b"courier \xff badge", "PRIORITY": "3", "_SYSTEMD_UNIT": "locker-api.service", "_PID": "812"},
        {"__REALTIME_TIMESTAMP": "1796032802000000", "__MONOTONIC_TIMESTAMP": "1002", "_BOOT_ID": BOOT,
         "MESSAGE": "line one\nline two", "PRIORITY": "4", "_PID": "9"},
    ])
    lines = journal_json(journal)
    assert json.loads(lines[1])["MESSAGE"] == [99, 111, 117, 114, 105, 101, 114, 32, 255, 32, 98, 97, 100, 103, 101]
    src = parse_config({"sources": [{"name": "units", "format": "journald",
                                     "journal_key_fields": ["_SYSTEMD_UNIT", "_PID"]}]}).sources[0]
    out = feed_lines(make_format(src), lines)
    recs = [x if type(x) is Record else x.record for x in out]
    assert [(r.key, r.ts, r.level, r.message) for r in recs] == [
        ("locker-api.service/812", 1796032800.25, "info", "door 5 opened on LK-4"),
        ("locker-api.service/812", 1796032801.0, "err", "courier \ufffd badge"),
        ("-/9", 1796032802.0, "warning", "line one\nline two")]
    assert [x.reason for x in out if type(x) is Rejection] == ["invalid_utf8"]
    assert last_cursor("\n".join(lines).encode() + b"\n") == json.loads(lines[-1])["__CURSOR"]


CONFIG = """\
state_dir = "state"

[[sources]]
name = "units"
format = "journald"
session_key = 'req=(?P<key>\\S+)'
journal_key_fields = ["_SYSTEMD_UNIT"]
journalctl_args = ["--file={journal}"]
start_at = "beginning"

[sessions]
idle_timeout_s = 1.5

[model]
false_alarm_rate = 0.05

[server]
listen = "127.0.0.1:{port}"

[daemon]
poll_interval_s = 0.2
checkpoint_interval_s = 0.5
"""


def test_the_daemon_follows_the_journal_through_kill_9_from_the_saved_cursor(tmp_path):
    base_journal, journal = tmp_path / "base.journal", tmp_path / "live" / "lockers.journal"
    journal.parent.mkdir()
    cfg_path = tmp_path / "tracewatch.toml"
    cfg_path.write_text(CONFIG.format(journal=journal, port=free_port()))
    write_journal(base_journal, demo_entries(scaled_lines(400, 0, seed=31, span_s=400)))
    base_json = tmp_path / "base.json"
    base_json.write_text("\n".join(journal_json(base_journal)) + "\n")
    run_cli("fit", "--config", str(cfg_path), str(base_json), check=True)

    entries = demo_entries(scaled_lines(240, 4, seed=32, span_s=60))
    write_journal(journal, entries[:1])  # the file exists when the daemon starts
    daemon = DaemonProcess(cfg_path).ready()
    bursts = [entries[i:i + 200] for i in range(1, len(entries), 200)]
    state = tmp_path / "state"
    for i, burst in enumerate(bursts):
        if i == len(bursts) // 2:  # kill -9 after a checkpoint that saved a cursor
            before = (state / "checkpoint.json").stat().st_mtime_ns
            daemon.until(lambda: (state / "checkpoint.json").stat().st_mtime_ns > before
                         and json.loads((state / "checkpoint.json").read_text())["streams"], "a checkpoint with a cursor")
            daemon.kill()
            write_journal(journal, burst)  # written while the daemon is down
            daemon = DaemonProcess(cfg_path).ready()
            continue
        write_journal(journal, burst)
        time.sleep(0.05)
    daemon.until(lambda: daemon.status()["sources"][0]["records"] == len(entries) and
                 daemon.status()["sessions_open"] == 0, f"{len(entries)} records and every session closed")
    status = daemon.status()
    assert daemon.terminate() == 0
    assert status["sources"][0]["files"][0]["state"] == "following"
    got = [json.loads(x) for x in (state / "alerts.jsonl").read_text().splitlines()]
    assert len(got) == len({a["alert_id"] for a in got}), "an alert was journalled twice"

    day_json = tmp_path / "day.json"
    day_json.write_text("\n".join(journal_json(journal)) + "\n")
    batch = [json.loads(x) for x in run_cli("score", "--config", str(cfg_path), str(day_json), check=True).stdout.splitlines()]
    assert len(batch) >= 8

    def comparable(alerts):
        return sorted((a["alert_id"], a["session_key"], a["score"], tuple(a["reasons"])) for a in alerts)

    assert comparable(got) == comparable(batch)
    ckpt = json.loads((state / "checkpoint.json").read_text())
    assert ckpt["streams"][0]["position"] == json.loads(journal_json(journal)[-1])["__CURSOR"]
