"""The daemon's incidents: the store, the tracker, the notifier and triage, wired together.

Stage: alerts → incidents (:mod:`tracewatch.alerts.incidents`) → sinks
(:mod:`tracewatch.alerts.sinks`), with triage's suggestions (:mod:`tracewatch.triage`). This is
the one module that knows all three; none of them imports another — the tracker is handed the
triage object and the notifier's ``wake`` as its callback.
"""

from __future__ import annotations

import logging
import sqlite3
import time
from collections.abc import Callable
from pathlib import Path

from ..alerts.incidents import IncidentTracker, set_status, tracker_for
from ..alerts.sinks import Notifier
from ..alerts.store import STATUSES, IncidentStore
from ..config import Config
from ..errors import StateError

log = logging.getLogger("tracewatch.incidents")


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
        self.notifier: Notifier | None = None
        self.failures = 0

    @property
    def store(self) -> IncidentStore:
        if self._store is None:
            state_dir = Path(self.cfg.state_dir)
            self._store = IncidentStore.open(state_dir)
            self.notifier = Notifier.from_config(self._store, self.cfg)
            self.tracker = tracker_for(self._store, self.cfg, clock=self.clock, on_outbox=self.notifier.wake)
        return self._store

    def start(self) -> None:
        self.store  # noqa: B018 - opens it
        self.notifier.start()

    def add(self, alert: dict) -> int | None:
        """Count a verdict's session and group it when it is an alert. A store that fails (disk
        full, say) is logged and does not stop the caller: alerts.jsonl stays the record, and
        later alerts are grouped when it works again."""
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
            except (sqlite3.Error, StateError, OSError) as exc:
                self.failures += 1
                log.error("incident store: %s; quiet incidents not resolved this time", exc)

    def set_status(self, iid: int, action: str, *, by: str, note: str = "") -> dict:
        """:func:`tracewatch.alerts.incidents.set_status`, then wake the notifier."""
        out = set_status(self.store, iid, action, by=by, note=note)
        self.notifier.wake()
        return out

    def snapshot(self) -> dict:
        """``incidents`` by status and ``notifications`` by sink, for the metrics (keys in
        :mod:`tracewatch.service.metrics`); every status and every configured sink, at zero too.
        Empty while the store is not open or cannot be read (the error is logged where it happens)."""
        if self._store is None:
            return {}
        try:
            counts = self._store.counts()
            sinks = self.notifier.status()
        except (sqlite3.Error, StateError, OSError):
            return {}
        finally:
            self._store.release()  # asked from the scraping thread: its connection goes with it
        return {"incidents": {status: counts.get(status, 0) for status in STATUSES},
                "notifications": {name: {"sent": c.get("delivered", 0), "rejected": c.get("rejected", 0),
                                         "retried": c["retries"], "pending": c.get("pending", 0)}
                                  for name, c in sinks.items()}}

    def release(self) -> None:
        """Close this thread's store connection (each HTTP request runs in a thread of its own)."""
        if self._store is not None:
            self._store.release()

    def close(self) -> None:
        if self.tracker is not None:
            try:
                self.tracker.flush()  # the sessions counted since the last tick
            except (sqlite3.Error, StateError, OSError) as exc:
                log.error("incident store: %s; the last second's session counts not written", exc)
        if self.notifier is not None:
            self.notifier.stop()
        if self._store is not None:
            self._store.close()
            self._store = None
