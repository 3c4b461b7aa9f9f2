"""Format ``otlp-logs-json``: OpenTelemetry log records in the OTLP/JSON encoding.

Stage: sources → **formats** → templates. Each line is one ``LogsData`` /
``ExportLogsServiceRequest`` object (what file exporters write, and what the OTLP/HTTP
receiver spools for ``POST /v1/logs``: tracewatch/service/otlp_http.py). Every log record
becomes a record, in document order:

- session key: its trace id when it has a valid one (so a trace's logs form one session, as its
  spans do in ``otlp-json``), else the value of the ``log_key_attribute`` attribute of the
  record (or of its resource); else none (time windows);
- time: ``timeUnixNano``, else ``observedTimeUnixNano``; level: ``severityText``, else the
  short name of ``severityNumber``'s range (OpenTelemetry logs data model, "Field:
  SeverityNumber": 1–4 TRACE, 5–8 DEBUG, 9–12 INFO, 13–16 WARN, 17–20 ERROR, 21–24 FATAL);
- message (template-mined): the body's ``stringValue``; a body of another kind as its JSON;
  without a body, ``eventName``; with neither it is rejected as ``no_body`` and kept with an
  empty message.

OTLP/JSON rules followed (opentelemetry-proto docs/specification.md, "JSON Protobuf Encoding"):
lowerCamelCase keys, ids in hex (leniently base64, as the plain protobuf JSON mapping writes
them), 64-bit integers as decimal strings or numbers, enums as integers (leniently names).
A line that is not such a document is rejected (``bad_json``, ``not_an_object``, ``not_logs``,
``empty``); a log record that is not an object, as ``bad_log_record``.
"""

from __future__ import annotations

import base64
import binascii
import re

import orjson

from ..config import SourceConfig
from ..records import Record, Rejection
from . import JSON_OBJECT_REASONS, Format, Output, json_object

_HEX_ID = re.compile(r"[0-9a-fA-F]{32}")
# OpenTelemetry logs data model, SeverityNumber ranges and their short names
_SEVERITY_NAMES = ("TRACE", "DEBUG", "INFO", "WARN", "ERROR", "FATAL")
_SEVERITY_ENUM = {f"SEVERITY_NUMBER_{name}{n if n > 1 else ''}": 4 * i + n
                  for i, name in enumerate(_SEVERITY_NAMES) for n in range(1, 5)}


def trace_id(value) -> str | None:
    """Lower-case hex of a valid (16 bytes, not all zero) trace id, hex or base64, or None."""
    if not isinstance(value, str):
        return None
    if len(value) == 32 and _HEX_ID.fullmatch(value):
        tid = value.lower()
    elif len(value) == 24:
        try:
            tid = base64.b64decode(value, validate=True).hex()
        except (binascii.Error, ValueError):
            return None
    else:
        return None
    return tid if len(tid) == 32 and tid != "0" * 32 else None


def _nanos(value) -> int:
    if isinstance(value, int) and not isinstance(value, bool):
        return value
    if isinstance(value, str) and value.isdigit() and len(value) <= 20:
        return int(value)
    return 0


def any_value_text(value) -> str | None:
    """An OTLP ``AnyValue`` as text: a string as it is, a scalar as written, anything else as JSON."""
    if not isinstance(value, dict) or not value:
        return None
    if isinstance(value.get("stringValue"), str):
        return value["stringValue"]
    for kind in ("intValue", "doubleValue", "boolValue"):
        if kind in value:
            scalar = value[kind]
            return ("true" if scalar else "false") if isinstance(scalar, bool) else str(scalar)
    return orjson.dumps(value).decode()


def _attribute(attrs, key: str) -> str | None:
    if isinstance(attrs, list):
        for kv in attrs:
            if isinstance(kv, dict) and kv.get("key") == key:
                return any_value_text(kv.get("value"))
    return None


def _level(rec: dict) -> str | None:
    text = rec.get("severityText")
    if isinstance(text, str) and text:
        return text
    number = rec.get("severityNumber")
    if isinstance(number, str):
        number = _SEVERITY_ENUM.get(number, 0)
    if isinstance(number, int) and not isinstance(number, bool) and 1 <= number <= 24:
        return _SEVERITY_NAMES[(number - 1) // 4]
    return None


class OtlpLogsJsonFormat(Format):
    name = "otlp-logs-json"
    reasons = (*JSON_OBJECT_REASONS, "not_logs", "bad_log_record", "no_body")
    samples = [
        ({"log_key_attribute": "locker.id"}, [
            '{"resourceLogs": [{"resource": {"attributes": [{"key": "service.name", "value": {"stringValue": "api"}},'
            ' {"key": "locker.id", "value": {"stringValue": "LK-4"}}]}, "scopeLogs": [{"logRecords": ['
            '{"timeUnixNano": "1764496800000000000", "severityNumber": 9, "body": {"stringValue": "door 5 opened"},'
            ' "traceId": "5b8efff798038103d269b633813fc60c"},'
            ' {"observedTimeUnixNano": 1764496801000000000, "severityText": "WARN", "body": {"intValue": "7"}},'
            ' {"severityNumber": "SEVERITY_NUMBER_ERROR2", "traceId": "W47/95gDgQPSabYzgT/GDA==",'
            ' "body": {"kvlistValue": {"values": []}}, "attributes": [{"key": "locker.id", "value": {"intValue": 9}}]},'
            ' {"eventName": "door.jammed"}, {}, 3]}]}]}',
            '{"resourceSpans": []}', "[1]", "{cut", ""]),
    ]

    def __init__(self, src: SourceConfig) -> None:
        super().__init__(src)
        self.key_attribute = src.log_key_attribute

    def feed(self, line: str, offset: int) -> Output:
        doc = json_object(line)
        if type(doc) is Rejection:
            return [doc]
        resource_logs = doc.get("resourceLogs")
        if not isinstance(resource_logs, list):
            return [Rejection("not_logs", line)]
        out: Output = []
        for rl in resource_logs:
            if not isinstance(rl, dict):
                continue
            resource = rl.get("resource")
            resource_attrs = resource.get("attributes") if isinstance(resource, dict) else None
            scopes = rl.get("scopeLogs")
            for sl in scopes if isinstance(scopes, list) else ():
                records = sl.get("logRecords") if isinstance(sl, dict) else None
                for rec in records if isinstance(records, list) else ():
                    out.append(self._record(rec, resource_attrs, offset))
        return out

    def _record(self, rec, resource_attrs, offset: int) -> Record | Rejection:
        raw = orjson.dumps(rec).decode()
        if not isinstance(rec, dict):
            return Rejection("bad_log_record", raw)
        key = trace_id(rec.get("traceId"))
        if key is None and self.key_attribute is not None:
            key = _attribute(rec.get("attributes"), self.key_attribute)
            if key is None:
                key = _attribute(resource_attrs, self.key_attribute)
        nanos = _nanos(rec.get("timeUnixNano")) or _nanos(rec.get("observedTimeUnixNano"))
        message = any_value_text(rec.get("body"))
        if message is None and isinstance(rec.get("eventName"), str) and rec["eventName"]:
            message = rec["eventName"]
        record = Record(self.source, key, nanos / 1e9 if nanos else None, _level(rec), message or "", raw, offset)
        return record if message is not None else Rejection("no_body", raw, record)
