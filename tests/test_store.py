"""The incident store (tracewatch/alerts/store.py) and the `tracewatch incidents` command that
reads it: WAL so the CLI reads while the daemon writes, a versioned schema, clear errors."""

from __future__ import annotations

import json
import sqlite3
import time

import pytest

from tracewatch.alerts.incidents import IncidentTracker
from tracewatch.alerts.store import SCHEMA_VERSION, IncidentStore
from tracewatch.config import parse_config
from tracewatch.errors import StateError

from .conftest import run_cli
from .incident_data import toy_alert


@pytest.fixture
def filled(tmp_path):
    """A config, and a store with two incidents: one about 2 hours old, one 10 minutes old."""
    cfg_path = tmp_path / "tw.toml"
    cfg_path.write_text('state_dir = "state"\n[[sources]]\nname = "api"\n')
    store = IncidentStore.open(tmp_path / "state")
    tracker = IncidentTracker(store, parse_config({}).incidents)
    now = time.time()
    old = (now - 7200) // 60 * 60 + 20  # 20 s into a minute: its three alerts share one minute's bar
    for n in range(3):
        tracker.add(toy_alert(f"old{n}", "A", t=old + n))
    tracker.add(toy_alert("new", "B", t=now - 600, samples=["\x1b[31mred\x1b[0m <b>bold</b>"]))
    yield cfg_path, store
    store.close()


def test_wal_and_schema_version(tmp_path):
    store = IncidentStore.open(tmp_path)
    # WAL: readers do not block the writer nor the writer them (sqlite.org/wal.html)
    assert store.db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert store.db.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()[0] == str(SCHEMA_VERSION)
    store.close()


def test_schema_2_store_gains_signatures_in_place(tmp_path):
    import sqlite3

    from tracewatch.alerts.incidents import IncidentTracker
    from tracewatch.config import parse_config

    store = IncidentStore.open(tmp_path)
    IncidentTracker(store, parse_config({}).incidents).add(toy_alert("old", "A"))
    store.close()
    with sqlite3.connect(tmp_path / "incidents.db") as db:  # the file as schema 2 wrote it
        db.execute("ALTER TABLE incidents DROP COLUMN signature")
        db.execute("DROP TABLE sessions")
        db.execute("UPDATE meta SET value = '2' WHERE key = 'schema_version'")
    db.close()
    store = IncidentStore.open(tmp_path)
    try:
        assert store.db.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()[0] == "4"
        assert store.incident(1)["sessions"] == 0  # schema 4's session counts: none before the upgrade
        tracker = IncidentTracker(store, parse_config({}).incidents)
        # the old incident has no signature: the new alert joins it by similarity, as before
        assert tracker.add(toy_alert("new", "A", t=1_800_000_010.0)) == 1
        assert store.db.execute("SELECT signature FROM incidents").fetchall() == [("",)]
    finally:
        store.close()


def test_newer_schema_and_foreign_files_are_clear_errors(tmp_path):
    store = IncidentStore.open(tmp_path / "a")
    store.db.execute("UPDATE meta SET value = '99' WHERE key = 'schema_version'")
    store.close()
    with pytest.raises(StateError, match="written by a newer tracewatch"):
        IncidentStore.open(tmp_path / "a")
    (tmp_path / "b").mkdir()
    (tmp_path / "b" / "incidents.db").write_bytes(b"not a database at all\n" * 100)
    with pytest.raises(StateError, match="not a usable incident store"):
        IncidentStore.open(tmp_path / "b")
    cfg = tmp_path / "b.toml"
    cfg.write_text(f'state_dir = "{tmp_path / "b"}"\n')
    proc = run_cli("incidents", "--config", str(cfg))
    assert proc.returncode == 1 and "Traceback" not in proc.stderr
    assert proc.stderr.count("\n") == 1 and "not a usable incident store" in proc.stderr
    cfg.write_text(f'state_dir = "{tmp_path / "none"}"\n')
    proc = run_cli("incidents", "--config", str(cfg))
    assert proc.returncode == 1 and "no incidents yet" in proc.stderr


def test_cli_reads_while_the_daemon_writes(filled):
    cfg_path, store = filled
    writer = sqlite3.connect(store.path, isolation_level=None)
    writer.execute("BEGIN IMMEDIATE")  # the daemon in the middle of grouping an alert
    writer.execute("UPDATE incidents SET title = 'not committed yet'")
    try:
        proc = run_cli("incidents", "--config", str(cfg_path))
    finally:
        writer.execute("ROLLBACK")
        writer.close()
    assert proc.returncode == 0, proc.stderr
    assert "never-seen event 'event B <var>'" in proc.stdout and "not committed" not in proc.stdout


def test_cli_table_json_since_show_and_status(filled):
    cfg_path, _ = filled
    c = ("--config", str(cfg_path))
    table = run_cli("incidents", *c, check=True).stdout.splitlines()
    assert table[0].split()[:3] == ["ID", "STATUS", "ALERTS"]
    assert [line.split()[:3] for line in table[1:]] == [["2", "open", "1"], ["1", "open", "3"]]
    rows = [json.loads(x) for x in run_cli("incidents", *c, "--json", check=True).stdout.splitlines()]
    assert [(r["id"], r["count"], r["sources"]) for r in rows] == [(2, 1, ["api"]), (1, 3, ["api"])]
    recent = run_cli("incidents", *c, "--since", "1h", "--json", check=True).stdout.splitlines()
    assert [json.loads(x)["id"] for x in recent] == [2]
    shown = run_cli("incidents", "show", "2", *c, check=True).stdout
    assert "incident #2: never-seen event 'event B <var>'" in shown
    assert "\x1b" not in shown and "?[31mred?[0m <b>bold</b>" in shown  # terminal-safe sample
    assert "alerts over time (1 min per bar, UTC):" in shown  # one alert: one bar of one
    assert [line.split()[-2:] for line in shown.splitlines() if line.endswith("█ 1")] == [["█" * 40, "1"]]
    old = json.loads(run_cli("incidents", "show", "1", *c, "--json", check=True).stdout)["timeline"]
    assert old["bucket_s"] == 60 and old["alerts"] == [3]  # three alerts a second apart
    detail = json.loads(run_cli("incidents", "show", "2", *c, "--json", check=True).stdout)
    assert detail["diff"] == ["not seen before: event B <var>"] and detail["representative"]["alert_id"] == "new"
    out = run_cli("incidents", "ack", "1", *c, "--note", "on it", check=True).stdout
    assert out.startswith("incident #1 is now acknowledged")
    assert json.loads(run_cli("incidents", "show", "1", *c, "--json", check=True).stdout)["note"] == "on it"
    proc = run_cli("incidents", "ack", *c)
    assert proc.returncode == 2 and "give the incident ID" in proc.stderr
    proc = run_cli("incidents", "--since", "yesterday", *c)
    assert proc.returncode == 2 and "--since" in proc.stderr


# -- what a user can give or a file can hold: one clear line, never a traceback ------------------------
@pytest.mark.parametrize("args", [("incidents", "show"), ("incidents", "ack"), ("incidents", "resolve"),
                                  ("label", "--known", "disk-full")], ids=["show", "ack", "resolve", "label"])
def test_an_incident_id_sqlite_cannot_hold_is_a_bad_argument(filled, args):
    cfg_path, _ = filled
    proc = run_cli(*args, "99999999999999999999", "--config", str(cfg_path))  # 2^66: SQLite holds 64 bits
    assert proc.returncode == 2 and "Traceback" not in proc.stderr, proc.stderr
    assert proc.stderr.count("\n") == 1 and "99999999999999999999 is not an incident ID" in proc.stderr


@pytest.mark.parametrize("command, sql", [
    (("show", "2"), "UPDATE incidents SET representative = '[1, 2]' WHERE id = 2"),
    (("show", "2"), "UPDATE incidents SET representative = '" + "[" * 5000 + "]" * 5000 + "' WHERE id = 2"),
    (("show", "2"), "UPDATE incidents SET representative = 'not json' WHERE id = 2"),
    ((), "UPDATE incidents SET stats = '{\"sources\": 5}' WHERE id = 1"),
    ((), "UPDATE incidents SET first_seen = 1e300 WHERE id = 1"),
    ((), "UPDATE incidents SET count = 'many' WHERE id = 1"),
], ids=["representative-a-list", "representative-nested-deep", "representative-not-json", "stats-shape",
        "time-past-year-9999", "count-a-string"])
def test_a_tampered_row_is_refused_with_one_line(filled, command, sql):
    cfg_path, store = filled
    store.db.execute(sql)
    proc = run_cli("incidents", *command, "--config", str(cfg_path))
    assert proc.returncode == 1 and "Traceback" not in proc.stderr, proc.stderr
    assert proc.stderr.count("\n") == 1 and "is damaged" in proc.stderr and "incidents.db" in proc.stderr
