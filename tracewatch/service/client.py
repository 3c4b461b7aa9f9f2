"""The CLI's client for a running daemon's incident API (``tracewatch incidents --url``).

Stage: none — it calls :mod:`tracewatch.service.incidents_api` over HTTP. Also here: the two
conventions both ends share, so the server module imports them from this small one and the
CLI never imports the server: where the bearer token comes from, and the ``since`` time format.
"""

from __future__ import annotations

import os
import urllib.error
import urllib.request
from collections.abc import Mapping
from datetime import datetime, timezone

import orjson

from ..config import IncidentsConfig
from ..errors import InputError


def incident_token(cfg: IncidentsConfig, env: Mapping[str, str] = os.environ) -> str | None:
    """The bearer token for state changes: the config's, else the named environment variable's."""
    if cfg.token:
        return cfg.token
    value = env.get(cfg.token_env, "").strip()
    return value or None


def parse_since(value: str) -> float:
    """Seconds since the epoch, or an ISO 8601 time (UTC when no zone is given)."""
    try:
        return float(value)
    except ValueError:
        pass
    try:
        t = datetime.fromisoformat(value.replace("Z", "+00:00"))
    except ValueError as exc:
        raise ValueError(f"since: {value!r} is neither seconds since the epoch nor an ISO 8601 time") from exc
    if t.tzinfo is None:
        t = t.replace(tzinfo=timezone.utc)
    return t.timestamp()


def api_request(base_url: str, path: str, *, method: str = "GET", token: str | None = None,
                body: dict | None = None, timeout: float = 10.0) -> tuple[int, dict]:
    """Call a running daemon's incident API; returns (HTTP status, JSON answer)."""
    data = orjson.dumps(body) if body is not None else (b"" if method == "POST" else None)
    headers = {"Content-Type": "application/json"} if data is not None else {}
    if token:
        headers["Authorization"] = f"Bearer {token}"
    req = urllib.request.Request(base_url.rstrip("/") + path, data=data, method=method, headers=headers)
    try:
        with urllib.request.urlopen(req, timeout=timeout) as resp:
            return resp.status, orjson.loads(resp.read())
    except urllib.error.HTTPError as exc:
        raw = exc.read()
        exc.close()
        try:
            return exc.code, orjson.loads(raw)
        except orjson.JSONDecodeError:
            return exc.code, {"error": raw[:200].decode("utf-8", "replace")}
    except (urllib.error.URLError, OSError, ValueError) as exc:
        raise InputError(f"{base_url}: cannot reach the daemon: {getattr(exc, 'reason', exc)}") from exc
    except orjson.JSONDecodeError as exc:
        raise InputError(f"{base_url}{path}: the answer is not JSON; is this a tracewatch daemon?") from exc
