"""Format ``text``: plain log lines read with a ``line_pattern`` regex.

Stage: sources → **formats** → templates. Named groups: ``message`` (required), ``ts``,
``level`` and ``key`` (optional; a group that takes no part in the match counts as absent, an
absent message as ``""``). Without a pattern the whole line is the message. A separate
``session_key`` regex (group ``key``) is searched in the line when the pattern gives no key. A
line the pattern does not match is rejected with reason ``no_match`` but still kept as a
whole-line record. With ``continuation_pattern``, lines matching it (stack traces, wrapped lines)
are attached to the record before them.

Blocks of lines are read column by column in C-level ``map``s (:meth:`TextFormat.read_block`);
lines the pattern does not match, and every line of a source with continuation lines, go
through :meth:`TextFormat.feed`.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from itertools import repeat

from ..config import SourceConfig
from ..records import Columns, Record, Rejection
from ..timestamps import StampReader
from . import Format, Output, _list

_group = re.Match.group


class TextFormat(Format):
    name = "text"
    reasons = ("empty", "no_match", "continuation_cap")
    samples = [
        ({"line_pattern": r"^(?P<ts>\S+) (?P<level>[A-Z]+) \[(?P<svc>[^\]]+)\] req=(?P<key>\S+) (?P<message>.*)$"},
         ["2026-11-30T00:00:00.931Z INFO [locker-api] req=c7f911dcb46060ee pickup code checked for parcel PX9 at LK-4",
          "2026-11-30T00:00:01.002Z WARN [locker-api] req=c7f911dcb46060ee door 12 slow to close (850 ms)"]),
        ({"line_pattern": r"^(?P<ts>\S+) (?P<level>[A-Z]+) (?P<message>.*)$", "session_key": r"req=(?P<key>[0-9a-f]+)"},
         ["2026-11-30T10:00:00,250 INFO req=ab12 door 5 opened", "2026-11-30T10:00:01,250 ERROR no request here"]),
        ({"line_pattern": r"^(?P<ts>\S+) (?P<level>[A-Z]+)(?: req=(?P<key>\w+))?(?: (?P<message>.*))?$",
          "session_key": r"id=(?P<key>\w+)"},
         ["1764496800 INFO req=a7 compartment reserved", "1764496800123 DEBUG", "x INFO id=q1 late"]),
        ({}, ["courier CR12 signed off", "  "]),
        ({"line_pattern": r"^(?P<level>[A-Z]+) (?P<message>.*)$", "continuation_pattern": r"^\s"},
         ["ERROR payment failed", "  at gateway.charge", "INFO retry ok"]),
    ]

    def __init__(self, src: SourceConfig) -> None:
        super().__init__(src)
        self._pattern = re.compile(src.line_pattern) if src.line_pattern else None
        groups = self._pattern.groupindex if self._pattern else {}
        # group numbers (0 = the pattern has no such group)
        self._gi = tuple(groups.get(name, 0) for name in ("message", "ts", "level", "key"))
        self._key = re.compile(src.session_key) if src.session_key else None
        self._key_group = self._key.groupindex["key"] if self._key is not None else 0
        self._cont = re.compile(src.continuation_pattern) if src.continuation_pattern else None
        self._cont_max = src.continuation_max
        self._stamps = StampReader(src.ts_format, self.now)  # the layout, chosen once per stream
        self._pending: Record | None = None
        self._pending_lines = 0

    # -- one line -----------------------------------------------------------------------------
    def _key_of(self, line: str) -> str | None:
        """The session key found by the ``session_key`` regex, if any."""
        if self._key is not None:
            m = self._key.search(line)
            if m is not None:
                return m.group(self._key_group)
        return None

    def _parse(self, line: str, offset: int) -> Record | Rejection:
        """One line as a record (or a rejection), continuation lines aside."""
        m = self._pattern.match(line) if self._pattern is not None else None
        if m is None:
            if not line.strip():
                return Rejection("empty", line)
            rec = Record(self.source, self._key_of(line), None, None, line, line, offset)
            return rec if self._pattern is None else Rejection("no_match", line, rec)
        gm, gts, glevel, gkey = self._gi
        key = m.group(gkey) if gkey else None
        if key is None:
            key = self._key_of(line)
        return Record(self.source, key, self._stamps.one(m.group(gts)) if gts else None,
                      m.group(glevel) if glevel else None, m.group(gm) or "", line, offset)

    def feed(self, line: str, offset: int) -> Output:
        if self._cont is None:
            return [self._parse(line, offset)]
        pending = self._pending
        # blank lines inside a record (chained tracebacks have them) belong to it too
        if pending is not None and self._cont.match(line):
            if self._pending_lines < self._cont_max:
                pending.raw += "\n" + line
                self._pending_lines += 1
                return []
            return [Rejection("continuation_cap", line)]
        out = self.flush()
        item = self._parse(line, offset)
        if type(item) is Record:  # held for its continuation lines
            self._pending, self._pending_lines = item, 0
        else:
            out.append(item)
        return out

    @property
    def held_from(self) -> int | None:
        return self._pending.offset if self._pending is not None else None

    def flush(self) -> Output:
        if self._pending is None:
            return []
        rec, self._pending = self._pending, None
        return [rec]

    # -- a block of lines ---------------------------------------------------------------------
    def read_block(self, lines: Sequence[str], offsets: Sequence[int]) -> Columns:
        if self._cont is not None:  # records span lines: one line after another
            return super().read_block(lines, offsets)
        if self._pattern is None:
            matches = list(map(str.strip, lines))  # a blank line is the one kind rejected
            if "" not in matches:
                return self._whole_lines(lines, offsets)
        else:
            matches = list(map(self._pattern.match, lines))
            if None not in matches:
                return self._matched(lines, offsets, matches)
        return self._mixed(lines, offsets, matches)

    def _mixed(self, lines: Sequence[str], offsets: Sequence[int], matches: list) -> Columns:
        """A block with lines the pattern does not match (blank ones, without a pattern): runs
        of matching lines by columns, the others one by one."""
        out = Columns.of([])
        n, lo = len(lines), 0
        bad = [i for i, m in enumerate(matches) if not m] + [n]
        for hi in bad:
            if hi > lo:
                part = slice(lo, hi)
                out.extend(self._matched(lines[part], offsets[part], matches[part]) if self._pattern is not None
                           else self._whole_lines(lines[part], offsets[part]))
            if hi < n:
                out.extend(super().read_block(lines[hi:hi + 1], offsets[hi:hi + 1]))
            lo = hi + 1
        return out

    def _keys(self, lines: Sequence[str], keys: list | None) -> list:
        """Keys of a block: those the pattern found, the ``session_key`` regex's elsewhere."""
        if keys is None:
            keys = [None] * len(lines)
        if self._key is None or None not in keys:
            return keys
        if keys.count(None) == len(keys):
            found = list(map(self._key.search, lines))
            if None not in found:
                return list(map(_group, found, repeat(self._key_group)))
            return [m.group(self._key_group) if m is not None else None for m in found]
        return [k if k is not None else self._key_of(line) for k, line in zip(keys, lines)]

    def _whole_lines(self, lines: Sequence[str], offsets: Sequence[int]) -> Columns:
        """Lines that are whole messages (no pattern), none of them blank."""
        n = len(lines)
        lines = _list(lines)
        return Columns(self._keys(lines, None), [None] * n, [None] * n, lines, [None] * n, lines, _list(offsets))

    def _matched(self, lines: Sequence[str], offsets: Sequence[int], matches: list) -> Columns:
        """Lines that all match the pattern, one group at a time over the block (far quicker
        than a tuple of groups per line)."""
        gm, gts, glevel, gkey = self._gi
        n = len(lines)
        messages = list(map(_group, matches, repeat(gm)))
        if None in messages:  # an optional message group that took no part: ""
            messages = [m or "" for m in messages]
        keys = self._keys(lines, list(map(_group, matches, repeat(gkey))) if gkey else None)
        stamps = self._stamps.many(list(map(_group, matches, repeat(gts)))) if gts else [None] * n
        levels = list(map(_group, matches, repeat(glevel))) if glevel else [None] * n
        return Columns(keys, stamps, levels, messages, [None] * n, _list(lines), _list(offsets))
