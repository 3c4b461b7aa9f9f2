"""Format ``jsonl``: one JSON object per line (structured application logs).

Dotted field paths pick the message, session key, time, level and, optionally, an event-type
field that is taken as the event directly (no template mining). Malformed JSON and objects
without the message field are rejected by reason; the latter are kept as whole-line records.
"""

from __future__ import annotations

from operator import itemgetter, methodcaller

import orjson

from ..config import SourceConfig
from ..records import Record, Rejection
from . import Output, parse_timestamp, timestamps


def _getter(path: str | None):
    if path is None:
        return None
    parts = tuple(path.split("."))
    if len(parts) == 1:
        return methodcaller("get", parts[0])  # C-level, usable in map()

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
        # top-level fields: the same lookup by itemgetter, for whole blocks (``_column``)
        self._items = {g: itemgetter(path) for g, path in ((self._msg, src.message_field),
                       (self._key, src.session_key), (self._ts, src.time_field))
                       if type(g) is methodcaller}

    def feed(self, line: str, offset: int) -> Output | Record:
        if not line.strip():
            return [Rejection("empty", line)]
        try:
            obj = orjson.loads(line)
        except orjson.JSONDecodeError:
            return [Rejection("bad_json", line)]
        if not isinstance(obj, dict):
            return [Rejection("not_an_object", line)]
        key = _text(self._key(obj)) if self._key else None
        ts = self._time(self._ts(obj)) if self._ts else None
        level = _text(self._level(obj)) if self._level else None
        event = _text(self._event(obj)) if self._event else None
        message = _text(self._msg(obj))
        if message is None and event is None:
            rec = Record(self.source, key, ts, level, line, line, offset)
            return [Rejection("no_message_field", line, rec)]
        return Record(self.source, key, ts, level, message or event or "", line, offset, event)

    def match_block(self, lines: list[str]) -> tuple[list, list, list] | None:
        """``(keys, timestamps, messages)`` of a block when every line is a JSON object with a
        text message (the common case), decoded and picked apart in C-level ``map``s; None
        when any line needs the per-line path (bad JSON, no message, an event field)."""
        if self._event is not None:
            return None
        try:
            objs = list(map(orjson.loads, lines))
        except orjson.JSONDecodeError:
            return None
        if set(map(type, objs)) != {dict}:
            return None
        messages = self._column(self._msg, objs)
        if set(map(type, messages)) != {str}:
            return None
        n = len(objs)
        keys = self._column(self._key, objs) if self._key else [None] * n
        if not set(map(type, keys)) <= {str, type(None)}:
            keys = [_text(k) for k in keys]
        stamps = self._column(self._ts, objs) if self._ts else [None] * n
        kinds = set(map(type, stamps))
        if kinds == {str}:
            stamps = timestamps(stamps)
        elif kinds != {type(None)}:
            stamps = [self._time(v) for v in stamps]
        return keys, stamps, messages

    def _column(self, getter, objs: list[dict]) -> list:
        """One field of every object: a top-level field by ``itemgetter`` (the quickest C-level
        lookup) while every object has it, else by the getter (missing → None)."""
        item = self._items.get(getter)
        if item is not None:
            try:
                return list(map(item, objs))
            except KeyError:
                pass
        return list(map(getter, objs))

    @staticmethod
    def _time(value) -> float | None:
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            return float(value) / (1000.0 if value > 1e11 else 1.0)
        return parse_timestamp(value) if isinstance(value, str) else None

    def flush(self) -> Output:
        return []
