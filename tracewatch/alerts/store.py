"""Incident store: SQLite in ``<state_dir>/incidents.db``, shared by the daemon and the CLI.

Stage: **incidents** (persistence). The tracker (:mod:`tracewatch.alerts.incidents`) writes
incidents, their alert memberships and the notification outbox here in one transaction per
alert; the notifier (:mod:`tracewatch.alerts.sinks`) reads the outbox; HTTP and the CLI read
incidents and change their status. WAL mode lets readers go on while the daemon writes;
every thread gets its own connection. ``alerts.jsonl`` stays the append-only record of
alerts — this file holds only what grouping and notification need.

Tables (schema version in ``meta``):

    incidents   one row per incident: status, title, counts, times, statistics (JSON),
                the sum of its alerts' vectors (JSON) and the representative alert (JSON)
    members     candidate representatives of each incident (alert and vector, bounded)
    alerts      every alert id once, with its incident (a replayed alert is recognised)
    outbox      notifications, in order, each with the incident as it was (JSON)
    cursors     per sink: the last outbox row delivered, attempts, last error
    labels      the on-call label of an incident: "expected" or a known problem's name
                (what tracewatch/triage.py learns from); incidents.suggestion holds triage's
                suggestion for a new incident (JSON, '' for none)

Schema 1 (before labels) is upgraded in place when opened.
"""

from __future__ import annotations

import sqlite3
import threading
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import orjson

from ..errors import StateError

SCHEMA_VERSION = 2
FILENAME = "incidents.db"
STATUSES = ("open", "acknowledged", "resolved", "expected")
FIRING = ("open", "acknowledged")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS incidents (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    status TEXT NOT NULL,
    title TEXT NOT NULL,
    first_seen REAL NOT NULL,
    last_seen REAL NOT NULL,
    count INTEGER NOT NULL,
    escalated INTEGER NOT NULL DEFAULT 0,
    created REAL NOT NULL,
    status_changed REAL NOT NULL,
    status_by TEXT NOT NULL DEFAULT '',
    note TEXT NOT NULL DEFAULT '',
    stats TEXT NOT NULL,
    centroid TEXT NOT NULL,
    representative TEXT NOT NULL,
    suggestion TEXT NOT NULL DEFAULT ''
);
CREATE INDEX IF NOT EXISTS incidents_status_seen ON incidents (status, last_seen);
CREATE TABLE IF NOT EXISTS members (
    incident_id INTEGER NOT NULL,
    alert_id TEXT NOT NULL,
    vector TEXT NOT NULL,
    alert TEXT NOT NULL,
    PRIMARY KEY (incident_id, alert_id)
);
CREATE TABLE IF NOT EXISTS alerts (
    alert_id TEXT PRIMARY KEY,
    incident_id INTEGER NOT NULL,
    ts REAL NOT NULL
);
CREATE INDEX IF NOT EXISTS alerts_incident ON alerts (incident_id, ts);
CREATE TABLE IF NOT EXISTS outbox (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    incident_id INTEGER NOT NULL,
    event TEXT NOT NULL,
    created REAL NOT NULL,
    payload TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS cursors (
    sink TEXT PRIMARY KEY,
    last_id INTEGER NOT NULL,
    attempts INTEGER NOT NULL DEFAULT 0,
    delivered INTEGER NOT NULL DEFAULT 0,
    rejected INTEGER NOT NULL DEFAULT 0,
    last_error TEXT NOT NULL DEFAULT ''
);
CREATE TABLE IF NOT EXISTS labels (
    incident_id INTEGER PRIMARY KEY,
    label TEXT NOT NULL,
    by TEXT NOT NULL,
    note TEXT NOT NULL DEFAULT '',
    ts REAL NOT NULL
);
"""
# -- triage labels (tracewatch/triage.py): schema 1 → 2 --
_MIGRATIONS = {1: ("ALTER TABLE incidents ADD COLUMN suggestion TEXT NOT NULL DEFAULT ''",
                   "CREATE TABLE IF NOT EXISTS labels (incident_id INTEGER PRIMARY KEY, label TEXT NOT NULL, "
                   "by TEXT NOT NULL, note TEXT NOT NULL DEFAULT '', ts REAL NOT NULL)")}

# the columns every incident listing returns (the heavy JSON columns only on demand)
_LIST_COLUMNS = ("id, status, title, first_seen, last_seen, count, escalated, created, status_changed, "
                 "status_by, note, stats, suggestion, "
                 "(SELECT label FROM labels WHERE labels.incident_id = incidents.id)")


def dumps(obj) -> str:
    return orjson.dumps(obj, option=orjson.OPT_SERIALIZE_NUMPY).decode()


class IncidentStore:
    """``<state_dir>/incidents.db``: open with :meth:`open`; safe to use from several threads."""

    def __init__(self, path: Path) -> None:
        self.path = Path(path)
        self._local = threading.local()
        self._all: list[sqlite3.Connection] = []
        self._guard = threading.Lock()
        self.store_id = ""

    @classmethod
    def open(cls, state_dir: Path, *, create: bool = True) -> "IncidentStore":
        """Open (and with ``create``, make) the store; a foreign or newer file is a StateError."""
        path = Path(state_dir) / FILENAME
        if not create and not path.exists():
            raise StateError(f"{path}: no incidents yet (the daemon creates this file when it starts)")
        store = cls(path)
        try:
            if create:
                path.parent.mkdir(parents=True, exist_ok=True)
            store._init()
        except sqlite3.OperationalError as exc:
            store.close()
            if "locked" in str(exc) or "busy" in str(exc):
                raise StateError(f"{path}: busy (another process has held it for seconds); try again") from exc
            raise StateError(f"{path}: not a usable incident store ({exc}); move it away to start afresh") from exc
        except sqlite3.DatabaseError as exc:
            store.close()
            raise StateError(f"{path}: not a usable incident store ({exc}); move it away to start afresh") from exc
        except OSError as exc:
            store.close()
            raise StateError(f"{path}: cannot open: {exc.strerror or exc}") from exc
        return store

    def _init(self) -> None:
        """Check the schema with a read (a reader never waits for the daemon's writes); create
        it only when missing."""
        db = self.db
        try:
            row = db.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
        except sqlite3.OperationalError as exc:
            if "no such table" not in str(exc):
                raise
            row = None
        if row is None:
            if db.execute("PRAGMA journal_mode").fetchone()[0] != "wal":
                db.execute("PRAGMA journal_mode=WAL")
            with self.transaction() as tx:
                for stmt in _SCHEMA.split(";"):
                    if stmt.strip():
                        tx.execute(stmt)
                if tx.execute("SELECT 1 FROM meta WHERE key = 'schema_version'").fetchone() is None:
                    tx.execute("INSERT INTO meta VALUES ('schema_version', ?)", (str(SCHEMA_VERSION),))
                    tx.execute("INSERT INTO meta VALUES ('store_id', ?)", (uuid.uuid4().hex,))
        elif int(row[0]) > SCHEMA_VERSION:
            raise StateError(f"{self.path} was written by a newer tracewatch (schema {row[0]}, this one "
                             f"reads {SCHEMA_VERSION}); upgrade tracewatch or move the file away")
        elif int(row[0]) < SCHEMA_VERSION:
            self._migrate()
        self.store_id = db.execute("SELECT value FROM meta WHERE key = 'store_id'").fetchone()[0]

    def _migrate(self) -> None:
        """Upgrade an older schema in place, one version at a time, in one transaction."""
        with self.transaction() as tx:
            version = int(tx.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()[0])
            while version < SCHEMA_VERSION:
                for stmt in _MIGRATIONS[version]:
                    tx.execute(stmt)
                version += 1
            tx.execute("UPDATE meta SET value = ? WHERE key = 'schema_version'", (str(version),))

    # -- connections and transactions ------------------------------------------------------------
    @property
    def db(self) -> sqlite3.Connection:
        """This thread's connection (autocommit; write through :meth:`transaction`)."""
        conn = getattr(self._local, "conn", None)
        if conn is None:
            conn = sqlite3.connect(self.path, timeout=10.0, isolation_level=None, check_same_thread=False)
            conn.execute("PRAGMA busy_timeout = 10000")
            conn.execute("PRAGMA synchronous = NORMAL")  # WAL: a process crash loses nothing committed
            self._local.conn = conn
            with self._guard:
                self._all.append(conn)
        return conn

    @contextmanager
    def transaction(self) -> Iterator[sqlite3.Connection]:
        """``BEGIN IMMEDIATE`` … ``COMMIT``: writers queue; readers are never blocked (WAL)."""
        db = self.db
        db.execute("BEGIN IMMEDIATE")
        try:
            yield db
        except BaseException:
            db.execute("ROLLBACK")
            raise
        db.execute("COMMIT")

    def release(self) -> None:
        """Close this thread's connection (for short-lived threads, such as HTTP requests)."""
        conn = getattr(self._local, "conn", None)
        if conn is not None:
            self._local.conn = None
            with self._guard:
                if conn in self._all:
                    self._all.remove(conn)
            conn.close()

    def close(self) -> None:
        with self._guard:
            conns, self._all = self._all, []
        for conn in conns:
            conn.close()
        self._local = threading.local()

    # -- reading -----------------------------------------------------------------------------------
    def incidents(self, *, status: str | None = None, since: float | None = None, limit: int = 100,
                  offset: int = 0) -> list[dict]:
        """Incidents, most recently active first, without the heavy columns."""
        where, args = [], []
        if status is not None:
            where.append("status = ?")
            args.append(status)
        if since is not None:
            where.append("last_seen >= ?")
            args.append(since)
        sql = f"SELECT {_LIST_COLUMNS} FROM incidents"
        if where:
            sql += " WHERE " + " AND ".join(where)
        sql += " ORDER BY last_seen DESC, id DESC LIMIT ? OFFSET ?"
        return [self._row(r) for r in self.db.execute(sql, (*args, limit, offset))]

    def counts(self) -> dict[str, int]:
        return dict(self.db.execute("SELECT status, COUNT(*) FROM incidents GROUP BY status").fetchall())

    def incident(self, incident_id: int, *, db: sqlite3.Connection | None = None) -> dict | None:
        """One incident with its representative alert."""
        row = (db or self.db).execute(f"SELECT {_LIST_COLUMNS}, representative FROM incidents WHERE id = ?",
                                      (incident_id,)).fetchone()
        if row is None:
            return None
        out = self._row(row[:-1])
        out["representative"] = orjson.loads(row[-1])
        return out

    def alert_ids(self, incident_id: int, limit: int = 100) -> list[str]:
        rows = self.db.execute("SELECT alert_id FROM alerts WHERE incident_id = ? ORDER BY ts DESC LIMIT ?",
                               (incident_id, limit))
        return [r[0] for r in rows]

    @staticmethod
    def _row(r) -> dict:
        keys = ("id", "status", "title", "first_seen", "last_seen", "count", "escalated", "created",
                "status_changed", "status_by", "note")
        out = dict(zip(keys, r[:11]))
        out["stats"] = orjson.loads(r[11])
        out["suggestion"] = orjson.loads(r[12]) if r[12] else None
        out["label"] = r[13]
        return out

    # -- triage labels (tracewatch/triage.py) ------------------------------------------------------
    def set_label(self, incident_id: int, label: str, *, by: str, note: str = "", now: float) -> bool:
        """Record (or replace) an incident's label; False when there is no such incident."""
        with self.transaction() as tx:
            if tx.execute("SELECT 1 FROM incidents WHERE id = ?", (incident_id,)).fetchone() is None:
                return False
            tx.execute("INSERT OR REPLACE INTO labels (incident_id, label, by, note, ts) VALUES (?, ?, ?, ?, ?)",
                       (incident_id, label, by[:200], note[:1000], now))
        return True

    def labels(self) -> list[dict]:
        """Every label with its incident's title and status, newest first."""
        rows = self.db.execute("SELECT l.incident_id, l.label, l.by, l.note, l.ts, i.title, i.status, i.count "
                               "FROM labels l JOIN incidents i ON i.id = l.incident_id ORDER BY l.ts DESC")
        keys = ("incident_id", "label", "by", "note", "labelled_at", "title", "status", "count")
        return [dict(zip(keys, r)) for r in rows]

    def labelled_alerts(self) -> list[tuple[dict, str, int]]:
        """(alert, label, incident id) for the kept member alerts of every labelled incident."""
        rows = self.db.execute("SELECT m.alert, l.label, l.incident_id FROM labels l JOIN members m "
                               "ON m.incident_id = l.incident_id ORDER BY l.incident_id, m.alert_id")
        return [(orjson.loads(a), label, iid) for a, label, iid in rows]

    # -- outbox and delivery cursors -----------------------------------------------------------------
    def outbox_after(self, last_id: int, limit: int = 100) -> list[tuple[int, str, dict]]:
        rows = self.db.execute("SELECT id, event, payload FROM outbox WHERE id > ? ORDER BY id LIMIT ?",
                               (last_id, limit))
        return [(i, ev, orjson.loads(p)) for i, ev, p in rows]

    def outbox_max(self) -> int:
        return self.db.execute("SELECT COALESCE(MAX(id), 0) FROM outbox").fetchone()[0]

    def cursor(self, sink: str) -> dict:
        """A sink's delivery state; a sink seen for the first time starts after the newest row
        (it is not sent the history)."""
        row = self.db.execute("SELECT last_id, attempts, delivered, rejected, last_error FROM cursors "
                              "WHERE sink = ?", (sink,)).fetchone()
        if row is None:
            with self.transaction() as tx:
                tx.execute("INSERT OR IGNORE INTO cursors (sink, last_id) "
                           "SELECT ?, COALESCE(MAX(id), 0) FROM outbox", (sink,))
            return self.cursor(sink)
        return dict(zip(("last_id", "attempts", "delivered", "rejected", "last_error"), row))

    def cursors(self) -> dict[str, dict]:
        rows = self.db.execute("SELECT sink, last_id, attempts, delivered, rejected, last_error FROM cursors")
        newest = self.outbox_max()
        return {r[0]: {"pending": newest - r[1], "attempts": r[2], "delivered": r[3], "rejected": r[4],
                       "last_error": r[5]} for r in rows}

    def delivered(self, sink: str, row_id: int, *, rejected: str | None = None) -> None:
        """Row ``row_id`` is done for ``sink`` (sent, or refused for good by the receiver)."""
        with self.transaction() as tx:
            if rejected is None:
                tx.execute("UPDATE cursors SET last_id = ?, attempts = 0, delivered = delivered + 1, "
                           "last_error = '' WHERE sink = ?", (row_id, sink))
            else:
                tx.execute("UPDATE cursors SET last_id = ?, attempts = 0, rejected = rejected + 1, "
                           "last_error = ? WHERE sink = ?", (row_id, rejected[:500], sink))

    def failed(self, sink: str, error: str) -> int:
        """A delivery attempt failed and will be retried; returns the attempts so far."""
        with self.transaction() as tx:
            tx.execute("UPDATE cursors SET attempts = attempts + 1, last_error = ? WHERE sink = ?",
                       (error[:500], sink))
            return tx.execute("SELECT attempts FROM cursors WHERE sink = ?", (sink,)).fetchone()[0]

    def prune_outbox(self, keep: int = 1000) -> int:
        """Forget rows every sink has delivered, keeping the newest ``keep`` for inspection."""
        with self.transaction() as tx:
            low = tx.execute("SELECT MIN(last_id) FROM cursors").fetchone()[0]
            if low is None:
                low = tx.execute("SELECT COALESCE(MAX(id), 0) FROM outbox").fetchone()[0]
            return tx.execute("DELETE FROM outbox WHERE id <= ?", (low - keep,)).rowcount
