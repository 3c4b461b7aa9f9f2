"""The OTLP/HTTP receiver: an OpenTelemetry Collector or SDK sends spans and logs straight in.

Stage: a source (daemon): requests → one OTLP/JSON line each in the source's spool
(:mod:`tracewatch.sources.spool`) → the daemon's loop hands it to the pipeline, where the
``otlp-json`` format (spans, keyed by trace id) or ``otlp-logs-json`` (log records, keyed by
trace id or an attribute) reads it exactly as it reads files.

Protocol (opentelemetry-specification, specification/protocol/otlp.md, "OTLP/HTTP"):

- ``POST /v1/traces`` (``ExportTraceServiceRequest``) and ``POST /v1/logs``
  (``ExportLogsServiceRequest``), as ``Content-Type: application/x-protobuf`` (binary protobuf;
  needs the ``otlp`` extra, ``pip install 'tracewatch[otlp]'``: opentelemetry-proto) or
  ``application/json`` (the JSON protobuf encoding; no extra needed), optionally with
  ``Content-Encoding: gzip``. The answer is the signal's ``Export…ServiceResponse`` (empty: full
  success) in the request's encoding.
- Failures answer with a ``google.rpc.Status`` in the request's encoding: 400 for bad data
  (not retried by clients), 404 for a signal with no source, 411/413 for a body without a
  length or over ``max_request_bytes`` (as sent, and once decompressed) or, as the OTLP/JSON line
  spooled, over the source's ``max_document_bytes``, 415 for another
  encoding or content type — and protobuf without the extra.
- Throttling ("OTLP/HTTP Throttling"): while the spool holds ``max_queue_bytes`` not read yet,
  429 Too Many Requests; while the daemon starts or stops, 503 Service Unavailable; both with
  ``Retry-After`` (seconds), which clients honour before retrying (429, 502, 503 and 504 are the
  retryable codes).

A request is acknowledged (200) only once it is in the spool: kill -9 loses nothing that was
acknowledged (see :mod:`tracewatch.sources.spool` for a power loss). The receiver does not
authenticate: whatever reaches its port can add records (and so raise alerts or dilute
sessions) — it binds loopback by default.
"""

from __future__ import annotations

import logging
import threading
import zlib
from collections.abc import Callable
from http.server import BaseHTTPRequestHandler

import orjson

from ..config import OtlpConfig
from ..sources.spool import Spool
from .http import bind

log = logging.getLogger("tracewatch.otlp")

PROTOBUF = "application/x-protobuf"
JSON = "application/json"
# path -> (the top-level list of the signal's request, the protobuf message's module and name)
SIGNALS = {
    "/v1/traces": ("resourceSpans", "opentelemetry.proto.collector.trace.v1.trace_service_pb2",
                   "ExportTraceServiceRequest"),
    "/v1/logs": ("resourceLogs", "opentelemetry.proto.collector.logs.v1.logs_service_pb2",
                 "ExportLogsServiceRequest"),
}
# google.rpc.Code values for the Status message (google/rpc/code.proto)
INVALID_ARGUMENT, NOT_FOUND, RESOURCE_EXHAUSTED, UNIMPLEMENTED, UNAVAILABLE = 3, 5, 8, 12, 14
NO_PROTOBUF = ("protobuf requests need the otlp extra (pip install 'tracewatch[otlp]', which brings "
               "opentelemetry-proto); send application/json, or install it")


class RequestError(Exception):
    def __init__(self, status: int, code: int, message: str, retry_after: int | None = None) -> None:
        super().__init__(message)
        self.status, self.code, self.retry_after = status, code, retry_after


def status_protobuf(code: int, message: str) -> bytes:
    """A ``google.rpc.Status`` {code = 1 (int32), message = 2 (string)} in the protobuf wire format."""
    text = message.encode()
    return b"\x08" + _varint(code) + b"\x12" + _varint(len(text)) + text


def _varint(n: int) -> bytes:
    out = bytearray()
    while True:
        byte, n = n & 0x7F, n >> 7
        out.append(byte | (0x80 if n else 0))
        if not n:
            return bytes(out)


class _Decoder:
    """Request bodies as OTLP/JSON documents; protobuf through opentelemetry-proto, when installed."""

    def __init__(self) -> None:
        self._messages: dict[str, type] | None = None
        self._lock = threading.Lock()

    def protobuf(self, path: str, body: bytes) -> dict:
        messages = self._load()
        if messages is None:
            raise RequestError(415, UNIMPLEMENTED, NO_PROTOBUF)
        from google.protobuf.json_format import MessageToDict
        from google.protobuf.message import DecodeError

        try:
            msg = messages[path].FromString(body)
        except DecodeError as exc:
            raise RequestError(400, INVALID_ARGUMENT, f"not a valid {messages[path].__name__}: {exc}") from exc
        return MessageToDict(msg)

    def _load(self) -> dict[str, type] | None:
        with self._lock:
            if self._messages is None:
                import importlib

                try:
                    self._messages = {path: getattr(importlib.import_module(module), name)
                                      for path, (_, module, name) in SIGNALS.items()}
                except ImportError:
                    self._messages = {}
            return self._messages or None


class Receiver:
    """What the handler needs: where each signal goes, the limits, whether the daemon takes data."""

    def __init__(self, cfg: OtlpConfig, spools: dict[str, Spool], *, accepting: Callable[[], bool],
                 wake: Callable[[], None]) -> None:
        self.cfg = cfg
        self.spools = spools  # path ("/v1/traces") -> its source's spool
        self.accepting = accepting
        self.wake = wake
        self.decoder = _Decoder()
        self.warned_protobuf = False

    def take(self, path: str, content_type: str, encoding: str, body: bytes) -> None:
        """Decode, check and spool one request body (raises RequestError)."""
        spool = self.spools.get(path)
        if spool is None:
            raise RequestError(404, NOT_FOUND, f"{path}: no source receives this signal (see [otlp] in the config)")
        if not self.accepting():
            raise RequestError(503, UNAVAILABLE, "tracewatch is starting or stopping", self.cfg.retry_after_s)
        body = self._decompress(encoding, body)
        top = SIGNALS[path][0]
        if content_type == PROTOBUF:
            try:
                doc = self.decoder.protobuf(path, body)
            except RequestError as exc:
                if exc.status == 415 and not self.warned_protobuf:
                    self.warned_protobuf = True
                    log.error("OTLP/HTTP: refused a protobuf request: %s", NO_PROTOBUF)
                raise
        elif content_type == JSON:
            try:
                doc = orjson.loads(body)
            except orjson.JSONDecodeError as exc:
                raise RequestError(400, INVALID_ARGUMENT, f"not valid JSON: {exc}") from exc
            if not isinstance(doc, dict) or not isinstance(doc.get(top, []), list):
                raise RequestError(400, INVALID_ARGUMENT, f"not an OTLP/JSON request: {top} must be a list")
        else:
            raise RequestError(415, INVALID_ARGUMENT, f"Content-Type must be {PROTOBUF} or {JSON}")
        if not doc.get(top):
            return  # nothing in it (an empty export): acknowledged, nothing to spool
        line = orjson.dumps(doc)
        if len(line) > spool.max_line_bytes:  # refused, not cut where the spool is read
            raise RequestError(413, RESOURCE_EXHAUSTED, f"the request is {len(line)} bytes as OTLP/JSON, more than "
                               f"the source's max_document_bytes ({spool.max_line_bytes}); send smaller batches")
        outcome = spool.append(line)
        if outcome == "full":
            raise RequestError(429, RESOURCE_EXHAUSTED, "tracewatch is behind; retry later", self.cfg.retry_after_s)
        if outcome != "accepted":
            raise RequestError(503, UNAVAILABLE, "tracewatch is stopping", self.cfg.retry_after_s)
        self.wake()

    def _decompress(self, encoding: str, body: bytes) -> bytes:
        if encoding in ("", "identity"):
            return body
        if encoding != "gzip":
            raise RequestError(415, INVALID_ARGUMENT, f"Content-Encoding {encoding!r}: only gzip is read")
        limit = self.cfg.max_request_bytes
        inflate = zlib.decompressobj(16 + zlib.MAX_WBITS)  # gzip framing
        try:
            out = inflate.decompress(body, limit + 1)
        except zlib.error as exc:
            raise RequestError(400, INVALID_ARGUMENT, f"not valid gzip: {exc}") from exc
        if len(out) > limit or inflate.unconsumed_tail:
            raise RequestError(413, RESOURCE_EXHAUSTED, f"the request is larger than {limit} bytes once decompressed")
        return out


class _Handler(BaseHTTPRequestHandler):
    receiver: Receiver
    server_version = "tracewatch"
    protocol_version = "HTTP/1.1"

    def log_message(self, format: str, *args) -> None:  # noqa: A002 - the base class's name
        log.debug("%s %s", self.address_string(), format % args)

    def do_POST(self) -> None:  # noqa: N802 - the base class's name
        path = self.path.split("?", 1)[0]
        content_type = self.headers.get("Content-Type", "").split(";", 1)[0].strip().lower()
        as_protobuf = content_type == PROTOBUF
        try:
            body = self._body()
            self.receiver.take(path, content_type, self.headers.get("Content-Encoding", "").strip().lower(), body)
        except RequestError as exc:
            if exc.status in (411, 413):
                self.close_connection = True  # the body may be left unread
            self._answer(exc.status, status_protobuf(exc.code, str(exc)) if as_protobuf else
                         orjson.dumps({"code": exc.code, "message": str(exc)}), as_protobuf, exc.retry_after)
            return
        except (BrokenPipeError, ConnectionResetError):
            return
        except Exception:  # a bug must not kill the server thread; it is logged
            log.exception("error receiving OTLP on %s", path)
            self._answer(500, status_protobuf(13, "internal error") if as_protobuf else b'{"code": 13}', as_protobuf)
            return
        self._answer(200, b"" if as_protobuf else b"{}", as_protobuf)

    def do_GET(self) -> None:  # noqa: N802
        self.close_connection = True
        self._answer(405, b'{"message": "OTLP/HTTP takes POST"}', False)

    def _body(self) -> bytes:
        length = self.headers.get("Content-Length")
        if length is None or not length.isdigit():
            raise RequestError(411, INVALID_ARGUMENT, "a Content-Length is needed")
        size = int(length)
        limit = self.receiver.cfg.max_request_bytes
        if size > limit:
            raise RequestError(413, RESOURCE_EXHAUSTED, f"the request is larger than {limit} bytes")
        return self.rfile.read(size)

    def _answer(self, status: int, body: bytes, as_protobuf: bool, retry_after: int | None = None) -> None:
        try:
            self.send_response(status)
            self.send_header("Content-Type", PROTOBUF if as_protobuf else JSON)
            self.send_header("Content-Length", str(len(body)))
            if retry_after is not None:
                self.send_header("Retry-After", str(retry_after))
            self.end_headers()
            self.wfile.write(body)
        except (BrokenPipeError, ConnectionResetError):
            pass


def serve_otlp(receiver: Receiver):
    """Bind ``[otlp] listen`` and serve in a thread; returns (server, thread) for the caller to stop."""

    class Handler(_Handler):
        pass

    Handler.receiver = receiver
    return bind(receiver.cfg.listen, Handler, key="otlp.listen", name="tracewatch-otlp")
