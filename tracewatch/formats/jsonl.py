"""Format ``jsonl``: one JSON object per line (structured application logs).

Dotted field paths pick the message, session key, time, level and, optionally, an event-type
field that is taken as the event directly (no template mining). Malformed JSON and objects
without the message field are rejected by reason; the latter are kept as whole-line records.

Stage: sources → **formats** → templates. A block of lines whose objects all carry a text
message is decoded and picked apart column by column (:meth:`JsonlFormat.read_block`); any
other block goes through :meth:`JsonlFormat.feed` line by line.
"""

from __future__ import annotations

from collections.abc import Sequence
from operator import itemgetter, methodcaller

import orjson

from ..config import SourceConfig
from ..records import Columns, Record, Rejection
from ..timestamps import StampReader
from . import Format, Output, _list


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


class JsonlFormat(Format):
    name = "jsonl"
    reasons = ("empty", "bad_json", "not_an_object", "no_message_field")
    samples = [
        ({"session_key": "req"}, """\
{"time": "2026-11-30T10:00:00.250Z", "level": "INFO", "req": "a1", "message": "door 5 opened"}
{"time": 1764496800, "level": "WARN", "req": 7, "message": "door 5 slow"}
{"time": 1764496800123, "req": null, "message": "courier CR1 signed off"}""".splitlines()),
        ({"session_key": "ctx.req", "message_field": "msg", "event_field": "kind"}, """\
{"kind": "door.open", "ctx": {"req": "a"}}
{"msg": "fee 2.50 due", "ctx": {"req": "b"}, "kind": ""}
{"msg": "x", "ctx": [1]}
[1, 2]
{"other": true}""".splitlines()),
    ]

    def __init__(self, src: SourceConfig) -> None:
        super().__init__(src)
        self._msg = _getter(src.message_field)
        self._key = _getter(src.session_key)
        self._ts = _getter(src.time_field)
        self._stamps = StampReader(src.ts_format, self.now)  # the layout, chosen once per stream
        self._level = _getter(src.level_field)
        self._event = _getter(src.event_field)
        # top-level fields: the same lookup by itemgetter, for whole blocks (``_column``)
        self._items = {g: itemgetter(path) for g, path in ((self._msg, src.message_field),
                       (self._key, src.session_key), (self._ts, src.time_field),
                       (self._level, src.level_field), (self._event, src.event_field))
                       if type(g) is methodcaller}

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
        ts = self._time(self._ts(obj)) if self._ts else None
        level = _text(self._level(obj)) if self._level else None
        event = _text(self._event(obj)) if self._event else None
        message = _text(self._msg(obj))
        if message is None and event is None:
            rec = Record(self.source, key, ts, level, line, line, offset)
            return [Rejection("no_message_field", line, rec)]
        return [Record(self.source, key, ts, level, message or event or "", line, offset, event)]

    def read_block(self, lines: Sequence[str], offsets: Sequence[int]) -> Columns:
        """The block decoded and picked apart in C-level ``map``s when every line is a JSON
        object with a text message (and, with an event field, a non-empty one): the common
        case; any other block line by line."""
        try:
            objs = list(map(orjson.loads, lines))
        except orjson.JSONDecodeError:
            return super().read_block(lines, offsets)
        if set(map(type, objs)) != {dict}:
            return super().read_block(lines, offsets)
        messages = self._column(self._msg, objs)
        if set(map(type, messages)) != {str} or (self._event is not None and "" in messages):
            return super().read_block(lines, offsets)
        n = len(objs)
        stamps = self._column(self._ts, objs) if self._ts else [None] * n
        kinds = set(map(type, stamps))
        if kinds == {str}:
            stamps = self._stamps.many(stamps)
        elif kinds != {type(None)}:
            stamps = list(map(self._time, stamps))
        return Columns(self._texts(self._key, objs), stamps, self._texts(self._level, objs), messages,
                       self._texts(self._event, objs), _list(lines), _list(offsets))

    def _texts(self, getter, objs: list[dict]) -> list[str | None]:
        """``_text`` of one field of every object (None for all without the getter)."""
        if getter is None:
            return [None] * len(objs)
        values = self._column(getter, objs)
        return values if set(map(type, values)) <= {str, type(None)} else list(map(_text, values))

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

    def _time(self, value) -> float | None:
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            return float(value) / (1000.0 if value > 1e11 else 1.0)
        return self._stamps.one(value) if isinstance(value, str) else None
