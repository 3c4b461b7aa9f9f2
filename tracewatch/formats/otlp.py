"""Format ``otlp-json``: OpenTelemetry trace exports in the OTLP/JSON encoding.

Stage: sources → **formats** → templates. Input is either one ``TracesData`` /
``ExportTraceServiceRequest`` object per line (what file exporters write) or a whole
document pretty-printed over many lines; both may be mixed in one file. Each span becomes a
record keyed by its trace id, with its start time as the record time and an event type such
as ``checkout-svc:SERVER:POST /reserve`` or ``...:ERROR`` (``span_event`` picks the parts), so
spans bypass template mining. The spans of one document are emitted sorted by
``startTimeUnixNano``, and a trace exported in several documents (or files) is put in start-time
order when its session closes (``by_time``), an idle timeout after its last span arrived.

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
from collections.abc import Sequence
from itertools import repeat
from operator import itemgetter, methodcaller, truediv

import orjson

from ..config import SourceConfig
from ..records import Columns, Rejection
from . import Format, Output, collect

# opentelemetry-proto, trace/v1/trace.proto: Span.SpanKind and Status.StatusCode
SPAN_KINDS = ("UNSPECIFIED", "INTERNAL", "SERVER", "CLIENT", "PRODUCER", "CONSUMER")
STATUS_ERROR = 2
UNKNOWN_SERVICE = "unknown_service"  # OpenTelemetry resource semantic conventions: service.name default
SPAN_REASON = "bad_span"

_HEX_ID = re.compile(r"[0-9a-fA-F]{32}")
_STRINGS = re.compile(r'"(?:[^"\\]|\\.)*"?')
_KIND_NAMES = {f"SPAN_KIND_{k}": i for i, k in enumerate(SPAN_KINDS)}
_KIND_TEXT = dict(enumerate(SPAN_KINDS))
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
    reasons = ("empty", "bad_json", "not_an_object", "not_traces", SPAN_REASON, "document_too_large",
               "truncated_document")
    by_time = True  # a trace's children are often exported before its root
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
        cols = self._spans(doc, lines, offset)
        return [*cols.rejected, *cols.records(self.source)]

    def _spans(self, doc, lines: list[str], offset: int) -> Columns:
        """The spans of one document as columns, sorted by start time (ties in document order),
        each field read for all spans at once in C-level ``map``s."""
        if not isinstance(doc, dict):
            return Columns.of([], [Rejection("not_an_object", x) for x in lines])
        resource_spans = doc.get("resourceSpans")
        if not isinstance(resource_spans, list):
            return Columns.of([], [Rejection("not_traces", x) for x in lines])
        self.lines_in_documents += len(lines)
        spans: list[dict] = []
        services: list[str] = []
        bad: list[Rejection] = []
        for rs in resource_spans:
            if not isinstance(rs, dict):
                continue
            service = _service(rs.get("resource"))
            scopes = rs.get("scopeSpans")
            if scopes is None:
                scopes = rs.get("instrumentationLibrarySpans")  # OTLP before 0.15, still seen in old files
            for ss in scopes if isinstance(scopes, list) else ():
                found = ss.get("spans") if isinstance(ss, dict) else None
                if not isinstance(found, list):
                    continue
                if set(map(type, found)) != {dict}:
                    bad += [Rejection(SPAN_REASON, orjson.dumps(x).decode()) for x in found if not isinstance(x, dict)]
                    found = [x for x in found if isinstance(x, dict)]
                spans += found
                services += [service] * len(found)
        starts = _uint64s(_column(spans, "startTimeUnixNano"))
        order = sorted(range(len(spans)), key=starts.__getitem__)  # stable: ties keep document order
        if len(order) > 1 and order != list(range(len(spans))):
            pick = itemgetter(*order)  # reordered in C
            spans, services, starts = (list(pick(col)) for col in (spans, services, starts))
        raws = list(map(bytes.decode, map(orjson.dumps, spans)))
        tids = _once_each(_trace_id, _column(spans, "traceId"))
        names = _column(spans, "name")
        if None in tids or set(map(type, names)) != {str} or "" in names:
            keep = [i for i, (tid, name) in enumerate(zip(tids, names)) if tid is not None and isinstance(name, str)
                    and name]
            bad += [Rejection(SPAN_REASON, raws[i]) for i in sorted(set(range(len(spans))) - set(keep))]
            spans, services, starts, raws, tids, names = ([col[i] for i in keep] for col in
                                                          (spans, services, starts, raws, tids, names))
        kinds = _enums(_column(spans, "kind"), _KIND_NAMES)
        statuses = _column(spans, "status")
        if not any(statuses):  # no status set (an unset one is left out or empty, as proto3 JSON does)
            codes = [0] * len(spans)
        elif set(map(type, statuses)) == {dict}:
            codes = _enums(_column(statuses, "code"), _STATUS_NAMES)
        else:
            codes = list(map(_status_code, statuses))
        errors = list(map(STATUS_ERROR.__eq__, codes))
        events = list(map(":".join, zip(*(self._part(p, services, kinds, names, errors) for p in self.parts
                                           if p != "status"))))
        if "status" in self.parts and True in errors:
            events = [self._event(p, e) for p, e in zip(events, errors)] if self.parts[-1] == "status" else \
                [":".join(x for x in parts if x is not None) for parts in
                 zip(*(self._part(p, services, kinds, names, errors) for p in self.parts))]
        n = len(spans)
        stamps = list(map(truediv, starts, repeat(1e9)))
        if 0 in starts:
            stamps = [t if t else None for t in stamps]
        return Columns(tids, stamps, list(map(_LEVEL.get, errors)), names, events, raws, [offset] * n, bad)

    @staticmethod
    def _part(part: str, services: list[str], kinds: list[int], names: list[str], errors: list[bool]) -> list:
        if part == "service":
            return services
        if part == "kind":
            texts = list(map(_KIND_TEXT.get, kinds))
            return texts if None not in texts else [t if t is not None else f"KIND{k}" for t, k in zip(texts, kinds)]
        if part == "name":
            return names
        return list(map(_ERROR_PART.get, errors))  # status: ":ERROR" on error spans only

    @staticmethod
    def _event(event: str, error: bool) -> str:
        return event + ":ERROR" if error else event

    def read_block(self, lines: Sequence[str], offsets: Sequence[int]) -> Columns:
        """Lines that are whole documents (what file exporters write) as columns document by
        document; a line of a document spread over lines goes through :meth:`feed`."""
        out = Columns.of([])
        for line, offset in zip(lines, offsets):
            doc = _NOT_WHOLE
            if self._held is None and line[:1] == "{" and line[-1:] == "}":
                try:
                    doc = orjson.loads(line)
                except orjson.JSONDecodeError:
                    pass
            out.extend(self._spans(doc, [line], offset) if doc is not _NOT_WHOLE else collect((self.feed(line, offset),)))
        return out


_NOT_WHOLE = object()
_LEVEL = {True: "ERROR", False: None}
_ERROR_PART = {True: "ERROR", False: None}


def _column(objects: list[dict], field: str) -> list:
    """``obj.get(field)`` of every object, in C: by ``itemgetter`` while every one has the field
    (the usual case, and about twice as quick), else by ``dict.get``."""
    try:
        return list(map(itemgetter(field), objects))
    except KeyError:
        return list(map(methodcaller("get", field), objects))


def _uint64s(values: list) -> list[int]:
    """``_uint64`` of many values (0 for none): decimal strings all at once when every value is one."""
    if values and set(map(type, values)) == {str} and "" not in values and max(map(len, values)) <= 20:
        joined = "".join(values)
        if joined.isascii() and joined.isdigit():
            return list(map(int, values))
    return [_uint64(v) or 0 for v in values]


def _enums(values: list, names: dict[str, int]) -> list[int]:
    """``_enum`` of many values; plain integers as they are."""
    kinds = set(map(type, values))
    if kinds == {int}:
        return values
    if kinds <= {int, type(None)}:  # a field spans may leave out (a status without a code): 0
        return [v or 0 for v in values]
    if kinds == {str}:  # the enum names: looked up in C
        return list(map(names.get, values, repeat(0)))
    return list(map(_enum, values, repeat(names)))


def _once_each(func, values: list) -> list:
    """``func`` of every value, computed once per distinct value (a trace's spans share its id)."""
    try:
        of = {v: func(v) for v in dict.fromkeys(values)}
    except TypeError:  # an unhashable value (a list where an id should be)
        return list(map(func, values))
    return list(map(of.__getitem__, values))


def _status_code(status) -> int:
    return _enum(status.get("code"), _STATUS_NAMES) if isinstance(status, dict) else 0
