"""Format ``text``: plain log lines read with a ``line_pattern`` regex.

Named groups: ``message`` (required), ``ts``, ``level`` and ``key`` (optional). Without a
pattern the whole line is the message. A line the pattern does not match is rejected with
reason ``no_match`` but still kept as a whole-line record. With ``continuation_pattern``,
lines matching it (stack traces, wrapped lines) are attached to the record before them.
"""

from __future__ import annotations

import re

from ..config import SourceConfig
from ..records import Record, Rejection
from . import Output, parse_timestamp


class TextFormat:
    def __init__(self, src: SourceConfig) -> None:
        self.source = src.name
        self._pattern = re.compile(src.line_pattern) if src.line_pattern else None
        groups = self._pattern.groupindex if self._pattern else {}
        self._has_ts = "ts" in groups
        self._has_level = "level" in groups
        self._has_key = "key" in groups
        self._key = re.compile(src.session_key) if src.session_key else None
        self._cont = re.compile(src.continuation_pattern) if src.continuation_pattern else None
        self._cont_max = src.continuation_max
        self._pending: Record | None = None
        self._pending_lines = 0

    def _key_of(self, line: str, groups: dict | None) -> str | None:
        if groups is not None and self._has_key and groups["key"] is not None:
            return groups["key"]
        if self._key is not None:
            m = self._key.search(line)
            if m is not None:
                return m.group("key")
        return None

    def feed(self, line: str, offset: int) -> Output:
        if self._cont is not None:
            return self._feed_multiline(line, offset)
        return self._parse(line, offset)

    def _parse(self, line: str, offset: int) -> Output:
        if not line.strip():
            return [Rejection("empty", line)]
        pattern = self._pattern
        if pattern is None:
            return [Record(self.source, self._key_of(line, None), None, None, line, line, offset)]
        m = pattern.match(line)
        if m is None:
            rec = Record(self.source, self._key_of(line, None), None, None, line, line, offset)
            return [Rejection("no_match", line, rec)]
        g = m.groupdict()
        ts = parse_timestamp(g["ts"]) if self._has_ts else None
        level = g["level"] if self._has_level else None
        return [Record(self.source, self._key_of(line, g), ts, level, g["message"] or "", line, offset)]

    def _feed_multiline(self, line: str, offset: int) -> Output:
        pending = self._pending
        # blank lines inside a record (chained tracebacks have them) belong to it too
        if pending is not None and self._cont.match(line):
            if self._pending_lines < self._cont_max:
                pending.raw += "\n" + line
                self._pending_lines += 1
                return []
            return [Rejection("continuation_cap", line)]
        out = self.flush()
        for item in self._parse(line, offset):
            rec = item if isinstance(item, Record) else item.record
            if rec is not None and isinstance(item, Record):
                self._pending, self._pending_lines = rec, 0
            else:
                out.append(item)
        return out

    def flush(self) -> Output:
        if self._pending is None:
            return []
        rec, self._pending = self._pending, None
        return [rec]
