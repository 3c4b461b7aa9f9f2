"""Service: the daemon (``tracewatch run``) and what it serves.

    daemon.py    follows files, drives the pipeline, checkpoints, hot-reloads baselines
    http.py      /metrics, /healthz, /readyz, /api/status, /api/alerts (standard library server)
    metrics.py   every Prometheus metric, on a registry passed in (never imports http.py)
    incidents_api.py  the incident page and API routes, and the CLI's client for them
    page.py      the incident page's HTML (log text escaped)
    systemd.py   life under a service manager: sd_notify, SIGTERM stop, SIGHUP reload
"""

from __future__ import annotations

from .daemon import Daemon, run_daemon, setup_logging
from .http import serve
from .metrics import DaemonMetrics

__all__ = ["Daemon", "DaemonMetrics", "run_daemon", "serve", "setup_logging"]
