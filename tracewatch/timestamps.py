"""Timestamps: the text of a record's time becomes seconds since the epoch.

Stage: formats → **timestamps** → (a record's ``ts``). One table, :data:`LAYOUTS`, holds every
layout tracewatch reads; each has a reader for one text and, where a log's usual case deserves
it, a reader for a whole block of texts that share the layout (``None`` back when they do not:
those texts take the one-by-one reader). :func:`parse_timestamp` tries the layouts in order;
:func:`timestamps` is the same for many texts, by block where it can be.

To add a layout, write its one-text reader (and, if it is common in volume, its block reader)
and add a :class:`Layout` to :data:`LAYOUTS`; tests compare every block reader with its one-text
reader.
"""

from __future__ import annotations

import functools
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime, timezone
from operator import attrgetter, methodcaller

import numpy as np

Stamp = float | None


@dataclass(frozen=True)
class Layout:
    """One way of writing a time. ``one`` reads a text (None: not this layout, or impossible);
    ``block`` reads many texts at once and gives None when any is not of this layout."""

    name: str
    one: Callable[[str], Stamp]
    block: Callable[[Sequence[str]], list[float] | None] | None = None


# -- ISO 8601 / RFC 3339 --------------------------------------------------------------------------
def iso8601(text: str) -> Stamp:
    """ISO 8601 / RFC 3339, with ``,`` or ``.`` before the fraction (Python's logging module
    writes ``,``); a time without a zone is UTC."""
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


_ZEROS = str.maketrans("123456789", "000000000")


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


def iso8601_numpy(texts: Sequence[str]) -> list[float] | None:
    """:func:`iso8601` of many texts of one layout (a log's usual case), computed with numpy
    over the whole block. None when the texts differ in layout, carry more than six fraction
    digits or hold an impossible date or time: those take the one-by-one reader."""
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


_tzinfo = attrgetter("tzinfo")
_as_utc = methodcaller("replace", tzinfo=timezone.utc)


def iso8601_block(texts: Sequence[str]) -> list[float] | None:
    """:func:`iso8601` of many texts: with numpy when they share one layout
    (:func:`iso8601_numpy`), else in C-level ``map``s when ``datetime.fromisoformat`` reads them
    all and they are of one kind (all with a zone, or all without); None otherwise."""
    fast = iso8601_numpy(texts)
    if fast is not None:
        return fast
    try:
        dts = list(map(datetime.fromisoformat, texts))
    except (ValueError, TypeError):
        return None
    zones = list(map(_tzinfo, dts))
    if None not in zones:
        return list(map(datetime.timestamp, dts))
    if zones.count(None) == len(zones):
        return list(map(datetime.timestamp, map(_as_utc, dts)))
    return None


# -- epoch numbers ------------------------------------------------------------------------------
_EPOCH = re.compile(r"\d{9,10}(\.\d+)?")
_EPOCH_MS = re.compile(r"\d{12,13}")


def epoch_seconds(text: str) -> Stamp:
    """A plain count of seconds since the epoch (9 or 10 digits, with a fraction or not)."""
    text = text.strip()
    return float(text) if _EPOCH.fullmatch(text) else None


def epoch_millis(text: str) -> Stamp:
    """A plain count of milliseconds since the epoch (12 or 13 digits)."""
    text = text.strip()
    return int(text) / 1000.0 if _EPOCH_MS.fullmatch(text) else None


# -- the table ---------------------------------------------------------------------------------
# Tried in this order by parse_timestamp; block readers first by timestamps.
LAYOUTS: dict[str, Layout] = {layout.name: layout for layout in (
    Layout("iso8601", iso8601, iso8601_block),
    Layout("epoch", epoch_seconds),
    Layout("epoch_ms", epoch_millis),
)}
_ISO = LAYOUTS["iso8601"]


def parse_timestamp(text: str | None) -> Stamp:
    """Seconds since the epoch of a time written in any layout of :data:`LAYOUTS` (ISO 8601 /
    RFC 3339 with ``,`` or ``.`` fractions, or a plain epoch number); None if unreadable. Times
    without a zone are taken as UTC."""
    if not text:
        return None
    if len(text) >= 10 and text[4] == "-" and text[7] == "-":  # the common case: no other layout
        return _ISO.one(text)
    for layout in LAYOUTS.values():
        if layout is not _ISO:
            stamp = layout.one(text)
            if stamp is not None:
                return stamp
    return _ISO.one(text.strip())


def timestamps(texts: Sequence[str | None]) -> list[Stamp]:
    """``parse_timestamp`` of many texts: by a layout's block reader when every text is of that
    layout, else one by one."""
    for layout in LAYOUTS.values():
        if layout.block is not None:
            stamps = layout.block(texts)
            if stamps is not None:
                return stamps
    return list(map(parse_timestamp, texts))


__all__ = ["LAYOUTS", "Layout", "iso8601", "iso8601_block", "iso8601_numpy", "parse_timestamp", "timestamps"]
