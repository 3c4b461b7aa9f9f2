"""The unit that formats hand on to the rest of the pipeline: one parsed record.

Stage: formats → **records** → templates. A record is a line (or a JSON document, a span,
a syscall) reduced to what the later stages need; formats hand records on as :class:`Columns`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from itertools import repeat
from operator import attrgetter


@dataclass(slots=True)
class Record:
    """One parsed input record.

    ``message`` is mined into a template unless ``event`` is set, in which case ``event``
    is the event type itself (span names, syscall names) and template mining is bypassed.
    """

    source: str
    key: str | None  # session key; None for keyless sources (time windows)
    ts: float | None  # seconds since the epoch, if the record carries a time
    level: str | None
    message: str
    raw: str
    offset: int = -1  # byte offset of the line in its file, -1 when unknown
    event: str | None = None


@dataclass(slots=True)
class Rejection:
    """A line a format could not read as intended; counted by ``reason``.

    When ``record`` is set the line was still kept (for example as a whole-line message),
    so nothing is lost; when it is None the line carried nothing usable (a blank line).
    """

    reason: str
    raw: str
    record: Record | None = None


_FIELDS = ("key", "ts", "level", "message", "event", "raw", "offset")
_RECORD = Record.__slots__  # its fields in the order Record() takes them


@dataclass(slots=True)
class Columns:
    """Many records as columns, in input order, with the rejections met on the way beside them:
    what a format hands on for a block of lines (``Format.read_block``). Row ``i`` of the
    columns is one record; a rejection that kept its line as a record has that record among
    the rows too."""

    keys: list[str | None]
    times: list[float | None]
    levels: list[str | None]
    messages: list[str]
    events: list[str | None]  # an event type given by the record (no template mining), or None
    raws: list[str]
    offsets: list[int]
    rejected: list[Rejection] = field(default_factory=list)

    def __len__(self) -> int:
        return len(self.offsets)

    @classmethod
    def of(cls, records: list[Record], rejected: list[Rejection] | None = None) -> "Columns":
        """Records as columns."""
        return cls(*(list(map(attrgetter(name), records)) for name in _FIELDS), rejected or [])

    def records(self, source: str) -> list[Record]:
        """The rows as records again (tools and tests)."""
        return list(map(Record, repeat(source), self.keys, self.times, self.levels, self.messages, self.raws,
                        self.offsets, self.events))

    def plain(self) -> list:
        """The columns as plain lists, JSON-ready (what crosses the pipe of sources/ahead.py)."""
        return [self.keys, self.times, self.levels, self.messages, self.events, self.raws, self.offsets,
                [[r.reason, r.raw, None if r.record is None else list(map(getattr, repeat(r.record), _RECORD))]
                 for r in self.rejected]]

    @classmethod
    def from_plain(cls, data: list) -> "Columns":
        """:meth:`plain` read back."""
        *columns, rejected = data
        return cls(*columns, [Rejection(reason, raw, None if rec is None else Record(*rec))
                              for reason, raw, rec in rejected])

    def extend(self, other: "Columns") -> None:
        """Append another block's rows and rejections."""
        for name in self.__slots__:
            getattr(self, name).extend(getattr(other, name))
