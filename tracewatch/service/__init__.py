"""Service: the daemon (``tracewatch run``) and what it serves.

    daemon.py          the main loop and the wiring: follows files, drives the pipeline, checkpoints
    baseline_watch.py  hot reload of the current baseline
    refit_job.py       the quiet-session pool and the refit thread ([refit] enabled)
    status.py          readiness, /api/status and the metrics snapshot
    logs.py            tracewatch's own log (plain or JSON lines)
    incidents.py       the daemon's incidents: store, tracker, notifier and triage wired together
    http.py            /metrics, /healthz, /readyz, /api/status, /api/alerts (standard library server)
    incidents_api.py   the incident page and API routes (domain errors become status codes here)
    client.py          the CLI's client for those routes (--url)
    metrics.py         every Prometheus metric, on a registry passed in (never imports http.py)
    page.py            the incident page's HTML (log text escaped)
    systemd.py         life under a service manager: sd_notify, SIGTERM stop, SIGHUP reload
"""

from __future__ import annotations

from .daemon import Daemon, run_daemon
from .http import serve
from .logs import setup_logging
from .metrics import DaemonMetrics

__all__ = ["Daemon", "DaemonMetrics", "run_daemon", "serve", "setup_logging"]
