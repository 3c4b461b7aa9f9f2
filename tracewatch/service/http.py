"""HTTP: exposes the daemon's metrics, health and status (standard library server).

Stage: reads from the daemon (a :class:`StatusProvider`) and a Prometheus registry; hands
nothing on. Endpoints, all GET:

    /metrics            Prometheus text exposition (OpenMetrics when asked for)
    /healthz            200 while the process runs
    /readyz             200 when a baseline is loaded and every source is attached, else 503
                        with the reason
    /api/status         sources, files, offsets, lag, open sessions, baseline version (JSON)
    /api/alerts?since=N&limit=M
                        alerts numbered after N, oldest first (JSON); pass the ``next`` of one
                        answer as ``since`` of the next

    /, /incidents/{id}, /api/incidents[/{id}]   the incident page and API, and
    POST /api/incidents/{id}/ack|resolve|expected (bearer token): see incidents_api.py

Only those POSTs change state. The server binds loopback by default; the answers carry
log-derived data.
"""

from __future__ import annotations

import errno
import logging
import socket
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Protocol
from urllib.parse import parse_qs, urlsplit

from prometheus_client import CollectorRegistry
from prometheus_client.exposition import choose_encoder

from ..errors import ConfigError
from .incidents_api import route as route_incidents, send, send_json

log = logging.getLogger("tracewatch.http")

MAX_ALERTS_PER_ANSWER = 1000


class StatusProvider(Protocol):
    def ready(self) -> tuple[bool, str]: ...

    def status(self) -> dict: ...

    def alerts_since(self, since: int, limit: int) -> dict: ...


def split_listen(listen: str) -> tuple[str, int]:
    host, _, port = listen.rpartition(":")
    return host.strip("[]"), int(port)


def serve(listen: str, provider: StatusProvider, registry: CollectorRegistry
          ) -> tuple[ThreadingHTTPServer, threading.Thread]:
    """Bind ``listen`` (HOST:PORT) and serve in a thread; the caller shuts both down."""

    class Handler(_Handler):
        pass

    Handler.provider, Handler.registry = provider, registry
    return bind(listen, Handler)


def bind(listen: str, handler: type[BaseHTTPRequestHandler], *, key: str = "server.listen",
         name: str = "tracewatch-http") -> tuple[ThreadingHTTPServer, threading.Thread]:
    """A threading server for ``handler`` on ``listen``, serving in a thread of its own; a port
    that cannot be bound is a ConfigError naming ``key``."""
    host, port = split_listen(listen)

    class Server(ThreadingHTTPServer):
        daemon_threads = True
        address_family = socket.AF_INET6 if ":" in host else socket.AF_INET

    try:
        server = Server((host, port), handler)
    except OSError as exc:
        if exc.errno == errno.EADDRINUSE:
            raise ConfigError(f"{key}: {listen} is already in use (another tracewatch, or another "
                              f"program); stop it or choose another port in [{key.replace('.', '] ', 1)}") from exc
        raise ConfigError(f"{key}: cannot listen on {listen}: {exc.strerror or exc}") from exc
    thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.2}, name=name, daemon=True)
    thread.start()
    return server, thread


class _Handler(BaseHTTPRequestHandler):
    provider: StatusProvider
    registry: CollectorRegistry
    server_version = "tracewatch"
    protocol_version = "HTTP/1.1"

    def log_message(self, format: str, *args) -> None:  # noqa: A002 - the base class's name
        log.debug("%s %s", self.address_string(), format % args)

    def _text(self, code: int, text: str) -> None:
        send(self, code, text.encode() + b"\n", "text/plain; charset=utf-8")

    def _json(self, code: int, obj) -> None:
        send_json(self, code, obj)

    def do_GET(self) -> None:  # noqa: N802 - the base class's name
        url = urlsplit(self.path)
        try:
            if url.path == "/metrics":
                encoder, content_type = choose_encoder(self.headers.get("Accept", ""))
                send(self, 200, encoder(self.registry), content_type)
            elif url.path == "/healthz":
                self._text(200, "ok")
            elif url.path == "/readyz":
                ok, why = self.provider.ready()
                self._text(200 if ok else 503, "ready" if ok else f"not ready: {why}")
            elif url.path == "/api/status":
                self._json(200, self.provider.status())
            elif url.path == "/api/alerts":
                self._alerts(parse_qs(url.query))
            elif route_incidents(self, getattr(self.provider, "incidents", None)):  # the incident page and API
                pass
            else:
                self._json(404, {"error": f"no such endpoint: {url.path}"})
        except (BrokenPipeError, ConnectionResetError):
            pass
        except Exception:  # a bug must not kill the server thread; it is logged
            log.exception("error answering %s", url.path)
            self._json(500, {"error": "internal error; see the daemon's log"})

    def do_POST(self) -> None:  # noqa: N802 - incident status changes (tracewatch/service/incidents_api.py)
        try:
            if not route_incidents(self, getattr(self.provider, "incidents", None)):
                self.close_connection = True
                self._json(404, {"error": f"no such endpoint: {urlsplit(self.path).path}"})
        except (BrokenPipeError, ConnectionResetError):
            pass
        except Exception:
            log.exception("error answering POST %s", self.path)
            self._json(500, {"error": "internal error; see the daemon's log"})

    def _alerts(self, query: dict[str, list[str]]) -> None:
        try:
            since = int(query.get("since", ["0"])[0])
            limit = int(query.get("limit", ["100"])[0])
        except ValueError:
            self._json(400, {"error": "since and limit must be integers"})
            return
        if since < 0 or not 1 <= limit <= MAX_ALERTS_PER_ANSWER:
            self._json(400, {"error": f"since must be >= 0 and limit between 1 and {MAX_ALERTS_PER_ANSWER}"})
            return
        self._json(200, self.provider.alerts_since(since, limit))
