"""Incidents: alerts that resemble each other are grouped online, so the on-call engineer
reads a handful of incidents instead of thousands of alerts.

Stage: alerts → **incidents** → summaries, page, notifications. Alerts are compared by their
vectors (:mod:`tracewatch.alerts.vectors`: explanation and sequence n-grams, cosine geometry).

First by what is wrong: an alert joins the nearest incident (open or acknowledged with an alert
within ``window_s``, or expected; or, of its own signature, one with an alert within ``recur_s``
that is open, acknowledged or was resolved automatically — reopened then) whose signature — the source and the kind and subject of its
opening alert's strongest explanation (:func:`tracewatch.alerts.summary.signature`: the same
never-seen event, the same retried step, the same missing step ...) — is the alert's, however
far its other terms are. Failing that, by similarity:

Online average linkage: the distance of a new alert x to an incident I is the mean cosine
distance to I's alerts, 1 − x·(Σ_{m∈I} m)/|I|, so keeping the sum of the members' vectors
gives average linkage exactly at the cost of one dot product per incident. The alert joins
the nearest incident that is open or acknowledged and had an alert within ``window_s`` (or is
marked expected — then it joins silently), when that distance is at most ``cut``; otherwise
it opens a new incident. The representative is the medoid — the member with the least total
distance to all the others, i.e. the largest m·Σ — taken among a bounded set of candidates
that keeps the members closest to the centre.

Everything is written to the :class:`~tracewatch.alerts.store.IncidentStore` (whose methods
hold the SQL) in one transaction per alert, with the notifications it causes (opened,
escalated when the count reaches a step, resolved), so a crash loses or repeats none. An alert
id already grouped is recognised (alerts raised again after a restart are not counted twice).
An incident whose stored state is damaged is left out of grouping (logged once).

Every verdict handed to :meth:`IncidentTracker.add`, alert or not, is counted as a session
scored of its source in the minute of its event time: what an incident's rate and reach are
measured against (:func:`tracewatch.alerts.summary.reach`). The counts are written with the
next alert's transaction or the next :meth:`~IncidentTracker.tick` (a crash loses at most a
second of them), and kept for :data:`SESSIONS_KEPT_DAYS` days of event time.

What the tracker needs from outside is passed in: a triage object (anything with
``suggest(alert)``, :class:`tracewatch.triage.Triage`) and a callback for queued
notifications (the notifier's ``wake``). Status changes return the incident or raise the
domain errors :class:`~tracewatch.errors.IncidentNotFound` and
:class:`~tracewatch.errors.InvalidTransition`; only the HTTP layer turns them into codes.
"""

from __future__ import annotations

import logging
import math
import sqlite3
import time
from collections import Counter
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Protocol

from ..config import IncidentsConfig
from ..errors import IncidentNotFound, InvalidTransition, StateError
from . import summary
from .store import AUTO, FIRING, IncidentStore
from .vectors import Vector, alert_vector, dot, sequence_ngrams, trim  # noqa: F401 - sequence_ngrams: the API

log = logging.getLogger("tracewatch.incidents")

MAX_TERMS = 512  # the kept sum vector of an incident (the largest terms; the rest is noise)
MAX_STATS = 100  # entries kept per statistic
TICK_EVERY_S = 1.0
SESSIONS_KEPT_DAYS = 90  # per-minute session counts older than this (event time) are dropped

ACTIONS = {"ack": "acknowledged", "resolve": "resolved", "expected": "expected"}
# status → statuses an action may move it from
_ALLOWED = {"acknowledged": ("open",), "resolved": ("open", "acknowledged", "expected"),
            "expected": ("open", "acknowledged", "resolved")}


class Triager(Protocol):
    """What the tracker asks about the first alert of each new incident (tracewatch/triage.py)."""

    def suggest(self, alert: dict) -> dict | None: ...


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


def tracker_for(store: IncidentStore, cfg, *, clock: Callable[[], float] = time.time,
                on_outbox: Callable[[], None] | None = None) -> "IncidentTracker":
    """The tracker the daemon and ``score --incidents`` use, with triage when ``[triage]
    enabled`` (imported only then: the kernel perceptron brings scikit-learn)."""
    triage = None
    if cfg.triage.enabled:
        from ..triage import Triage

        triage = Triage(cfg.triage, Path(cfg.state_dir))
    return IncidentTracker(store, cfg.incidents, clock=clock, on_outbox=on_outbox, triage=triage)


class IncidentTracker:
    """Groups alerts into incidents in ``store`` (see the module docstring).

    ``add(alert)`` for every alert; ``tick(now)`` now and then resolves quiet incidents.
    Times are the alerts' own (event time); ``clock`` stands in for alerts without one and
    stamps status changes. ``on_outbox`` is called after a transaction queued notifications.
    ``triage`` is asked about the first alert of each new incident; its suggestion is stored,
    and one saying "suppress" opens the incident as expected, without a notification.
    """

    def __init__(self, store: IncidentStore, cfg: IncidentsConfig, *, clock: Callable[[], float] = time.time,
                 on_outbox: Callable[[], None] | None = None, triage: Triager | None = None) -> None:
        self.store = store
        self.cfg = cfg
        self.clock = clock
        self.on_outbox = on_outbox or (lambda: None)
        self.triage = triage
        self._groups: dict[int, _Group] = {}
        self._damaged: set[int] = set()  # incidents left out of grouping (logged once each)
        self._last_tick = -math.inf  # wall clock: how often tick runs
        self._latest: float | None = None  # the newest alert's event time (from the store at first)
        self._latest_wall = 0.0  # the wall time it was last moved
        self._sessions: Counter[tuple[str, int]] = Counter()  # (source, minute) → scored, not yet written
        self._pruned_day = -1

    # -- adding alerts ----------------------------------------------------------------------------
    def add(self, alert: dict) -> int | None:
        """Count the verdict's session; group it when it is an alert and return its incident id
        (None for a verdict that is no alert)."""
        t = alert_time(alert, self.clock)
        minute = (str(alert.get("source", "?")), int(t // 60))  # where its session is counted
        if not alert.get("alert"):
            self._sessions[minute] += 1
            return None
        x = alert_vector(alert)
        store = self.store
        changed: dict[int, _Group] = {}
        try:
            with store.transaction() as db:
                known = store.incident_of(alert["alert_id"], db=db)
                if known is not None:
                    return known
                self._sessions[minute] += 1
                store.count_sessions(self._sessions, db=db)  # first: the notification queued reads them
                sig = summary.signature(alert)
                best, best_d, same = None, math.inf, False
                candidates = store.candidates(t - self.cfg.window_s, t - max(self.cfg.recur_s, self.cfg.window_s),
                                              db=db)
                for iid, count, their_sig, recurring in candidates:
                    mine = bool(sig) and their_sig == sig
                    if (same or recurring) and not mine:
                        continue
                    g = self._group(db, iid, count)
                    if g is None:
                        continue
                    d = 1.0 - dot(x, g.total) / g.count
                    if (mine and not same) or d < best_d:
                        best, best_d, same = iid, d, mine
                opened = not (best is not None and (same or best_d <= self.cfg.cut))
                if not opened:
                    iid, noted = self._join(db, best, self._groups[best], alert, x, t, changed)
                else:
                    iid, noted = self._open(db, alert, x, t, sig, changed)
                store.record_alert(alert["alert_id"], iid, t, db=db)
        except BaseException:
            for iid in changed:
                self._groups.pop(iid, None)
            raise
        self._groups.update(changed)
        self._sessions.clear()
        self._saw(t)
        if opened:
            log.info("incident %d opened%s: %s (source %s, session %s)", iid, "" if noted else " as expected",
                     summary.safe(summary.title(alert)), summary.safe(alert.get("source", "?")),
                     summary.safe(alert.get("session_key", "?")))
        if len(self._groups) > 4 * len(candidates) + 256:
            keep = {c[0] for c in candidates} | set(changed)
            self._groups = {i: g for i, g in self._groups.items() if i in keep}
        if noted:
            self.on_outbox()
        return iid

    def _group(self, db: sqlite3.Connection, iid: int, count) -> _Group | None:
        """The incident's vectors (cached while its count is unchanged); None when its stored
        state is damaged — it is then left out of grouping, and logged the first time."""
        g = self._groups.get(iid)
        if g is None or g.count != count:
            try:
                state = self.store.group(iid, db=db)
            except StateError as exc:
                self._groups.pop(iid, None)
                if iid not in self._damaged:
                    self._damaged.add(iid)
                    log.error("%s; no alert joins it until it is repaired", exc)
                return None
            g = self._groups[iid] = _Group(state.row["count"], state.total, state.members)
        return g

    def _open(self, db: sqlite3.Connection, alert: dict, x: Vector, t: float, sig: str,
              changed: dict) -> tuple[int, bool]:
        stats: dict = {}
        _stats_add(stats, alert)
        now = self.clock()
        hint = self.triage.suggest(alert) if self.triage is not None else None
        quiet = hint is not None and hint.get("action") == "suppress"
        iid = self.store.new_incident(status="expected" if quiet else "open", title=summary.title(alert), t=t,
                                      now=now, stats=stats, centroid=x, representative=alert,
                                      status_by="triage" if quiet else "", suggestion=hint, signature=sig, db=db)
        self.store.add_member(iid, alert["alert_id"], x, alert, db=db)
        changed[iid] = _Group(1, dict(x), [(alert["alert_id"], x)])
        if quiet:
            return iid, False
        queue(self.store, db, iid, "opened")
        return iid, True

    def _join(self, db: sqlite3.Connection, iid: int, g: _Group, alert: dict, x: Vector, t: float,
              changed: dict) -> tuple[int, bool]:
        store = self.store
        row, rep_id = store.state(iid, db=db)
        total = dict(g.total)
        for k, w in x.items():
            total[k] = total.get(k, 0.0) + w
        total = trim(total, MAX_TERMS)
        count = g.count + 1
        aid = alert["alert_id"]
        members = list(g.members)
        closeness = [dot(v, total) for _, v in members]  # to the centre: the medoid has the most
        if len(members) < self.cfg.max_members:
            members.append((aid, x))
            closeness.append(dot(x, total))
            store.add_member(iid, aid, x, alert, db=db)
        else:  # keep the candidates closest to the centre
            worst = min(range(len(members)), key=closeness.__getitem__)
            mine = dot(x, total)
            if mine > closeness[worst]:
                store.drop_member(iid, members[worst][0], db=db)
                members[worst], closeness[worst] = (aid, x), mine
                store.add_member(iid, aid, x, alert, db=db)
        medoid = members[max(range(len(members)), key=closeness.__getitem__)][0]
        reopened = row["status"] == "resolved"  # resolved automatically, and the same problem is back
        if reopened:
            store.set_status(iid, "open", by=AUTO + "the same problem again", note="", now=self.clock(), db=db)
            row["status"] = "open"
        stats = row["stats"]
        _stats_add(stats, alert)
        values: dict = {"count": count, "first_seen": min(row["first_seen"], t), "last_seen": max(row["last_seen"], t),
                        "stats": stats, "centroid": total}
        if medoid != rep_id:
            rep = alert if medoid == aid else store.member_alert(iid, medoid, db=db)
            values.update(representative=rep, title=summary.retitle(row["title"], rep))
        step = max((s for s in self.cfg.escalation_steps if s <= count), default=0)
        noted = row["status"] == "open" and step > row["escalated"]
        if noted:
            values["escalated"] = step
        store.update_incident(iid, db=db, **values)
        changed[iid] = _Group(count, total, members)
        if reopened:
            queue(store, db, iid, "opened", reopened=True)
            log.info("incident %d reopened: %s is back", iid, summary.safe(row["title"]))
        if noted:
            queue(store, db, iid, "escalated", step=step)
        return iid, noted or reopened

    # -- time ----------------------------------------------------------------------------------------
    def _saw(self, t: float | None) -> None:
        if self._latest is None or (t is not None and t > self._latest):
            self._latest = t if self._latest is None else max(t, self._latest)
            self._latest_wall = self.clock()

    def event_now(self, now: float) -> float | None:
        """The event clock quiet incidents are judged by: the newest alert's own time plus the
        wall seconds since it arrived, and never more than ``now`` (the caller's event time).
        After a restart it starts at the store's newest alert, so neither a replay of old logs
        nor a caller falling back to the wall clock resolves everything at once."""
        if self._latest is None:
            self._saw(self.store.latest_seen())
            if self._latest is None:
                return None
        return min(now, self._latest + max(0.0, self.clock() - self._latest_wall))

    def flush(self) -> None:
        """Write the sessions counted since the last write, and drop counts older than
        :data:`SESSIONS_KEPT_DAYS` before them."""
        if self._sessions:
            day = min(m for _, m in self._sessions) // 1440
            with self.store.transaction() as db:
                self.store.count_sessions(self._sessions, db=db)
                if day != self._pruned_day:  # once a day of event time
                    self.store.prune_sessions((day - SESSIONS_KEPT_DAYS) * 1440, db=db)
            self._sessions.clear()
            self._pruned_day = day

    def tick(self, now: float) -> list[int]:
        """Write the sessions counted (:meth:`flush`) and resolve open or acknowledged incidents
        with no alert for ``auto_resolve_s`` on the event clock (:meth:`event_now`); at most once
        a wall-clock second. Returns the ids resolved."""
        wall = self.clock()
        if wall - self._last_tick < TICK_EVERY_S:
            return []
        self._last_tick = wall
        self.flush()
        now = self.event_now(now) if self.cfg.auto_resolve_s else None
        if now is None:
            return []
        limit = now - self.cfg.auto_resolve_s
        done = []
        for iid in self.store.quiet_incidents(limit):
            why = f"{AUTO}no alert for {self.cfg.auto_resolve_s:g} s"
            try:
                set_status(self.store, iid, "resolve", by=why, now=self.clock(), when_quiet_since=limit)
            except (IncidentNotFound, InvalidTransition):  # changed meanwhile: left as it is
                continue
            done.append(iid)
            self._groups.pop(iid, None)
        if done:
            self.on_outbox()
        return done


# -- status changes and notifications ------------------------------------------------------------------
def queue(store: IncidentStore, db: sqlite3.Connection, iid: int, event: str, **extra) -> None:
    """Queue a notification with the incident as it is now (inside the caller's transaction)."""
    snap = {**summary.notice(store.notice_rows(incident_id=iid, db=db)[0]), **extra}
    store.queue(iid, event, snap, now=time.time(), db=db)


def set_status(store: IncidentStore, iid: int, action: str, *, by: str, note: str = "",
               now: float | None = None, when_quiet_since: float | None = None) -> dict:
    """Acknowledge, resolve or mark an incident expected; returns the incident as it is now.
    Raises :class:`IncidentNotFound`, or :class:`InvalidTransition` when its status does not
    allow the change (or, with ``when_quiet_since``, it had an alert since). Leaving a firing
    status (open, acknowledged) queues a "resolved" notification."""
    target = ACTIONS.get(action)
    if target is None:
        raise ValueError(f"unknown action {action!r}; use one of {', '.join(ACTIONS)}")
    now = time.time() if now is None else now
    with store.transaction() as db:
        row = store.status_of(iid, db=db)
        if row is None:
            raise IncidentNotFound(iid)
        status, last_seen = row
        if when_quiet_since is not None and last_seen >= when_quiet_since:
            raise InvalidTransition(f"incident {iid} had a new alert")
        if status != target:
            if status not in _ALLOWED[target]:
                raise InvalidTransition(f"incident {iid} is {status}; it cannot be marked {target}")
            store.set_status(iid, target, by=by, note=note, now=now, db=db)
            if status in FIRING and target not in FIRING:
                queue(store, db, iid, "resolved")
        return store.incident(iid, db=db)
