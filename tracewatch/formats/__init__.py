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

import functools
import re
from operator import attrgetter, methodcaller
from datetime import datetime, timezone
from typing import Protocol

import numpy as np

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


def _iso_layout(text: str) -> tuple[list[int], int, int, str] | None:
    """Where the digits of ``YYYY-MM-DD[T ]HH:MM:SS[.f…][Z|±HH:MM]`` are in ``text``: digit
    positions, fraction digits, zone sign (+1, -1, 0 for none or Z) and the text with every
    digit as 0 (the layout every text of a block must share); None for any other form."""
    n = len(text)
    if n < 19 or not text.isascii():
        return None
    digits = [0, 1, 2, 3, 5, 6, 8, 9, 11, 12, 14, 15, 17, 18]
    end = 19
    if n > 20 and text[19] in ".,":
        end = 20
        while end < n and text[end].isdigit():
            end += 1
        digits += range(20, end)
    frac = end - 20 if end > 19 else 0
    zone, sign = text[end:], 0
    if len(zone) == 6 and zone[0] in "+-" and zone[3] == ":":
        digits += [end + 1, end + 2, end + 4, end + 5]
        sign = 1 if zone[0] == "+" else -1
    elif zone not in ("", "Z"):
        return None
    shape = text.translate(_ZEROS)
    want = "0000-00-00" + text[10] + "00:00:00"
    if not shape.startswith(want) or text[10] not in "T " or (end > 19 and not 0 < frac <= 6):
        return None
    return digits, frac, sign, shape


_ZEROS = str.maketrans("123456789", "000000000")


@functools.lru_cache(maxsize=64)
def _place_values(frac: int, sign: int) -> np.ndarray:
    """digits × fields matrix: a layout's digits (year 4, month, day, hour, minute, second 2 each,
    ``frac`` fraction digits, zone hours and minutes when ``sign``) times it give the fields."""
    sizes = [4, 2, 2, 2, 2, 2, frac] + ([2, 2] if sign else [])
    place = np.zeros((sum(sizes), len(sizes)))
    at = 0
    for j, size in enumerate(sizes):
        place[at:at + size, j] = 10.0 ** np.arange(size - 1, -1, -1)
        at += size
    return place


def _iso_block(texts: list) -> list[float] | None:
    """Seconds since the epoch of many ISO 8601 texts of one layout (a log's usual case),
    computed with numpy over the whole block: equal to ``_iso`` of each (times without a zone
    are UTC). None when the texts differ in layout, carry more than six fraction digits or hold
    an impossible date or time: those take the general path."""
    if not texts or type(texts[0]) is not str:
        return None
    layout = _iso_layout(texts[0])
    if layout is None:
        return None
    digits, frac, sign, shape = layout
    width, n = len(shape), len(texts)
    try:
        joined = "".join(texts)
    except TypeError:
        return None
    if len(joined) != width * n or not joined.isascii():
        return None
    raw = np.frombuffer(joined.encode("ascii"), dtype=np.uint8).reshape(n, width)
    fixed = np.ones(width, dtype=bool)
    fixed[digits] = False
    if not (raw[:, fixed] == raw[0, fixed]).all():
        return None
    d = raw[:, digits] - 48  # uint8: a non-digit wraps above 9
    if (d > 9).any():
        return None
    fields = (d @ _place_values(frac, sign)).astype(np.int64)  # exact: every field is below 10**6
    year, month, day, hour, minute, second, fraction = fields.T[:7]
    if ((month < 1) | (month > 12) | (day < 1) | (hour > 23) | (minute > 59) | (second > 59) | (year < 1)).any():
        return None
    months = (year - 1970) * 12 + (month - 1)
    days = months.astype("datetime64[M]").astype("datetime64[D]") + (day - 1)
    if (days.astype("datetime64[M]").astype(np.int64) != months).any():  # 31 February and the like
        return None
    seconds = days.astype(np.int64) * 86400 + hour * 3600 + minute * 60 + second
    if sign:
        zh, zm = fields[:, 7], fields[:, 8]
        if ((zh > 23) | (zm > 59)).any():
            return None
        seconds -= sign * (zh * 3600 + zm * 60)
    micros = seconds * 1_000_000 + fraction * 10 ** (6 - frac)
    if np.abs(micros).max() >= 2 ** 53:  # beyond the year 2255: not exact as a double
        return None
    return (micros / 1e6).tolist()  # as timedelta.total_seconds(): whole microseconds / 10**6


def timestamps(texts) -> list[float | None]:
    """``parse_timestamp`` of many texts; when all share one ISO 8601 layout, with numpy over
    the whole block; else, when all are ISO 8601 of one kind (all with a zone or all without),
    in C-level ``map``s."""
    fast = _iso_block(texts)
    if fast is not None:
        return fast
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
