"""Format ``text``: plain log lines read with a ``line_pattern`` regex.

Named groups: ``message`` (required), ``ts``, ``level`` and ``key`` (optional). Without a
pattern the whole line is the message. A line the pattern does not match is rejected with
reason ``no_match`` but still kept as a whole-line record. With ``continuation_pattern``,
lines matching it (stack traces, wrapped lines) are attached to the record before them.
"""

from __future__ import annotations

import re
from itertools import repeat

from ..config import SourceConfig
from ..records import Record, Rejection
from . import Output, items, parse_timestamp, timestamps


class TextFormat:
    def __init__(self, src: SourceConfig) -> None:
        self.source = src.name
        self._pattern = re.compile(src.line_pattern) if src.line_pattern else None
        groups = self._pattern.groupindex if self._pattern else {}
        # group numbers (0 = absent, which m.group(0) would not be read for)
        self._gi = tuple(groups.get(name, 0) for name in ("message", "ts", "level", "key"))
        self._key = re.compile(src.session_key) if src.session_key else None
        self._cont = re.compile(src.continuation_pattern) if src.continuation_pattern else None
        self._cont_max = src.continuation_max
        self._pending: Record | None = None
        self._pending_lines = 0
        # feed(line, offset) -> Output: the per-line entry point, chosen once per instance
        self.feed = self._feed_multiline if self._cont is not None else self._parse

    def _key_of(self, line: str) -> str | None:
        """The session key found by the ``session_key`` regex, if any."""
        if self._key is not None:
            m = self._key.search(line)
            if m is not None:
                return m.group("key")
        return None

    def _parse(self, line: str, offset: int) -> Output | Record:
        pattern = self._pattern
        m = pattern.match(line) if pattern is not None else None
        if m is None:
            if not line.strip():
                return [Rejection("empty", line)]
            rec = Record(self.source, self._key_of(line), None, None, line, line, offset)
            return rec if pattern is None else [Rejection("no_match", line, rec)]
        # one call for all four groups; an absent group's index is 0 (the whole match), never used
        message, ts, level, key = m.group(*self._gi)
        _, gts, glevel, gkey = self._gi
        if not gkey:
            key = None
        if key is None and self._key is not None:
            key = self._key_of(line)
        return Record(self.source, key, parse_timestamp(ts) if gts else None,
                      level if glevel else None, message or "", line, offset)

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
        for item in items(self._parse(line, offset)):
            if type(item) is Record:  # held for its continuation lines
                self._pending, self._pending_lines = item, 0
            else:
                out.append(item)
        return out

    def match_block(self, lines: list[str]) -> tuple[list, list, list] | None:
        """``(keys, timestamps, messages)`` of a block of lines when every line is a plain match
        (the common case), computed with C-level ``map``s; None when any line needs the
        per-line path (no pattern, continuation lines, a line that does not match)."""
        if self._pattern is None or self._cont is not None:
            return None
        matches = list(map(self._pattern.match, lines))
        if None in matches or not matches:
            return None
        gm, gts, glevel, gkey = self._gi
        group = type(matches[0]).group  # one column at a time: far quicker than zip(*rows)
        keys = list(map(group, matches, repeat(gkey))) if gkey else [None] * len(lines)
        if self._key is not None and None in keys:
            keys = [k if k is not None else self._key_of(line) for k, line in zip(keys, lines)]
        stamps = timestamps(list(map(group, matches, repeat(gts)))) if gts else [None] * len(lines)
        return keys, stamps, list(map(group, matches, repeat(gm)))

    @property
    def held_from(self) -> int | None:
        """Offset of the record still waiting for continuation lines (a checkpoint resumes there)."""
        return self._pending.offset if self._pending is not None else None

    def flush(self) -> Output:
        if self._pending is None:
            return []
        rec, self._pending = self._pending, None
        return [rec]
