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
    sessions    sessions scored per source and minute of event time (what an incident's rate
                and reach are measured against: :func:`tracewatch.alerts.summary.reach`)

Older schemas (1: before labels, 2: before signatures, 3: before session counts) are upgraded
in place when opened.

Every SQL statement of tracewatch lives in this module: the tracker, the notifier, HTTP and the
CLI call its methods (those that take ``db`` run inside the caller's :meth:`transaction`).
What is read back is checked before anyone uses it — the columns' types and ranges, and the
JSON columns' size and shape (pydantic, :mod:`tracewatch.alerts.rows`) — so a damaged or
tampered file is a :class:`~tracewatch.errors.StateError` naming the incident, never a hang or a
crash further on.
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
from . import rows
from .summary import rate_minutes

SCHEMA_VERSION = 4
FILENAME = "incidents.db"
STATUSES = rows.STATUSES  # open, acknowledged, resolved, expected
FIRING = ("open", "acknowledged")
MEMBERS_READ = 1000  # candidate representatives read per incident ([incidents] max_members is at most this)

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
    suggestion TEXT NOT NULL DEFAULT '',
    signature TEXT NOT NULL DEFAULT ''
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
CREATE INDEX IF NOT EXISTS alerts_ts ON alerts (ts);
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
CREATE TABLE IF NOT EXISTS sessions (
    source TEXT NOT NULL,
    minute INTEGER NOT NULL,
    count INTEGER NOT NULL,
    PRIMARY KEY (source, minute)
) WITHOUT ROWID;
"""
# -- triage labels (tracewatch/triage.py): schema 1 → 2 --
_MIGRATIONS = {1: ("ALTER TABLE incidents ADD COLUMN suggestion TEXT NOT NULL DEFAULT ''",
                   "CREATE TABLE IF NOT EXISTS labels (incident_id INTEGER PRIMARY KEY, label TEXT NOT NULL, "
                   "by TEXT NOT NULL, note TEXT NOT NULL DEFAULT '', ts REAL NOT NULL)"),
               # -- the signature alerts are grouped by (alerts/summary.py): schema 2 → 3 --
               2: ("ALTER TABLE incidents ADD COLUMN signature TEXT NOT NULL DEFAULT ''",),
               # -- sessions scored per source and minute (rate and reach): schema 3 → 4 --
               3: ("CREATE TABLE IF NOT EXISTS sessions (source TEXT NOT NULL, minute INTEGER NOT NULL, "
                   "count INTEGER NOT NULL, PRIMARY KEY (source, minute)) WITHOUT ROWID",
                   "CREATE INDEX IF NOT EXISTS alerts_ts ON alerts (ts)")}  # (the page's chart of every incident)

# the columns every incident listing returns (the heavy JSON columns only on demand)
_LIST_COLUMNS = ("id, status, title, first_seen, last_seen, count, escalated, created, status_changed, "
                 "status_by, note, stats, suggestion, "
                 "(SELECT label FROM labels WHERE labels.incident_id = incidents.id)")
_LIST_KEYS = ("id", "status", "title", "first_seen", "last_seen", "count", "escalated", "created",
              "status_changed", "status_by", "note")
# an incident's sources (the keys of its statistics' "sources"; none where the column is not JSON)
_SOURCES = "json_each(CASE WHEN json_valid(incidents.stats) THEN incidents.stats ELSE '{}' END, '$.sources')"
# the sessions scored of each incident's sources in the minutes of its rate window, the windows
# given as JSON [[id, [source, …], first minute, last minute], …] (summary.rate_minutes)
_SESSIONS = ("SELECT json_extract(w.value, '$[0]'), SUM(s.count) FROM json_each(?) w, "
             "json_each(w.value, '$[1]') src JOIN sessions s ON s.source = src.value "
             "AND s.minute BETWEEN json_extract(w.value, '$[2]') AND json_extract(w.value, '$[3]') GROUP BY 1")
# what the tracker may change on an incident row
_UPDATABLE = frozenset({"count", "first_seen", "last_seen", "stats", "centroid", "representative", "title",
                        "escalated"})
AUTO = "auto: "  # how status_by begins where tracewatch itself changed the status (auto-resolve, reopen)
_SQLITE_INT = 1 << 63  # SQLite integers are signed 64-bit: an id outside cannot exist


def _from_representative(path: str) -> str:
    """SQL for one field of the representative alert; a zero byte (refused when checked) where
    the column is not JSON, where json_extract would fail the whole query."""
    return f"CASE WHEN json_valid(representative) THEN json_extract(representative, '{path}') ELSE x'00' END"


def _filters(*, status: str | None = None, since: float | None = None, incident_id: int | None = None,
             source: str | None = None, from_ts: float | None = None) -> tuple[str, list]:
    """The WHERE clause (and its arguments) choosing incidents of a status, active since, of a
    source, or one; and (``from_ts``, with the alerts table as ``a``) alerts since."""
    where, args = [], []
    for sql, value in (("incidents.status = ?", status), ("incidents.last_seen >= ?", since),
                       ("incidents.id = ?", incident_id), ("a.ts >= ?", from_ts),
                       (f"EXISTS (SELECT 1 FROM {_SOURCES} WHERE key = ?)", source)):
        if value is not None:
            where.append(sql)
            args.append(value)
    return ("WHERE " + " AND ".join(where) if where else ""), args


def dumps(obj) -> str:
    return orjson.dumps(obj, option=orjson.OPT_SERIALIZE_NUMPY).decode()


def storable_id(incident_id: int) -> bool:
    """Whether SQLite can hold ``incident_id`` at all (a larger one is no incident, not an error)."""
    return -_SQLITE_INT <= incident_id < _SQLITE_INT


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
        else:
            version = self._schema_version(row[0])
            if version > SCHEMA_VERSION:
                raise StateError(f"{self.path} was written by a newer tracewatch (schema {version}, this one "
                                 f"reads {SCHEMA_VERSION}); upgrade tracewatch or move the file away")
            if version < SCHEMA_VERSION:
                self._migrate()
        row = db.execute("SELECT value FROM meta WHERE key = 'store_id'").fetchone()
        if row is None or not isinstance(row[0], str):
            raise StateError(f"{self.path}: not a usable incident store (no store id); move it away to start afresh")
        self.store_id = row[0]

    def _schema_version(self, value) -> int:
        try:
            version = int(value)
        except (TypeError, ValueError):
            version = 0
        if version < 1:
            raise StateError(f"{self.path}: not a usable incident store (schema version {str(value)[:40]!r}); "
                             "move it away to start afresh")
        return version

    def _migrate(self) -> None:
        """Upgrade an older schema in place, one version at a time, in one transaction."""
        with self.transaction() as tx:
            version = self._schema_version(tx.execute("SELECT value FROM meta WHERE key = 'schema_version'"
                                                      ).fetchone()[0])
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
        """``BEGIN IMMEDIATE`` … ``COMMIT``: writers queue; readers are never blocked (WAL).
        Pass the connection it yields as ``db`` to the methods that take one."""
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

    # -- checking what is read back ----------------------------------------------------------------
    def _damaged(self, what: str, exc: rows.Damaged) -> StateError:
        return StateError(f"{self.path}: {what} is damaged ({exc}); restore the file or move it away to start "
                          "afresh (alerts.jsonl keeps every alert)")

    def _row(self, r) -> dict:
        """A listed row (:data:`_LIST_COLUMNS`) as a checked dict."""
        try:
            return rows.incident_row(dict(zip(_LIST_KEYS, r[:11])), r[11], r[12], r[13])
        except rows.Damaged as exc:
            raise self._damaged(f"incident {r[0]!r:.40}", exc) from exc

    def _rated(self, found: list[dict], db: sqlite3.Connection | None = None) -> list[dict]:
        """``found`` (checked rows) each with ``sessions``: the sessions scored of its sources in its
        rate window (:func:`~tracewatch.alerts.summary.rate_minutes`), all in one query."""
        windows = [[r["id"], sorted(r["stats"].get("sources") or {}), *rate_minutes(r["first_seen"], r["last_seen"])]
                   for r in found]
        got = dict((db or self.db).execute(_SESSIONS, (dumps(windows),))) if found else {}
        for r in found:
            try:
                r["sessions"] = rows.count(got.get(r["id"], 0), "sessions")
            except rows.Damaged as exc:
                raise self._damaged(f"the sessions counted for incident {r['id']}", exc) from exc
        return found

    # -- reading -----------------------------------------------------------------------------------
    def incidents(self, *, status: str | None = None, since: float | None = None, source: str | None = None,
                  limit: int = 100, offset: int = 0, open_first: bool = False) -> list[dict]:
        """Incidents (of a status, active since, of a source), most recently active first — the
        open ones before all others with ``open_first`` — without the heavy columns."""
        where, args = _filters(status=status, since=since, source=source)
        order = "status = 'open' DESC, " if open_first else ""
        sql = (f"SELECT {_LIST_COLUMNS} FROM incidents {where} ORDER BY {order}last_seen DESC, id DESC "
               "LIMIT ? OFFSET ?")
        return self._rated([self._row(r) for r in self.db.execute(sql, (*args, limit, offset))])

    def sources(self, limit: int = 50) -> list[str]:
        """The sources incidents came from, by name."""
        return [r[0] for r in self.db.execute(f"SELECT DISTINCT key FROM incidents, {_SOURCES} "
                                              "WHERE typeof(key) = 'text' ORDER BY key LIMIT ?", (limit,))]

    def alert_counts(self, bucket_s: int, *, incident_id: int | None = None, status: str | None = None,
                     source: str | None = None, from_ts: float | None = None) -> dict[int, int]:
        """Alerts per bucket of ``bucket_s`` seconds of event time (bucket n starts at n × bucket_s):
        of one incident, or of every incident (of a status, of a source), from ``from_ts`` on."""
        where, args = _filters(status=status, incident_id=incident_id, source=source, from_ts=from_ts)
        found = self.db.execute(f"SELECT CAST(a.ts / ? AS INTEGER), COUNT(*) FROM alerts a JOIN incidents "
                                f"ON incidents.id = a.incident_id {where} GROUP BY 1", (bucket_s, *args))
        return {b: n for b, n in found if isinstance(b, int)}  # (a damaged time is left out)

    def alert_counts_each(self, bucket_s: int, incident_ids: list[int], *, from_ts: float | None = None
                          ) -> dict[int, dict[int, int]]:
        """:meth:`alert_counts` of each of ``incident_ids`` (per incident id), in one query."""
        since = "" if from_ts is None else " AND a.ts >= ?"
        found = self.db.execute("SELECT a.incident_id, CAST(a.ts / ? AS INTEGER), COUNT(*) FROM alerts a "
                                f"WHERE a.incident_id IN (SELECT value FROM json_each(?)){since} GROUP BY 1, 2",
                                (bucket_s, dumps(incident_ids), *([] if from_ts is None else [from_ts])))
        out: dict[int, dict[int, int]] = {i: {} for i in incident_ids}
        for i, b, n in found:
            if isinstance(b, int):  # (a damaged time is left out)
                out[i][b] = n
        return out

    def counts(self) -> dict[str, int]:
        return dict(self.db.execute("SELECT status, COUNT(*) FROM incidents GROUP BY status").fetchall())

    def incident(self, incident_id: int, *, db: sqlite3.Connection | None = None) -> dict | None:
        """One incident with its representative alert (None when there is none with that id)."""
        if not storable_id(incident_id):
            return None
        row = (db or self.db).execute(f"SELECT {_LIST_COLUMNS}, representative FROM incidents WHERE id = ?",
                                      (incident_id,)).fetchone()
        if row is None:
            return None
        out = self._rated([self._row(row[:-1])], db)[0]
        try:
            out["representative"] = rows.alert(row[-1])
        except rows.Damaged as exc:
            raise self._damaged(f"incident {incident_id}'s representative", exc) from exc
        return out

    def alert_ids(self, incident_id: int, limit: int = 100) -> list[str]:
        """The ids of an incident's alerts, newest first (``limit`` -1: all)."""
        if not storable_id(incident_id):
            return []
        rows_ = self.db.execute("SELECT alert_id FROM alerts WHERE incident_id = ? ORDER BY ts DESC LIMIT ?",
                                (incident_id, limit))
        return [r[0] for r in rows_]

    # -- what the tracker reads and writes (inside its transaction) -------------------------------------
    def incident_of(self, alert_id: str, *, db: sqlite3.Connection) -> int | None:
        """The incident an alert was grouped into, if it was."""
        row = db.execute("SELECT incident_id FROM alerts WHERE alert_id = ?", (alert_id,)).fetchone()
        return None if row is None else row[0]

    def candidates(self, active_since: float, recur_since: float, *,
                   db: sqlite3.Connection) -> list[tuple[int, object, str, bool]]:
        """(id, count, signature, recurring) of the incidents an alert may join: open or
        acknowledged with an alert since ``active_since``, or expected; and, ``recurring``, those
        with a signature and an alert since ``recur_since`` that are open, acknowledged or were
        resolved automatically (status_by starting with :data:`AUTO`) — which only an alert of their signature
        joins. The counts are as stored (checked by :meth:`group`)."""
        found = db.execute(
            "SELECT id, count, signature, status, last_seen FROM incidents WHERE status = 'expected' "
            "OR (status IN ('open', 'acknowledged') AND last_seen >= ?) OR (signature != '' AND last_seen >= ? "
            "AND (status IN ('open', 'acknowledged') OR (status = 'resolved' AND status_by LIKE ?)))",
            (active_since, recur_since, AUTO + "%")).fetchall()
        return [(iid, count, sig, status == "resolved" or (status != "expected" and last_seen < active_since))
                for iid, count, sig, status, last_seen in found]

    def group(self, incident_id: int, *, db: sqlite3.Connection) -> rows.Group:
        """What grouping needs of an incident, checked: its row, the sum of its alerts' vectors
        and its candidate representatives (at most :data:`MEMBERS_READ`, whatever the file holds)."""
        r = db.execute(f"SELECT {_LIST_COLUMNS}, centroid FROM incidents WHERE id = ?", (incident_id,)).fetchone()
        members = db.execute("SELECT alert_id, vector FROM members WHERE incident_id = ? ORDER BY alert_id LIMIT ?",
                             (incident_id, MEMBERS_READ)).fetchall()
        try:
            if r is None:
                raise rows.Damaged("gone while being read")
            return rows.group(dict(zip(_LIST_KEYS, r[:11])), r[11], r[12], r[13], r[14], members)
        except rows.Damaged as exc:
            raise self._damaged(f"incident {incident_id}", exc) from exc

    def state(self, incident_id: int, *, db: sqlite3.Connection) -> tuple[dict, str | None]:
        """An incident's listed row and its representative's alert id, checked."""
        r = db.execute(f"SELECT {_LIST_COLUMNS}, {_from_representative('$.alert_id')} FROM incidents WHERE id = ?",
                       (incident_id,)).fetchone()
        row = self._row(r[:-1])
        if r[-1] is not None and not isinstance(r[-1], str):
            raise self._damaged(f"incident {incident_id}'s representative", rows.Damaged("no alert id"))
        return row, r[-1]

    def member_alert(self, incident_id: int, alert_id: str, *, db: sqlite3.Connection) -> dict:
        row = db.execute("SELECT alert FROM members WHERE incident_id = ? AND alert_id = ?",
                         (incident_id, alert_id)).fetchone()
        try:
            return rows.alert(row[0] if row is not None else None)
        except rows.Damaged as exc:
            raise self._damaged(f"incident {incident_id}'s member alert {alert_id}", exc) from exc

    def new_incident(self, *, status: str, title: str, t: float, now: float, stats: dict, centroid: dict,
                     representative: dict, status_by: str, suggestion: dict | None, signature: str = "",
                     db: sqlite3.Connection) -> int:
        cur = db.execute(
            "INSERT INTO incidents (status, title, first_seen, last_seen, count, created, status_changed, stats, "
            "centroid, representative, status_by, suggestion, signature) VALUES (?, ?, ?, ?, 1, ?, ?, ?, ?, ?, ?, ?, ?)",
            (status, title, t, t, now, now, dumps(stats), dumps(centroid), dumps(representative), status_by,
             dumps(suggestion) if suggestion is not None else "", signature))
        return cur.lastrowid

    def update_incident(self, incident_id: int, *, db: sqlite3.Connection, **values) -> None:
        """Set some of :data:`_UPDATABLE` (dicts are stored as JSON)."""
        unknown = set(values) - _UPDATABLE
        if unknown:
            raise ValueError(f"not an updatable incident column: {', '.join(sorted(unknown))}")
        cols = list(values)
        args = [dumps(v) if isinstance(v, dict) else v for v in values.values()]
        db.execute(f"UPDATE incidents SET {', '.join(f'{c} = ?' for c in cols)} WHERE id = ?", (*args, incident_id))

    def add_member(self, incident_id: int, alert_id: str, vector: dict, alert: dict, *,
                   db: sqlite3.Connection) -> None:
        db.execute("INSERT INTO members VALUES (?, ?, ?, ?)", (incident_id, alert_id, dumps(vector), dumps(alert)))

    def drop_member(self, incident_id: int, alert_id: str, *, db: sqlite3.Connection) -> None:
        db.execute("DELETE FROM members WHERE incident_id = ? AND alert_id = ?", (incident_id, alert_id))

    def record_alert(self, alert_id: str, incident_id: int, t: float, *, db: sqlite3.Connection) -> None:
        db.execute("INSERT INTO alerts (alert_id, incident_id, ts) VALUES (?, ?, ?)", (alert_id, incident_id, t))

    def count_sessions(self, counts: dict[tuple[str, int], int], *, db: sqlite3.Connection) -> None:
        """Add ``{(source, minute): sessions scored}`` to the counts (minute = event time // 60)."""
        db.executemany("INSERT INTO sessions (source, minute, count) VALUES (?, ?, ?) ON CONFLICT (source, minute) "
                       "DO UPDATE SET count = count + excluded.count", [(s, m, n) for (s, m), n in counts.items()])

    def prune_sessions(self, before_minute: int, *, db: sqlite3.Connection) -> None:
        db.execute("DELETE FROM sessions WHERE minute < ?", (before_minute,))

    def latest_seen(self) -> float | None:
        """The event time of the newest alert of any incident (None while there is none)."""
        return self.db.execute("SELECT MAX(last_seen) FROM incidents").fetchone()[0]

    def quiet_incidents(self, before: float) -> list[int]:
        """Open or acknowledged incidents whose last alert is older than ``before``."""
        return [r[0] for r in self.db.execute(
            "SELECT id FROM incidents WHERE status IN ('open', 'acknowledged') AND last_seen < ?", (before,))]

    def status_of(self, incident_id: int, *, db: sqlite3.Connection) -> tuple[str, float] | None:
        """(status, last_seen) of an incident, None when there is none with that id."""
        if not storable_id(incident_id):
            return None
        return db.execute("SELECT status, last_seen FROM incidents WHERE id = ?", (incident_id,)).fetchone()

    def set_status(self, incident_id: int, status: str, *, by: str, note: str, now: float,
                   db: sqlite3.Connection) -> None:
        db.execute("UPDATE incidents SET status = ?, status_changed = ?, status_by = ?, note = ? WHERE id = ?",
                   (status, now, by[:200], note[:1000], incident_id))

    # -- notifications ---------------------------------------------------------------------------------
    def notice_rows(self, *, incident_id: int | None = None, firing: bool = False, limit: int = -1,
                    db: sqlite3.Connection | None = None) -> list[dict]:
        """Incidents as notifications carry them, most recently active first: the listed row and
        the representative's step difference (``diff``). One incident, or the firing ones."""
        where, args = ("id = ?", (incident_id,)) if incident_id is not None else (
            "status IN ('open', 'acknowledged')" if firing else "1", ())
        out = []
        for r in (db or self.db).execute(f"SELECT {_LIST_COLUMNS}, {_from_representative('$.diff')} "
                                         f"FROM incidents WHERE {where} ORDER BY last_seen DESC, id DESC LIMIT ?",
                                         (*args, limit)):
            row = self._row(r[:-1])
            try:
                row["diff"] = rows.diff(r[-1])
            except rows.Damaged as exc:
                raise self._damaged(f"incident {row['id']}'s representative", exc) from exc
            out.append(row)
        return self._rated(out, db)

    def queue(self, incident_id: int, event: str, payload: dict, *, now: float, db: sqlite3.Connection) -> None:
        """Queue a notification (inside the transaction of the change that caused it)."""
        db.execute("INSERT INTO outbox (incident_id, event, created, payload) VALUES (?, ?, ?, ?)",
                   (incident_id, event, now, dumps(payload)))

    # -- triage labels (tracewatch/triage.py) ------------------------------------------------------
    def set_label(self, incident_id: int, label: str, *, by: str, note: str = "", now: float) -> bool:
        """Record (or replace) an incident's label; False when there is no such incident."""
        if not storable_id(incident_id):
            return False
        with self.transaction() as tx:
            if tx.execute("SELECT 1 FROM incidents WHERE id = ?", (incident_id,)).fetchone() is None:
                return False
            tx.execute("INSERT OR REPLACE INTO labels (incident_id, label, by, note, ts) VALUES (?, ?, ?, ?, ?)",
                       (incident_id, label, by[:200], note[:1000], now))
        return True

    def labels(self) -> list[dict]:
        """Every label with its incident's title and status, newest first."""
        rows_ = self.db.execute("SELECT l.incident_id, l.label, l.by, l.note, l.ts, i.title, i.status, i.count "
                                "FROM labels l JOIN incidents i ON i.id = l.incident_id ORDER BY l.ts DESC")
        keys = ("incident_id", "label", "by", "note", "labelled_at", "title", "status", "count")
        out = [dict(zip(keys, r)) for r in rows_]
        for row in out:
            try:
                rows.label_row(row)
            except rows.Damaged as exc:
                raise self._damaged(f"the label of incident {row['incident_id']!r:.40}", exc) from exc
        return out

    def labelled_alerts(self) -> list[tuple[dict, str, int]]:
        """(alert, label, incident id) for the kept member alerts of every labelled incident."""
        rows_ = self.db.execute("SELECT m.alert, l.label, l.incident_id FROM labels l JOIN members m "
                                "ON m.incident_id = l.incident_id ORDER BY l.incident_id, m.alert_id")
        out = []
        for a, label, iid in rows_:
            try:
                out.append((rows.alert(a), rows.label(label), iid))
            except rows.Damaged as exc:
                raise self._damaged(f"a labelled alert of incident {iid!r:.40}", exc) from exc
        return out

    # -- outbox and delivery cursors -----------------------------------------------------------------
    def outbox_after(self, last_id: int, limit: int = 100) -> list[tuple[int, str, dict | None]]:
        """Notifications after ``last_id``, in order: (row id, event, the incident as it was).
        A damaged row comes with None instead of the incident (the notifier sets it aside)."""
        out = []
        for i, ev, p in self.db.execute("SELECT id, event, payload FROM outbox WHERE id > ? ORDER BY id LIMIT ?",
                                        (last_id, limit)):
            try:
                out.append((i, rows.event(ev), rows.notice(p)))
            except rows.Damaged:
                out.append((i, str(ev)[:40], None))
        return out

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
        rows_ = self.db.execute("SELECT sink, last_id, attempts, delivered, rejected, last_error FROM cursors")
        newest = self.outbox_max()
        return {r[0]: {"pending": newest - r[1], "attempts": r[2], "delivered": r[3], "rejected": r[4],
                       "last_error": r[5]} for r in rows_}

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
