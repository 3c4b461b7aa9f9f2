"""Format ``jsonl``: one JSON object per line (structured application logs).

Dotted field paths pick the message, session key, time, level and, optionally, an event-type
field that is taken as the event directly (no template mining). Malformed JSON and objects
without the message field are rejected by reason; the latter are kept as whole-line records.
"""

from __future__ import annotations

import orjson

from ..config import SourceConfig
from ..records import Record, Rejection
from . import Output, parse_timestamp


def _getter(path: str | None):
    if path is None:
        return None
    parts = tuple(path.split("."))
    if len(parts) == 1:
        key = parts[0]
        return lambda obj: obj.get(key)

    def get(obj):
        for part in parts:
            if not isinstance(obj, dict):
                return None
            obj = obj.get(part)
        return obj

    return get


def _text(value) -> str | None:
    if value is None:
        return None
    if isinstance(value, str):
        return value
    if isinstance(value, (int, float, bool)):
        return str(value)
    return orjson.dumps(value).decode()


class JsonlFormat:
    def __init__(self, src: SourceConfig) -> None:
        self.source = src.name
        self._msg = _getter(src.message_field)
        self._key = _getter(src.session_key)
        self._ts = _getter(src.time_field)
        self._level = _getter(src.level_field)
        self._event = _getter(src.event_field)

    def feed(self, line: str, offset: int) -> Output:
        if not line.strip():
            return [Rejection("empty", line)]
        try:
            obj = orjson.loads(line)
        except orjson.JSONDecodeError:
            return [Rejection("bad_json", line)]
        if not isinstance(obj, dict):
            return [Rejection("not_an_object", line)]
        key = _text(self._key(obj)) if self._key else None
        ts_val = self._ts(obj) if self._ts else None
        if isinstance(ts_val, (int, float)) and not isinstance(ts_val, bool):
            ts = float(ts_val) / (1000.0 if ts_val > 1e11 else 1.0)
        else:
            ts = parse_timestamp(ts_val) if isinstance(ts_val, str) else None
        level = _text(self._level(obj)) if self._level else None
        event = _text(self._event(obj)) if self._event else None
        message = _text(self._msg(obj))
        if message is None and event is None:
            rec = Record(self.source, key, ts, level, line, line, offset)
            return [Rejection("no_message_field", line, rec)]
        return [Record(self.source, key, ts, level, message or event or "", line, offset, event)]

    def flush(self) -> Output:
        return []
