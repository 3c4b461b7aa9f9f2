"""What the daemon says about itself: readiness, the status document and the metrics snapshot.

Stage: reads the daemon's parts (pipeline counters, followed files, journal, baseline watch,
refit job) under the daemon's lock; hands plain dicts to HTTP (``/readyz``, ``/api/status``)
and to :mod:`tracewatch.service.metrics` (the snapshot read at every scrape). It changes nothing.
"""

from __future__ import annotations

from datetime import datetime, timezone
from typing import TYPE_CHECKING

from .. import __version__

if TYPE_CHECKING:
    from .daemon import Daemon


def iso(ts: float) -> str:
    return datetime.fromtimestamp(ts, tz=timezone.utc).isoformat(timespec="seconds")


class DaemonStatus:
    """Readiness, status and snapshot of one :class:`~tracewatch.service.daemon.Daemon`."""

    def __init__(self, daemon: Daemon) -> None:
        self.d = daemon

    def ready(self) -> tuple[bool, str]:
        d = self.d
        if d.stopping.is_set():
            return False, "shutting down"
        if not d.started or d.pipe is None:
            return False, "starting: loading the baseline and attaching the sources"
        with d.lock:
            detached = d.detached()
        if detached:
            name, why = sorted(detached.items())[0]
            return False, f"source {name} is not attached: {why}"
        return True, ""

    def snapshot(self) -> dict:
        """The counters the metrics expose (keys in :mod:`tracewatch.service.metrics`)."""
        d = self.d
        incidents = d.incidents.snapshot()  # the store has its own locking
        with d.lock:
            p = d.pipe
            if p is None:
                return {}
            return {**incidents,
                "records": dict(p.records), "lines": dict(p.lines), "sessions_scored": dict(p.sessions_scored),
                "untimed": dict(p.untimed),
                "rejected": dict(p.rejected), "reject_reasons": p.reject_reasons, "repaired": dict(p.repaired),
                "alerts": dict(p.alerts),
                "sessions_open": len(p.sessionizer.open), "sessions_evicted": p.sessionizer.evicted,
                "baseline_reload_failures": d.watch.failures, "alerts_replayed": d.journal.replayed,
                "alert_lines_damaged": d.journal.damaged,
                "baseline_version": p.baseline.version, "files": d.inputs(),
                "sources": [s.name for s in d.cfg.sources], "checkpoint_time": d.checkpoint_time,
                "checkpoint_seconds": d.checkpoint_seconds, **d.refit.snapshot(),
            }

    def status(self) -> dict:
        """``/api/status``: sources, files, offsets, lag, open sessions, baseline, checkpoint."""
        d = self.d
        ok, why = self.ready()
        snap = self.snapshot()
        files = snap.get("files", [])
        with d.lock:
            detached = d.detached()
        sources = []
        for src in d.cfg.sources:
            mine = [f for f in files if f["source"] == src.name]
            sources.append({
                "name": src.name, "format": src.format, "paths": src.paths,
                "attached": d.started and src.name not in detached,
                "lines": snap.get("lines", {}).get(src.name, 0),
                "records": snap.get("records", {}).get(src.name, 0),
                "untimed": snap.get("untimed", {}).get(src.name, 0),
                "rejected": {r: n for (s, r), n in snap.get("rejected", {}).items() if s == src.name},
                "sessions_scored": snap.get("sessions_scored", {}).get(src.name, 0),
                "lag_bytes": sum(f["lag_bytes"] for f in mine),
                "lag_seconds": max((f["lag_seconds"] for f in mine), default=0.0),
                "files": mine,
            })
        pool = d.refit.pool
        return {
            "tracewatch": __version__, "ready": ok, "reason": why,
            "baseline_version": snap.get("baseline_version"),
            "baseline_reload_failures": d.watch.failures,
            "sessions_open": snap.get("sessions_open", 0), "sessions_evicted": snap.get("sessions_evicted", 0),
            "alerts": d.journal.count, "alerts_replayed": d.journal.replayed,
            "alert_lines_damaged": d.journal.damaged,
            "event_time": d.pipe.watermark if d.pipe is not None else None,
            "checkpoint": {"path": str(d.checkpoint_path),
                           "written": iso(d.checkpoint_time) if d.checkpoint_time else None,
                           "seconds": round(d.checkpoint_seconds, 4)},
            "sources": sources,
            "refit": None if pool is None else {  # tracewatch/service/refit_job.py
                "pool": snap.get("refit_pool", {}), "outcomes": snap.get("refits", {}),
                "last": iso(pool.last_refit) if pool.last_refit else None},
        }
