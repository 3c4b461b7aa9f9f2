"""Incident routes of the daemon's HTTP server: JSON API, HTML page, status changes.

Stage: serves the incidents (:mod:`tracewatch.alerts.incidents`); called by
:mod:`tracewatch.service.http` through :func:`route`, with the daemon's
:class:`~tracewatch.service.incidents.Incidents` as ``provider.incidents``. This is the one
place where the incident layer's outcomes become HTTP status codes: IncidentNotFound → 404,
InvalidTransition → 409, any other TracewatchError (a store that cannot be opened or read) → 503.
The CLI's client for these routes is :mod:`tracewatch.service.client`.

    GET  /?status=&source=&limit=&offset=
                                        the incident list (HTML), open incidents first, with charts
    GET  /incidents/{id}                one incident (HTML)
    GET  /api/incidents?status=&source=&since=&limit=&offset=
                                        incidents, most recently active first (JSON)
    GET  /api/incidents/{id}            one incident in detail (JSON)
    POST /api/incidents/{id}/ack        acknowledge            ┐ need "Authorization: Bearer
    POST /api/incidents/{id}/resolve    resolve                │ <token>" with the token of
    POST /api/incidents/{id}/expected   mark expected          ┘ [incidents] token / token_env

Without a configured token every state change is refused (403); a missing or wrong token
gets 401 (RFC 6750 §3). Tokens are compared with :func:`hmac.compare_digest`. The pages
carry log-derived text, escaped (see :mod:`tracewatch.service.page`).
"""

from __future__ import annotations

import hmac
import logging
import re
from http.server import BaseHTTPRequestHandler
from urllib.parse import parse_qs, urlsplit

import orjson

from ..alerts.alert import Redactor
from ..alerts.incidents import ACTIONS
from ..alerts.store import STATUSES, IncidentStore
from ..alerts.summary import brief, bucket_for, detail, timeline
from ..errors import IncidentNotFound, InvalidTransition, TracewatchError
from . import page
from .client import incident_token, parse_since
from .incidents import Incidents

log = logging.getLogger("tracewatch.http")

MAX_BODY = 4096
MAX_LIST = 1000
_DETAIL = re.compile(r"^/(?:api/)?incidents/(\d{1,12})$")
_ACTION = re.compile(r"^/api/incidents/(\d{1,12})/([a-z]+)$")


def send(h: BaseHTTPRequestHandler, code: int, body: bytes, content_type: str, headers: dict | None = None) -> None:
    """One complete answer, never cached or content-sniffed (both HTTP modules answer through it)."""
    h.send_response(code)
    h.send_header("Content-Type", content_type)
    h.send_header("Content-Length", str(len(body)))
    h.send_header("Cache-Control", "no-store")
    h.send_header("X-Content-Type-Options", "nosniff")
    for k, v in (headers or {}).items():
        h.send_header(k, v)
    h.end_headers()
    h.wfile.write(body)


def send_json(h: BaseHTTPRequestHandler, code: int, obj, headers: dict | None = None) -> None:
    send(h, code, orjson.dumps(obj, option=orjson.OPT_SERIALIZE_NUMPY), "application/json", headers)


def _html(h: BaseHTTPRequestHandler, code: int, text: str) -> None:
    send(h, code, text.encode("utf-8"), "text/html; charset=utf-8",
          {"Content-Security-Policy": page.CSP, "X-Frame-Options": "DENY", "Referrer-Policy": "no-referrer"})


def route(h: BaseHTTPRequestHandler, incidents: Incidents | None) -> bool:
    """Answer ``h``'s request if it is an incident route; False leaves it to the caller."""
    url = urlsplit(h.path)
    path = url.path
    is_page = path == "/" or path.startswith("/incidents/")
    if not (is_page or path == "/api/incidents" or path.startswith("/api/incidents/")):
        return False
    if incidents is None:
        send_json(h, 404, {"error": "incidents are not served here"})
        return True
    try:
        if h.command == "POST":
            _post(h, incidents, path)
        else:
            _get(h, incidents, path, parse_qs(url.query))
    except TracewatchError as exc:  # the store cannot be opened or read, for example
        send_json(h, 503, {"error": str(exc)})
    finally:
        incidents.release()  # each request runs in a thread of its own
    return True


PAGE_ROWS = 50  # incidents per page of the HTML list
MAX_SOURCE = 200  # characters of a ?source= filter
PAGE_SPAN_S = 7 * 86_400  # the list's charts cover at most the week before its newest alert


def _charts(store: IncidentStore, rows: list[dict], status: str | None, source: str | None
            ) -> tuple[dict | None, dict[int, dict]]:
    """The list's charts, on one time axis (from the listed incidents' first alert to their
    last): alerts over time of every incident of the filter, and of each listed incident."""
    if not rows:
        return None, {}
    end = max(r["last_seen"] for r in rows)
    start = max(min(r["first_seen"] for r in rows), end - PAGE_SPAN_S)
    overall = timeline(start, end, lambda b: store.alert_counts(b, status=status, source=source, from_ts=start))
    # every incident's counts in one query, in the buckets timeline(start, end, …) asks for
    per = store.alert_counts_each(bucket_for(start, end), [r["id"] for r in rows], from_ts=start)
    each = {r["id"]: timeline(start, end, lambda _b, i=r["id"]: per[i]) for r in rows}
    return overall, each


def _get(h: BaseHTTPRequestHandler, inc: Incidents, path: str, query: dict[str, list[str]]) -> None:
    cfg = inc.cfg.incidents
    store = inc.store
    if path in ("/", "/api/incidents"):
        try:
            status = query.get("status", [None])[0] or None
            if status is not None and status not in STATUSES:
                raise ValueError(f"status: use one of {', '.join(STATUSES)}")
            source = query.get("source", [None])[0] or None
            if source is not None and len(source) > MAX_SOURCE:
                raise ValueError(f"source: at most {MAX_SOURCE} characters")
            since = parse_since(query["since"][0]) if "since" in query else None
            limit = int(query.get("limit", [str(PAGE_ROWS if path == "/" else 100)])[0])
            offset = int(query.get("offset", ["0"])[0])
            if not 1 <= limit <= MAX_LIST or offset < 0:
                raise ValueError(f"limit must be between 1 and {MAX_LIST}, offset >= 0")
        except ValueError as exc:
            if path == "/":
                _html(h, 400, page.message_page("Bad request", str(exc), refresh_s=cfg.page_refresh_s))
            else:
                send_json(h, 400, {"error": str(exc)})
            return
        rows = [brief(i) for i in store.incidents(status=status, since=since, source=source, limit=limit,
                                                  offset=offset, open_first=path == "/")]
        if path == "/":
            notify = inc.notifier.status() if inc.notifier is not None else {}
            overall, charts = _charts(store, rows, status, source)
            _html(h, 200, page.list_page(rows, store.counts(), notify, refresh_s=cfg.page_refresh_s,
                                         status=status, source=source, sources=store.sources(), offset=offset,
                                         limit=limit, overall=overall, charts=charts))
            return
        notify = inc.notifier.status() if inc.notifier is not None else {}
        send_json(h, 200, {"incidents": rows, "counts": store.counts(), "notify": notify})
        return
    m = _DETAIL.match(path)
    found = store.incident(int(m.group(1))) if m else None
    if found is None:
        if path.startswith("/api/"):
            send_json(h, 404, {"error": f"no such incident or endpoint: {path}"})
        else:
            _html(h, 404, page.message_page("Not found", f"No incident at {path}.", refresh_s=cfg.page_refresh_s))
        return
    d = detail(found, max_samples=cfg.max_samples, redact=Redactor(inc.cfg.redact),
               alert_counts=lambda b: store.alert_counts(b, incident_id=found["id"]))
    if path.startswith("/api/"):
        d["alert_ids"] = store.alert_ids(d["id"])
        send_json(h, 200, d)
    else:
        _html(h, 200, page.detail_page(d, refresh_s=cfg.page_refresh_s))


def _post(h: BaseHTTPRequestHandler, inc: Incidents, path: str) -> None:
    try:
        length = int(h.headers.get("Content-Length") or 0)
    except ValueError:
        length = -1
    if not 0 <= length <= MAX_BODY:
        h.close_connection = True
        send_json(h, 413, {"error": f"request body must be at most {MAX_BODY} bytes"})
        return
    raw = h.rfile.read(length) if length else b""
    token = incident_token(inc.cfg.incidents)
    if token is None:
        send_json(h, 403, {"error": "state changes are disabled: set [incidents] token, or the environment "
                                f"variable {inc.cfg.incidents.token_env}, for the daemon"})
        return
    given = h.headers.get("Authorization", "")
    scheme, _, credentials = given.partition(" ")
    if scheme.lower() != "bearer" or not credentials:
        send_json(h, 401, {"error": "a bearer token is required"}, {"WWW-Authenticate": 'Bearer realm="tracewatch"'})
        return
    if not hmac.compare_digest(credentials.strip().encode("utf-8", "replace"), token.encode("utf-8")):
        log.warning("refused a state change with a wrong token from %s", h.client_address[0])
        send_json(h, 401, {"error": "wrong token"},
              {"WWW-Authenticate": 'Bearer realm="tracewatch", error="invalid_token"'})
        return
    m = _ACTION.match(path)
    if m is None or m.group(2) not in ACTIONS:
        send_json(h, 404, {"error": f"no such action: {path}; use /api/incidents/ID/{{{','.join(ACTIONS)}}}"})
        return
    note = ""
    if raw.strip():
        try:
            body = orjson.loads(raw)
            note = str(body.get("note", "")) if isinstance(body, dict) else ""
        except orjson.JSONDecodeError:
            send_json(h, 400, {"error": 'the body must be JSON, e.g. {"note": "known deploy"}'})
            return
    try:
        out = inc.set_status(int(m.group(1)), m.group(2), by="api", note=note)
    except IncidentNotFound as exc:
        send_json(h, 404, {"error": str(exc)})
    except InvalidTransition as exc:
        send_json(h, 409, {"error": str(exc)})
    else:
        send_json(h, 200, {"incident": brief(out)})
