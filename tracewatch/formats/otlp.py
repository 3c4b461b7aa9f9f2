"""Format ``otlp-json``: OpenTelemetry trace exports in the OTLP/JSON encoding.

Stage: sources → **formats** → templates. Input is either one ``TracesData`` /
``ExportTraceServiceRequest`` object per line (what file exporters write) or a whole
document pretty-printed over many lines; both may be mixed in one file. Each span becomes a
record keyed by its trace id, with its start time as the record time and an event type such
as ``checkout-svc:SERVER:POST /reserve`` or ``...:ERROR`` (``span_event`` picks the parts), so
spans bypass template mining. The spans of one document are emitted sorted by
``startTimeUnixNano``; the sessionizer keeps arrival order, so a trace exported in several
documents is ordered document by document.

OTLP/JSON rules followed (opentelemetry-proto, docs/specification.md, "JSON Protobuf
Encoding"): lowerCamelCase keys; trace and span ids hex in either case; 64-bit integers as
decimal strings or numbers; enums as integers; unknown fields ignored. Leniently, ids in the
plain protobuf JSON mapping (base64) and enum names are read too.

A document spread over lines is held until its braces balance, at most ``max_document_bytes``
(the OTLP/HTTP recommended request limit, 20 MiB, by default). Line accounting: every line fed
ends up either in a document that parsed (counted in ``lines_in_documents``) or in exactly one
:class:`Rejection` (``bad_json``, ``not_an_object``, ``not_traces``, ``document_too_large``,
``truncated_document``, ``empty``); spans that cannot be used (no valid trace id, no name) are
rejected separately as ``bad_span``, one rejection per span.
"""

from __future__ import annotations

import base64
import binascii
import re

import orjson

from ..config import SourceConfig
from ..records import Record, Rejection
from . import Format, Output

# opentelemetry-proto, trace/v1/trace.proto: Span.SpanKind and Status.StatusCode
SPAN_KINDS = ("UNSPECIFIED", "INTERNAL", "SERVER", "CLIENT", "PRODUCER", "CONSUMER")
STATUS_ERROR = 2
UNKNOWN_SERVICE = "unknown_service"  # OpenTelemetry resource semantic conventions: service.name default
SPAN_REASON = "bad_span"

_HEX_ID = re.compile(r"[0-9a-fA-F]{32}")
_STRINGS = re.compile(r'"(?:[^"\\]|\\.)*"?')
_KIND_NAMES = {f"SPAN_KIND_{k}": i for i, k in enumerate(SPAN_KINDS)}
_STATUS_NAMES = {"STATUS_CODE_UNSET": 0, "STATUS_CODE_OK": 1, "STATUS_CODE_ERROR": STATUS_ERROR}


def _trace_id(value) -> str | None:
    """Lower-case hex of a valid (16-byte, not all zero) trace id, or None."""
    if not isinstance(value, str):
        return None
    if len(value) == 32 and _HEX_ID.fullmatch(value):
        tid = value.lower()
    elif len(value) == 24:  # the protobuf JSON mapping's base64, written by some exporters
        try:
            tid = base64.b64decode(value, validate=True).hex()
        except (binascii.Error, ValueError):
            return None
        if len(tid) != 32:
            return None
    else:
        return None
    return None if tid == "0" * 32 else tid


def _uint64(value) -> int | None:
    """A 64-bit integer written as a number or a decimal string."""
    if isinstance(value, bool):
        return None
    if isinstance(value, int):
        return value
    if isinstance(value, str) and value.isdigit() and len(value) <= 20:
        return int(value)
    return None


def _enum(value, names: dict[str, int]) -> int:
    if isinstance(value, int) and not isinstance(value, bool):
        return value
    if isinstance(value, str):
        return names.get(value, 0)
    return 0


def _service(resource) -> str:
    if isinstance(resource, dict):
        attrs = resource.get("attributes")
        if isinstance(attrs, list):
            for kv in attrs:
                if isinstance(kv, dict) and kv.get("key") == "service.name":
                    value = kv.get("value")
                    if isinstance(value, dict) and isinstance(value.get("stringValue"), str):
                        return value["stringValue"]
    return UNKNOWN_SERVICE


def _depth_change(line: str) -> int:
    """How much a line opens (+) or closes (-) JSON objects and arrays, strings ignored."""
    bare = _STRINGS.sub("", line) if '"' in line else line
    return bare.count("{") + bare.count("[") - bare.count("}") - bare.count("]")


class OtlpJsonFormat(Format):
    name = "otlp-json"
    samples = [
        ({}, ['{"resourceSpans": [{"resource": {"attributes": [{"key": "service.name", "value": {"stringValue": "api"}}]},'
              ' "scopeSpans": [{"spans": [{"traceId": "5b8efff798038103d269b633813fc60c", "spanId": "eee19b7ec3c1b174",'
              ' "name": "POST /pickups", "kind": 2, "startTimeUnixNano": "1764496800000000000",'
              ' "status": {"code": 2}}, {"traceId": "5B8EFFF798038103D269B633813FC60C", "name": "check code",'
              ' "kind": "SPAN_KIND_INTERNAL", "startTimeUnixNano": 1764496799000000000}, {"name": "no trace"}]}]}]}',
              "{", '  "resourceSpans": [', '    {"scopeSpans": [{"spans": [{"traceId": "W47/95gDgQPSabYzgT/GDA==",',
              '      "name": "GET /health"}]}]}', "  ]", "}", '{"resourceSpans": 3}', "[1]", "{cut"]),
        ({"span_event": ["name"], "max_document_bytes": 1024},
         ["{", '  "resourceSpans": [', '    {"scopeSpans": [{"spans": [{"traceId": "0af7651916cd43dd8448eb211c80319c",',
          '      "name": "POST /deposits"}]}]}', "  ]", "}", "{", '  "pad": "' + "p" * 1100 + '",', "}"]),
    ]

    def __init__(self, src: SourceConfig) -> None:
        super().__init__(src)
        self.parts = tuple(src.span_event)
        self.max_bytes = src.max_document_bytes
        self.lines_in_documents = 0  # lines that were part of a document that parsed
        self._reset()

    def _reset(self) -> None:
        self._held: list[str] | None = None  # lines of a document not yet complete
        self._held_bytes = 0
        self._depth = 0
        self._offset = -1
        self._indented = False  # the held document is pretty-printed with indentation
        self._discarding = False  # the held document outgrew the bound: reject its lines as they come

    # -- lines to documents ---------------------------------------------------------------------
    def feed(self, line: str, offset: int) -> Output:
        out: Output = []
        if self._held is not None:
            if not self._starts_document(line):
                return self._continue(line)
            out = self._give_up("truncated_document")  # a new document begins: the held one was cut
        stripped = line.strip()
        if not stripped:
            return out + [Rejection("empty", line)]
        if stripped[0] in "{[" and stripped[-1] in "}]":
            try:
                doc = orjson.loads(stripped)
            except orjson.JSONDecodeError:
                pass
            else:
                return out + self._document(doc, [line], offset)
        if stripped[0] in "{[" and _depth_change(stripped) > 0:
            self._held, self._offset = [], offset
            return out + self._continue(line)
        return out + [Rejection("bad_json", line)]

    def _starts_document(self, line: str) -> bool:
        """Whether a line met while a document is held begins a new one: in an indented document
        only the first line starts at column 0 with "{"; otherwise it must be a whole export."""
        if not line.startswith("{"):
            return False
        if self._indented:
            return True
        if '"resourceSpans"' not in line:
            return False
        try:
            return isinstance(orjson.loads(line), dict)
        except orjson.JSONDecodeError:
            return False

    def _continue(self, line: str) -> Output:
        held = self._held
        self._depth += _depth_change(line)
        if self._discarding:
            if self._depth <= 0:
                self._reset()
            return [Rejection("document_too_large", line)]
        held.append(line)
        if len(held) == 2:
            self._indented = line[:1].isspace()
        self._held_bytes += len(line.encode("utf-8", "replace")) + 1
        if self._held_bytes > self.max_bytes:
            out = [Rejection("document_too_large", x) for x in held]
            held.clear()
            self._discarding = True
            if self._depth <= 0:
                self._reset()
            return out
        if self._depth > 0:
            return []
        offset = self._offset
        self._reset()
        try:
            doc = orjson.loads("\n".join(held))
        except orjson.JSONDecodeError:
            return [Rejection("bad_json", x) for x in held]
        return self._document(doc, held, offset)

    def _give_up(self, reason: str) -> Output:
        held = self._held or []
        reason = "document_too_large" if self._discarding else reason
        self._reset()
        return [Rejection(reason, x) for x in held]

    @property
    def held_from(self) -> int | None:
        """Offset of the first line of a document not yet complete (a checkpoint resumes there)."""
        return self._offset if self._held is not None else None

    def flush(self) -> Output:
        return self._give_up("truncated_document")

    # -- documents to records -------------------------------------------------------------------
    def _document(self, doc, lines: list[str], offset: int) -> Output:
        if not isinstance(doc, dict):
            return [Rejection("not_an_object", x) for x in lines]
        resource_spans = doc.get("resourceSpans")
        if not isinstance(resource_spans, list):
            return [Rejection("not_traces", x) for x in lines]
        self.lines_in_documents += len(lines)
        spans: list[tuple[int, int, str, dict]] = []
        bad: Output = []
        for rs in resource_spans:
            if not isinstance(rs, dict):
                continue
            service = _service(rs.get("resource"))
            scopes = rs.get("scopeSpans")
            if scopes is None:
                scopes = rs.get("instrumentationLibrarySpans")  # OTLP before 0.15, still seen in old files
            for ss in scopes if isinstance(scopes, list) else ():
                found = ss.get("spans") if isinstance(ss, dict) else None
                for span in found if isinstance(found, list) else ():
                    if isinstance(span, dict):
                        start = _uint64(span.get("startTimeUnixNano")) or 0
                        spans.append((start, len(spans), service, span))
                    else:
                        bad.append(Rejection(SPAN_REASON, orjson.dumps(span).decode()))
        spans.sort(key=lambda s: (s[0], s[1]))
        out = bad
        for start, _, service, span in spans:
            out.append(self._record(span, service, start, offset))
        return out

    def _record(self, span: dict, service: str, start: int, offset: int) -> Record | Rejection:
        raw = orjson.dumps(span).decode()
        tid = _trace_id(span.get("traceId"))
        name = span.get("name")
        if tid is None or not isinstance(name, str) or not name:
            return Rejection(SPAN_REASON, raw)
        kind = _enum(span.get("kind"), _KIND_NAMES)
        status = span.get("status")
        code = _enum(status.get("code"), _STATUS_NAMES) if isinstance(status, dict) else 0
        error = code == STATUS_ERROR
        parts = []
        for part in self.parts:
            if part == "service":
                parts.append(service)
            elif part == "kind":
                parts.append(SPAN_KINDS[kind] if 0 <= kind < len(SPAN_KINDS) else f"KIND{kind}")
            elif part == "name":
                parts.append(name)
            elif error:
                parts.append("ERROR")
        ts = start / 1e9 if start else None
        return Record(self.source, tid, ts, "ERROR" if error else None, name, raw, offset, ":".join(parts))
