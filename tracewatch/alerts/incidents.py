"""Incidents: alerts that resemble each other are grouped online, so the on-call engineer
reads a handful of incidents instead of thousands of alerts.

Stage: alerts → **incidents** → summaries, page, notifications. Each alert becomes a vector of
weighted terms, L2-normalised (cosine geometry):

- its explanation — events never seen at fit (weight 2), the n-grams over-represented or never
  seen (their explanation weight), the expected n-grams missing (0.3 × their share in the
  cluster) — which is what tells one fault from another across workflows;
- the n-grams (n = 1..3) of its template-id sequence, sublinear tf, scaled to norm 0.5 — the
  context. Counted here rather than with the baseline's vectoriser so that incidents outlive
  a baseline switch.

Online average linkage: the distance of a new alert x to an incident I is the mean cosine
distance to I's alerts, 1 − x·(Σ_{m∈I} m)/|I|, so keeping the sum of the members' vectors
gives average linkage exactly at the cost of one dot product per incident. The alert joins
the nearest incident that is open or acknowledged and had an alert within ``window_s`` (or is
marked expected — then it joins silently), when that distance is at most ``cut``; otherwise
it opens a new incident. The representative is the medoid — the member with the least total
distance to all the others, i.e. the largest m·Σ — taken among a bounded set of candidates
that keeps the members closest to the centre.

Everything is written to the :class:`~tracewatch.alerts.store.IncidentStore` in one
transaction per alert, with the notifications it causes (opened, escalated when the count
reaches a step, resolved), so a crash loses or repeats none. An alert id already grouped is
recognised (alerts raised again after a restart are not counted twice).
"""

from __future__ import annotations

import hashlib
import logging
import math
import sqlite3
import time
from collections import Counter
from collections.abc import Callable, Iterable
from itertools import repeat
from operator import mul
from pathlib import Path

import orjson

from ..config import Config, IncidentsConfig
from ..errors import StateError
from ..features import END, START, ngrams
from . import summary
from .store import _LIST_COLUMNS, FIRING, IncidentStore, dumps

log = logging.getLogger("tracewatch.incidents")

Vector = dict[str, float]

UNSEEN_WEIGHT = 2.0
MISSING_WEIGHT = 0.3
SEQUENCE_NORM = 0.5
NGRAM_MAX = 3
MAX_TERMS = 512  # the kept sum vector of an incident (the largest terms; the rest is noise)
MAX_STATS = 100  # entries kept per statistic
TICK_EVERY_S = 1.0
DIFF_IN_NOTES = 5

ACTIONS = {"ack": "acknowledged", "resolve": "resolved", "expected": "expected"}
# status → statuses an action may move it from
_ALLOWED = {"acknowledged": ("open",), "resolved": ("open", "acknowledged", "expected"),
            "expected": ("open", "acknowledged", "resolved")}


# -- vectors -----------------------------------------------------------------------------------------
def _term(text: str) -> str:
    return hashlib.blake2b(text.encode("utf-8", "replace"), digest_size=6).hexdigest()


_MARKERS = {START: "^", END: "$"}


def sequence_ngrams(seq: Iterable[str], n_max: int = NGRAM_MAX) -> Counter:
    """Counts of the 1..n_max-grams of a template-id sequence framed by start/end markers
    (:func:`tracewatch.features.ngrams`), each n-gram as its ids joined by spaces."""
    return Counter({" ".join([_MARKERS.get(t, t) for t in g]): n for g, n in ngrams(tuple(seq), n_max).items()})


def alert_vector(alert: dict) -> Vector:
    """The alert as an L2-normalised term → weight map (terms hashed to 12 hex digits)."""
    v: Counter = Counter()
    for u in alert.get("unseen_events") or []:
        v[_term("u:" + str(u.get("template_id", u.get("template"))))] += UNSEEN_WEIGHT
    for x in alert.get("unexpected") or []:
        v[_term("x:" + x["ngram"])] += float(x.get("weight", 0.1))
    for m in alert.get("missing") or []:
        v[_term("m:" + m["ngram"])] += MISSING_WEIGHT * float(m.get("cluster_share", 1.0))
    grams = sequence_ngrams(alert.get("sequence") or [])
    tf = {g: 1.0 + math.log(n) for g, n in grams.items()}
    norm = math.sqrt(sum(w * w for w in tf.values())) or 1.0
    for g, w in tf.items():
        v[_term("s:" + g)] += SEQUENCE_NORM * w / norm
    total = math.sqrt(sum(w * w for w in v.values())) or 1.0
    return {k: w / total for k, w in v.items()}


def dot(a: Vector, b: Vector) -> float:
    if len(a) > len(b):
        a, b = b, a
    return sum(map(mul, a.values(), map(b.get, a, repeat(0.0))))  # the loop runs in C


def _trim(v: Vector, keep: int) -> Vector:
    return dict(sorted(v.items(), key=lambda kv: -abs(kv[1]))[:keep]) if len(v) > 2 * keep else v


# -- the tracker ---------------------------------------------------------------------------------------
class _Group:
    """What the tracker keeps in memory about one incident: the sum of its alerts' vectors and
    its candidate representatives."""

    __slots__ = ("count", "total", "members")

    def __init__(self, count: int, total: Vector, members: list[tuple[str, Vector]]) -> None:
        self.count = count
        self.total = total
        self.members = members


def _stats_add(stats: dict, alert: dict) -> None:
    def bump(key: str, items: Iterable[str]) -> None:
        c = stats.setdefault(key, {})
        for item in set(items):
            c[item] = c.get(item, 0) + 1
        if len(c) > 2 * MAX_STATS:
            stats[key] = dict(sorted(c.items(), key=lambda kv: -kv[1])[:MAX_STATS])

    bump("sources", [str(alert.get("source", "?"))])
    bump("reasons", alert.get("reasons") or [])
    bump("unseen", [u.get("template", "?") for u in alert.get("unseen_events") or []])
    bump("unexpected", [x["ngram"] for x in alert.get("unexpected") or []])
    bump("missing", [m["ngram"] for m in alert.get("missing") or []])


def alert_time(alert: dict, clock: Callable[[], float]) -> float:
    for key in ("end", "start"):
        t = alert.get(key)
        if isinstance(t, (int, float)) and math.isfinite(t):
            return float(t)
    return clock()


class IncidentTracker:
    """Groups alerts into incidents in ``store`` (see the module docstring).

    ``add(alert)`` for every alert; ``tick(now)`` now and then resolves quiet incidents.
    Times are the alerts' own (event time); ``clock`` stands in for alerts without one and
    stamps status changes. ``on_outbox`` is called after a transaction queued notifications.
    ``triage`` (:meth:`tracewatch.triage.Triage.suggest`) is asked about the first alert of each
    new incident; its suggestion is stored, and one saying "suppress" opens the incident as
    expected, without a notification.
    """

    def __init__(self, store: IncidentStore, cfg: IncidentsConfig, *, clock: Callable[[], float] = time.time,
                 on_outbox: Callable[[], None] | None = None,
                 triage: Callable[[dict], dict | None] | None = None) -> None:
        self.store = store
        self.cfg = cfg
        self.clock = clock
        self.on_outbox = on_outbox or (lambda: None)
        self.triage = triage
        self._groups: dict[int, _Group] = {}
        self._last_tick = -math.inf

    # -- adding alerts ----------------------------------------------------------------------------
    def add(self, alert: dict) -> int | None:
        """Group one alert; returns its incident id (None for a verdict that is no alert)."""
        if not alert.get("alert"):
            return None
        t = alert_time(alert, self.clock)
        x = alert_vector(alert)
        changed: dict[int, _Group] = {}
        try:
            with self.store.transaction() as db:
                row = db.execute("SELECT incident_id FROM alerts WHERE alert_id = ?", (alert["alert_id"],)).fetchone()
                if row is not None:
                    return row[0]
                best, best_d = None, math.inf
                candidates = db.execute(
                    "SELECT id, count FROM incidents WHERE (status IN ('open', 'acknowledged') AND last_seen >= ?)"
                    " OR status = 'expected'", (t - self.cfg.window_s,)).fetchall()
                for iid, count in candidates:
                    g = self._group(db, iid, count)
                    d = 1.0 - dot(x, g.total) / g.count
                    if d < best_d:
                        best, best_d = iid, d
                if best is not None and best_d <= self.cfg.cut:
                    iid, noted = self._join(db, best, self._groups[best], alert, x, t, changed)
                else:
                    iid, noted = self._open(db, alert, x, t, changed)
                db.execute("INSERT INTO alerts (alert_id, incident_id, ts) VALUES (?, ?, ?)", (alert["alert_id"], iid, t))
        except BaseException:
            for iid in changed:
                self._groups.pop(iid, None)
            raise
        self._groups.update(changed)
        if len(self._groups) > 4 * len(candidates) + 256:
            keep = {c[0] for c in candidates} | set(changed)
            self._groups = {i: g for i, g in self._groups.items() if i in keep}
        if noted:
            self.on_outbox()
        return iid

    def _group(self, db: sqlite3.Connection, iid: int, count: int) -> _Group:
        g = self._groups.get(iid)
        if g is None or g.count != count:
            total = orjson.loads(db.execute("SELECT centroid FROM incidents WHERE id = ?", (iid,)).fetchone()[0])
            members = [(a, orjson.loads(v)) for a, v in
                       db.execute("SELECT alert_id, vector FROM members WHERE incident_id = ?", (iid,))]
            g = self._groups[iid] = _Group(count, total, members)
        return g

    def _open(self, db: sqlite3.Connection, alert: dict, x: Vector, t: float, changed: dict) -> tuple[int, bool]:
        stats: dict = {}
        _stats_add(stats, alert)
        now = self.clock()
        hint = self.triage(alert) if self.triage is not None else None  # triage (tracewatch/triage.py)
        quiet = hint is not None and hint.get("action") == "suppress"
        cur = db.execute(
            "INSERT INTO incidents (status, title, first_seen, last_seen, count, created, status_changed, stats, "
            "centroid, representative, status_by, suggestion) VALUES (?, ?, ?, ?, 1, ?, ?, ?, ?, ?, ?, ?)",
            ("expected" if quiet else "open", summary.title(alert), t, t, now, now, dumps(stats), dumps(x),
             dumps(alert), "triage" if quiet else "", dumps(hint) if hint is not None else ""))
        iid = cur.lastrowid
        db.execute("INSERT INTO members VALUES (?, ?, ?, ?)", (iid, alert["alert_id"], dumps(x), dumps(alert)))
        changed[iid] = _Group(1, dict(x), [(alert["alert_id"], x)])
        if quiet:
            return iid, False
        queue(db, iid, "opened")
        return iid, True

    def _join(self, db: sqlite3.Connection, iid: int, g: _Group, alert: dict, x: Vector, t: float,
              changed: dict) -> tuple[int, bool]:
        status, first, last, escalated, stats_json, rep_id = db.execute(
            "SELECT status, first_seen, last_seen, escalated, stats, json_extract(representative, '$.alert_id') "
            "FROM incidents WHERE id = ?", (iid,)).fetchone()
        total = dict(g.total)
        for k, w in x.items():
            total[k] = total.get(k, 0.0) + w
        total = _trim(total, MAX_TERMS)
        count = g.count + 1
        aid = alert["alert_id"]
        members = list(g.members)
        closeness = [dot(v, total) for _, v in members]  # to the centre: the medoid has the most
        if len(members) < self.cfg.max_members:
            members.append((aid, x))
            closeness.append(dot(x, total))
            db.execute("INSERT INTO members VALUES (?, ?, ?, ?)", (iid, aid, dumps(x), dumps(alert)))
        else:  # keep the candidates closest to the centre
            worst = min(range(len(members)), key=closeness.__getitem__)
            mine = dot(x, total)
            if mine > closeness[worst]:
                db.execute("DELETE FROM members WHERE incident_id = ? AND alert_id = ?", (iid, members[worst][0]))
                members[worst], closeness[worst] = (aid, x), mine
                db.execute("INSERT INTO members VALUES (?, ?, ?, ?)", (iid, aid, dumps(x), dumps(alert)))
        medoid = members[max(range(len(members)), key=closeness.__getitem__)][0]
        stats = orjson.loads(stats_json)
        _stats_add(stats, alert)
        sets = ["count = ?", "first_seen = ?", "last_seen = ?", "stats = ?", "centroid = ?"]
        args: list = [count, min(first, t), max(last, t), dumps(stats), dumps(total)]
        if medoid != rep_id:
            rep = alert if medoid == aid else orjson.loads(db.execute(
                "SELECT alert FROM members WHERE incident_id = ? AND alert_id = ?", (iid, medoid)).fetchone()[0])
            sets += ["representative = ?", "title = ?"]
            args += [dumps(rep), summary.title(rep)]
        step = max((s for s in self.cfg.escalation_steps if s <= count), default=0)
        noted = status == "open" and step > escalated
        if noted:
            sets.append("escalated = ?")
            args.append(step)
        db.execute(f"UPDATE incidents SET {', '.join(sets)} WHERE id = ?", (*args, iid))
        changed[iid] = _Group(count, total, members)
        if noted:
            queue(db, iid, "escalated", step=step)
        return iid, noted

    # -- time ----------------------------------------------------------------------------------------
    def tick(self, now: float) -> list[int]:
        """Resolve open or acknowledged incidents with no alert for ``auto_resolve_s`` (event
        time); at most once a second. Returns the ids resolved."""
        if not self.cfg.auto_resolve_s or now - self._last_tick < TICK_EVERY_S:
            return []
        self._last_tick = now
        limit = now - self.cfg.auto_resolve_s
        quiet = [r[0] for r in self.store.db.execute(
            "SELECT id FROM incidents WHERE status IN ('open', 'acknowledged') AND last_seen < ?", (limit,))]
        done = []
        for iid in quiet:
            why = f"auto: no alert for {self.cfg.auto_resolve_s:g} s"
            if set_status(self.store, iid, "resolve", by=why, now=self.clock(), when_quiet_since=limit)[0] == 200:
                done.append(iid)
                self._groups.pop(iid, None)
        if done:
            self.on_outbox()
        return done


# -- status changes and notifications ------------------------------------------------------------------
def notices(db: sqlite3.Connection, where: str, args: tuple = (), limit: int = -1) -> list[dict]:
    """Incidents as notifications carry them, most recently active first: the list form and
    the first steps of the representative's difference."""
    rows = db.execute(f"SELECT {_LIST_COLUMNS}, json_extract(representative, '$.diff') FROM incidents "
                      f"WHERE {where} ORDER BY last_seen DESC, id DESC LIMIT ?", (*args, limit))
    return [{**summary.brief(IncidentStore._row(r[:-1])), "diff": (orjson.loads(r[-1]) if r[-1] else [])[:DIFF_IN_NOTES]}
            for r in rows]


def queue(db: sqlite3.Connection, iid: int, event: str, **extra) -> None:
    """Queue a notification with the incident as it is now (inside the caller's transaction)."""
    snap = {**notices(db, "id = ?", (iid,))[0], **extra}
    db.execute("INSERT INTO outbox (incident_id, event, created, payload) VALUES (?, ?, ?, ?)",
               (iid, event, time.time(), dumps(snap)))


def set_status(store: IncidentStore, iid: int, action: str, *, by: str, note: str = "",
               now: float | None = None, when_quiet_since: float | None = None) -> tuple[int, dict]:
    """Acknowledge, resolve or mark an incident expected. Returns an HTTP-like code and the
    incident (200), or an error (404 unknown, 409 not allowed from its status, 400 bad action).
    Leaving a firing status (open, acknowledged) queues a "resolved" notification."""
    target = ACTIONS.get(action)
    if target is None:
        return 400, {"error": f"unknown action {action!r}; use one of {', '.join(ACTIONS)}"}
    now = time.time() if now is None else now
    with store.transaction() as db:
        row = db.execute("SELECT status, last_seen FROM incidents WHERE id = ?", (iid,)).fetchone()
        if row is None:
            return 404, {"error": f"no incident {iid}"}
        status, last_seen = row
        if when_quiet_since is not None and last_seen >= when_quiet_since:
            return 409, {"error": "the incident had a new alert"}
        if status != target:
            if status not in _ALLOWED[target]:
                return 409, {"error": f"incident {iid} is {status}; it cannot be marked {target}"}
            db.execute("UPDATE incidents SET status = ?, status_changed = ?, status_by = ?, note = ? WHERE id = ?",
                       (target, now, by[:200], note[:1000], iid))
            if status in FIRING and target not in FIRING:
                queue(db, iid, "resolved")
        return 200, store.incident(iid, db=db)


class Incidents:
    """What the daemon holds: the store, the tracker and the notifier, opened on first use.

    ``start()`` once (opens the store, starts the notifier thread); ``add(alert)`` for every
    alert; ``tick(now)`` with the daemon's event-time clock; ``close()`` at shutdown.
    """

    def __init__(self, cfg: Config, *, clock: Callable[[], float] = time.time) -> None:
        self.cfg = cfg
        self.clock = clock
        self._store: IncidentStore | None = None
        self.tracker: IncidentTracker | None = None
        self.notifier = None
        self.failures = 0

    @property
    def store(self) -> IncidentStore:
        if self._store is None:
            from .sinks import Notifier

            self._store = IncidentStore.open(Path(self.cfg.state_dir))
            self.notifier = Notifier.from_config(self._store, self.cfg)
            triage = None
            if self.cfg.triage.enabled:
                from ..triage import Triage

                triage = Triage(self.cfg.triage, Path(self.cfg.state_dir)).suggest
            self.tracker = IncidentTracker(self._store, self.cfg.incidents, clock=self.clock,
                                           on_outbox=self.notifier.wake, triage=triage)
        return self._store

    def start(self) -> None:
        self.store  # noqa: B018 - opens it
        self.notifier.start()

    def add(self, alert: dict) -> int | None:
        """Group an alert. A store that fails (disk full, say) is logged and does not stop the
        caller: alerts.jsonl stays the record, and later alerts are grouped when it works again."""
        try:
            self.store  # noqa: B018
            return self.tracker.add(alert)
        except (sqlite3.Error, StateError, OSError) as exc:
            self.failures += 1
            log.error("incident store: %s; alert %s not grouped (it is in alerts.jsonl)", exc, alert.get("alert_id"))
            return None

    def tick(self, now: float) -> None:
        if self.tracker is not None:
            try:
                self.tracker.tick(now)
            except (sqlite3.Error, OSError) as exc:
                self.failures += 1
                log.error("incident store: %s; quiet incidents not resolved this time", exc)

    def set_status(self, iid: int, action: str, *, by: str, note: str = "") -> tuple[int, dict]:
        code, out = set_status(self.store, iid, action, by=by, note=note)
        if code == 200:
            self.notifier.wake()
        return code, out

    def close(self) -> None:
        if self.notifier is not None:
            self.notifier.stop()
        if self._store is not None:
            self._store.close()
            self._store = None
