"""tracewatch's own log (``tracewatch run``): stderr, plain lines or JSON lines.

Stage: none — the daemon's operational log, not the logs it follows. A record that carries an
exception keeps its traceback (``error`` in JSON lines), so a fault is logged with its cause.
"""

from __future__ import annotations

import logging
import sys
from datetime import datetime, timezone

import orjson


class JsonLines(logging.Formatter):
    """One JSON object per record: time (UTC, milliseconds), level, logger, message[, error]."""

    def format(self, record: logging.LogRecord) -> str:
        obj = {"time": datetime.fromtimestamp(record.created, tz=timezone.utc).isoformat(timespec="milliseconds"),
               "level": record.levelname.lower(), "logger": record.name, "message": record.getMessage()}
        if record.exc_info:
            obj["error"] = self.formatException(record.exc_info)
        return orjson.dumps(obj).decode()


def setup_logging(level: str = "info", fmt: str = "plain") -> None:
    """tracewatch's own log: stderr, plain lines or JSON lines."""
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(JsonLines() if fmt == "json" else
                         logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    root = logging.getLogger("tracewatch")
    root.handlers[:] = [handler]
    root.setLevel(level.upper())
    root.propagate = False
