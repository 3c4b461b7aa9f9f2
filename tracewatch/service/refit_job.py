"""The daemon's refit job (``[refit] enabled``): quiet sessions feed a pool, and now and then a
candidate baseline is fitted from it on a thread of its own.

Stage: sessions (the quiet ones, and the alerts of incidents labelled expected) → the pool
(:class:`tracewatch.refit.QuietPool`, saved with each checkpoint) → :func:`tracewatch.refit.refit`
→ a candidate baseline, made current when it passes the gates; the daemon's
:class:`~tracewatch.service.baseline_watch.BaselineWatch` then switches to it.
"""

from __future__ import annotations

import logging
import os
import sqlite3
import threading
from collections import Counter
from collections.abc import Callable
from pathlib import Path

from ..alerts.store import IncidentStore
from ..config import Config
from ..errors import StateError, TracewatchError
from ..pipeline import Pipeline
from ..refit import OUTCOMES, POOL_FILE, QuietPool, RefitData, add_incidents, expected_incidents, refit, refit_data, \
    summary_line

log = logging.getLogger("tracewatch.daemon")


class RefitJob:
    """The pool and the refit thread. ``lock`` is the daemon's: the pipeline is read under it.
    ``store`` opens (or returns) the incident store; ``wall`` is the replaceable clock."""

    def __init__(self, cfg: Config, state_dir: Path, *, lock: threading.Lock, store: Callable[[], IncidentStore],
                 wall: Callable[[], float]) -> None:
        self.cfg = cfg
        self.lock = lock
        self.store = store
        self.wall = wall
        self.path = Path(state_dir) / POOL_FILE
        self.state_dir = Path(state_dir)
        self.pool: QuietPool | None = None  # None unless [refit] enabled
        self.outcomes: Counter = Counter()  # outcome -> refits
        self.thread: threading.Thread | None = None
        self._expected: set[int] = set()  # incidents labelled expected: their sessions are pooled
        self._pipe: Pipeline | None = None

    # -- start ---------------------------------------------------------------------------------
    def attach(self, pipe: Pipeline) -> None:
        """Load the pool (a corrupt file is moved aside: the pool is a sample, starting afresh
        loses no alert); start afresh when it belongs to another baseline; pool ``pipe``'s
        quiet sessions from now on."""
        rcfg = self.cfg.refit
        try:
            self.pool = QuietPool.load(self.path, rcfg.pool_size, rcfg.seed)
        except StateError as exc:
            aside = self.path.with_name(self.path.name + ".corrupt")
            try:
                os.replace(self.path, aside)
                log.error("%s; moved to %s, starting an empty pool", exc, aside)
            except OSError as err:
                log.error("%s; cannot move it aside (%s), starting an empty pool", exc, err.strerror or err)
            self.pool = QuietPool(rcfg.pool_size, rcfg.seed)
        version = pipe.baseline.version
        if self.pool.baseline_version != version:
            self.pool.clear(version)
        if self.pool.last_refit is None:
            self.pool.last_refit = self.wall()  # the first refit comes one interval after the first start
        self._pipe = pipe
        pipe.on_quiet = self._on_quiet
        self.outcomes.update(dict.fromkeys(OUTCOMES, 0))  # every outcome's series exists from the start
        self._refresh_expected()

    def _on_quiet(self, source: str, seq: tuple[int, ...]) -> None:
        self.pool.offer(source, seq, self._pipe.miner.templates)

    # -- what the daemon tells it ------------------------------------------------------------------
    def offer_alert(self, verdict: dict, incident_id: int | None) -> None:
        """An alert grouped into ``incident_id``: pooled when on-call said that pattern is normal."""
        if self.pool is not None and incident_id in self._expected:
            self.pool.offer_alert(verdict)

    def baseline_changed(self, version: str) -> None:
        """What the old baseline called quiet says nothing now (lock held)."""
        if self.pool is not None:
            self.pool.clear(version)

    def save(self) -> None:
        """With each checkpoint (lock held)."""
        if self.pool is not None and self.pool.dirty:
            try:
                self.pool.save(self.path)
            except OSError as exc:
                log.error("%s: cannot save the refit pool: %s", self.path, exc.strerror or exc)

    # -- the job --------------------------------------------------------------------------------------
    def _refresh_expected(self) -> None:
        if not self.cfg.refit.learn_expected:
            return
        try:
            ids = expected_incidents(self.store())
        except (sqlite3.Error, StateError, OSError) as exc:
            log.error("incident store: %s; the labels of expected incidents were not re-read", exc)
            return
        with self.lock:
            self._expected = ids

    def maybe_start(self) -> None:
        """Start a refit on its own thread when one is due and none is running."""
        if self.pool is None:
            return
        self._refresh_expected()
        if self.thread is not None and self.thread.is_alive():
            return
        if self.wall() < self.pool.last_refit + self.cfg.refit.interval_s:
            return
        with self.lock:
            data = refit_data(self.pool, self._pipe.miner, self._pipe.baseline.version)
            self.pool.last_refit = self.wall()
            self.pool.dirty = True
        self.thread = threading.Thread(target=self._run, args=(data,), name="tracewatch-refit")
        self.thread.start()

    def _run(self, data: RefitData) -> None:
        """Fit, gate, save (and promote): the whole refit, off the ingest thread."""
        outcome = "error"
        try:
            store = self.store()
            try:
                add_incidents(data, store)
            finally:
                store.release()
            report, _ = refit(data, self.cfg, self.state_dir, promote=self.cfg.refit.promote)
            outcome = report["outcome"]
            log.log(logging.WARNING if outcome == "refused" else logging.INFO, "%s", summary_line(report))
        except (TracewatchError, sqlite3.Error, OSError) as exc:
            log.error("refit failed: %s; the baseline in use is kept", exc)
        except Exception:
            log.exception("refit failed; the baseline in use is kept")
        with self.lock:
            self.outcomes[outcome] += 1

    def join(self) -> None:
        """Let a fit in progress finish (and save its candidate)."""
        if self.thread is not None:
            self.thread.join()

    # -- what status and metrics read ---------------------------------------------------------------
    def snapshot(self) -> dict:
        """(lock held) ``refits`` by outcome and ``refit_pool`` sizes by source."""
        return {"refits": dict(self.outcomes), "refit_pool": self.pool.sizes() if self.pool is not None else {}}
