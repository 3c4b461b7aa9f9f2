"""Formats: turn one decoded line into records.

Stage: sources → **formats** → templates. One module per input format; each exposes a
class with ``feed(line, offset)`` and ``flush()``, both returning a list of
:class:`~tracewatch.records.Record` and :class:`~tracewatch.records.Rejection` (``feed`` may
return one bare Record instead: the common one-line-one-record case, which saves a list per
line on the hot path; :func:`items` turns either into a sequence). A format never
raises for bad data: it rejects the line with a reason, keeping it as a whole-line record
when that still makes sense.
"""

from __future__ import annotations

import re
from operator import attrgetter, methodcaller
from datetime import datetime, timezone
from typing import Protocol

from ..config import SourceConfig
from ..records import Record, Rejection

Output = list  # list[Record | Rejection]; ``feed`` may also return one bare Record


def items(out: Record | Output) -> Output | tuple[Record]:
    """What ``feed`` returned, as a sequence: a bare Record (the one-line-one-record fast
    path) or a list of records and rejections."""
    return (out,) if type(out) is Record else out


class Format(Protocol):
    def feed(self, line: str, offset: int) -> Output | Record: ...

    def flush(self) -> Output: ...


_EPOCH = re.compile(r"^\d{9,10}(\.\d+)?$")
_EPOCH_MS = re.compile(r"^\d{12,13}$")


def _iso(text: str) -> float | None:
    try:
        dt = datetime.fromisoformat(text)
    except ValueError:
        if "," not in text:
            return None
        try:
            dt = datetime.fromisoformat(text.replace(",", ".", 1))
        except ValueError:
            return None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=timezone.utc)
    return dt.timestamp()


def parse_timestamp(text: str | None) -> float | None:
    """Seconds since the epoch from ISO 8601 / RFC 3339 (with ``,`` or ``.`` fractions, as
    Python's logging module writes them), or from a plain epoch number; None if unreadable.
    Times without a zone are taken as UTC."""
    if not text:
        return None
    if len(text) >= 10 and text[4] == "-" and text[7] == "-":  # the common case, no regex
        return _iso(text)
    text = text.strip()
    if _EPOCH.match(text):
        return float(text)
    if _EPOCH_MS.match(text):
        return int(text) / 1000.0
    return _iso(text)


def timestamps(texts) -> list[float | None]:
    """``parse_timestamp`` of many texts; when all are ISO 8601 of one kind (all with a zone or
    all without), in C-level ``map``s."""
    try:
        dts = list(map(datetime.fromisoformat, texts))
    except (ValueError, TypeError):
        return list(map(parse_timestamp, texts))
    zones = list(map(_tzinfo, dts))
    if None not in zones:
        return list(map(datetime.timestamp, dts))
    if zones.count(None) == len(zones):
        return list(map(datetime.timestamp, map(_as_utc, dts)))
    return list(map(parse_timestamp, texts))


_tzinfo = attrgetter("tzinfo")
_as_utc = methodcaller("replace", tzinfo=timezone.utc)


def feed_lines(fmt: Format, lines) -> Output:
    """Everything a format gives for ``lines`` (offsets 0, 1, ...), then what it held back: a
    whole input read at once, for tools and tests."""
    out: Output = []
    for offset, line in enumerate(lines):
        out += items(fmt.feed(line, offset))
    return out + fmt.flush()


def make_format(src: SourceConfig) -> Format:
    """The format object for one source (a fresh one per file being read)."""
    if src.format == "text":
        from .text import TextFormat

        return TextFormat(src)
    if src.format == "jsonl":
        from .jsonl import JsonlFormat

        return JsonlFormat(src)
    if src.format == "syslog":
        from .syslog import SyslogFormat

        return SyslogFormat(src)
    if src.format == "otlp-json":
        from .otlp import OtlpJsonFormat

        return OtlpJsonFormat(src)
    if src.format == "strace":
        from .strace import StraceFormat

        return StraceFormat(src)
    raise ValueError(f"unknown format {src.format!r}")  # unreachable: config validates it


__all__ = ["Format", "Output", "Record", "Rejection", "feed_lines", "items", "make_format", "parse_timestamp"]
