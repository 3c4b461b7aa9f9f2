"""Timestamps: the text of a record's time becomes seconds since the epoch.

Stage: formats → **timestamps** → (a record's ``ts``). One table, :data:`LAYOUTS`, holds every
layout tracewatch reads; each has a reader for one text and, where a log's usual case deserves
it, a reader for a whole block of texts that share the layout (``None`` back when they do not:
those texts take the one-by-one reader). :func:`parse_timestamp` tries the layouts in order;
:class:`StampReader` reads one source's texts, by block where it can be.

To add a layout, write its one-text reader (and, if it is common in volume, its block reader)
and add a :class:`Layout` to :data:`LAYOUTS`; tests compare every block reader with its one-text
reader.
"""

from __future__ import annotations

import functools
import re
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime, timezone
from operator import attrgetter, methodcaller

import numpy as np

Stamp = float | None


@dataclass(frozen=True)
class Layout:
    """One way of writing a time. ``one`` reads a text (None: not this layout, or impossible);
    ``block`` reads many texts at once and gives None when any is not of this layout. A
    ``yearless`` layout's ``one`` also takes the time its year is inferred against
    (``reference``, :func:`infer_year`)."""

    name: str
    one: Callable[..., Stamp]
    block: Callable[[Sequence[str]], list[float] | None] | None = None
    yearless: bool = False

    def read(self, text: str, reference: float | None = None) -> Stamp:
        """``one(text)``, a yearless layout's year inferred against ``reference`` (None: now)."""
        return self.one(text, reference) if self.yearless else self.one(text)


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


# -- other common layouts ----------------------------------------------------------------------
MONTHS = {m: i for i, m in enumerate(("Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct",
                                       "Nov", "Dec"), 1)}
_ZONE = re.compile(r"(?:UTC|GMT|Z)|([+-])(\d\d)(?::?(\d\d))?")


def _utc(year: int, month: int, day: int, hms: str, frac: str | None, offset: int = 0) -> Stamp:
    """Seconds of a UTC (less ``offset`` seconds) date and ``HH:MM:SS`` time; None if impossible."""
    try:
        dt = datetime(year, month, day, int(hms[0:2]), int(hms[3:5]), int(hms[6:8]),
                      int((frac or "0").ljust(6, "0")[:6]), tzinfo=timezone.utc)
    except ValueError:
        return None
    return dt.timestamp() - offset


_PG = re.compile(r"(\d{4})-(\d\d)-(\d\d) (\d\d:\d\d:\d\d)(?:\.(\d{1,6}))? (\S+)")


def postgres(text: str) -> Stamp:
    """PostgreSQL's ``log_line_prefix`` ``%m`` / ``%t``: ``2026-12-02 07:40:34.082 UTC`` (zone
    UTC/GMT or a numeric offset such as ``+03`` or ``-0530``; named zones are ambiguous: None)."""
    m = _PG.fullmatch(text.strip())
    if m is None:
        return None
    z = _ZONE.fullmatch(m[6])
    if z is None:
        return None
    offset = 0 if z[1] is None else (1 if z[1] == "+" else -1) * (int(z[2]) * 3600 + int(z[3] or 0) * 60)
    return _utc(int(m[1]), int(m[2]), int(m[3]), m[4], m[5], offset)


FUTURE_SLACK_DAYS = 1  # a yearless date up to a day ahead of the clock is this year's (zones differ)


@functools.lru_cache(maxsize=4096)
def yearless_midnight(month: int, day: int, today: int) -> float | None:
    """Epoch of 00:00 UTC on ``month``/``day`` in the latest year not more than
    ``FUTURE_SLACK_DAYS`` ahead of day number ``today`` (days since the epoch), as RFC 3164
    section 4.3 receivers must place a yearless stamp: a December stamp read in January belongs
    to the year before. None for a date no year has. Cached: one entry a date and day."""
    year = datetime.fromtimestamp(today * 86400, tz=timezone.utc).year + 1
    for y in range(year, year - 9, -1):  # back to the last leap year for 29 February
        try:
            midnight = datetime(y, month, day, tzinfo=timezone.utc).timestamp()
        except ValueError:
            continue
        if midnight <= (today + FUTURE_SLACK_DAYS) * 86400:
            return midnight
    return None


def infer_year(month: int, day: int, hms: str, frac: str | None, reference: float | None = None) -> Stamp:
    """A yearless ``HH:MM:SS`` stamp of ``month``/``day`` placed by :func:`yearless_midnight`
    relative to ``reference`` (now when None); UTC."""
    ref = time.time() if reference is None else reference
    midnight = yearless_midnight(month, day, int(ref // 86400))
    h, m, sec = int(hms[0:2]), int(hms[3:5]), int(hms[6:8])
    if midnight is None or h > 23 or m > 59 or sec > 60:
        return None
    return midnight + h * 3600 + m * 60 + sec + (int(frac.ljust(6, "0")[:6]) / 1e6 if frac else 0.0)


_YEARLESS = re.compile(r"([A-Z][a-z]{2}) {1,2}(\d{1,2}) (\d\d:\d\d:\d\d)(?:\.(\d{1,6}))?")


def syslog_yearless(text: str, reference: float | None = None) -> Stamp:
    """The BSD syslog (RFC 3164) stamp ``Dec  2 07:40:34`` (day padded with a space), year
    inferred by :func:`infer_year`; UTC."""
    m = _YEARLESS.fullmatch(text.strip())
    if m is None or m[1] not in MONTHS:
        return None
    return infer_year(MONTHS[m[1]], int(m[2]), m[3], m[4], reference)


_ASCTIME = re.compile(r"\[?(?:Mon|Tue|Wed|Thu|Fri|Sat|Sun) ([A-Z][a-z]{2}) {1,2}(\d{1,2}) "
                      r"(\d\d:\d\d:\d\d)(?:\.(\d{1,6}))? (\d{4})\]?")


def asctime(text: str) -> Stamp:
    """C's ``asctime`` layout, as Apache httpd's error log writes it: ``[Sun Dec 04 04:47:44
    2005]`` (brackets optional; 2.4's microseconds too); UTC."""
    m = _ASCTIME.fullmatch(text.strip())
    if m is None or m[1] not in MONTHS:
        return None
    return _utc(int(m[5]), MONTHS[m[1]], int(m[2]), m[3], m[4])


_COMPACT = re.compile(r"(\d\d)(\d\d)(\d\d) (\d\d)(\d\d)(\d\d)")


def yymmdd_hhmmss(text: str) -> Stamp:
    """``081109 203615``: two-digit year (69-99 the 1900s, 00-68 the 2000s, as POSIX strptime
    ``%y``), month, day, then hours, minutes, seconds; UTC."""
    m = _COMPACT.fullmatch(text.strip())
    if m is None:
        return None
    yy = int(m[1])
    return _utc(yy + (1900 if yy >= 69 else 2000), int(m[2]), int(m[3]), f"{m[4]}:{m[5]}:{m[6]}", None)


def _yearless(pattern: str) -> bool:
    return "%Y" not in pattern and "%y" not in pattern and "%G" not in pattern


def strptime_reader(pattern: str) -> Callable[[str], Stamp]:
    """A reader for a ``strptime`` pattern; no zone in it: UTC; no year: :func:`infer_year`
    against ``reference``."""
    yearless = _yearless(pattern)

    def read(text: str, reference: float | None = None) -> Stamp:
        try:  # a yearless text is read in 2000, a leap year, so that 29 February reads too
            dt = datetime.strptime(text.strip() + " 2000", pattern + " %Y") if yearless \
                else datetime.strptime(text.strip(), pattern)
        except (ValueError, TypeError):
            return None
        if yearless:
            return infer_year(dt.month, dt.day, dt.strftime("%H:%M:%S"), f"{dt.microsecond:06d}", reference)
        if dt.tzinfo is None:
            dt = dt.replace(tzinfo=timezone.utc)
        return dt.timestamp()

    return read


# -- the table ---------------------------------------------------------------------------------
# Tried in this order by parse_timestamp and by a StampReader looking for its layout.
LAYOUTS: dict[str, Layout] = {layout.name: layout for layout in (
    Layout("iso8601", iso8601, iso8601_block),
    Layout("epoch", epoch_seconds),
    Layout("epoch_ms", epoch_millis),
    Layout("postgres", postgres),
    Layout("syslog", syslog_yearless, yearless=True),
    Layout("asctime", asctime),
    Layout("yymmdd", yymmdd_hhmmss),
)}
# log4j's ISO8601 layout (2015-07-29 17:41:44,747) is ISO 8601 with a comma
LAYOUTS["log4j"] = LAYOUTS["iso8601"]
_ISO = LAYOUTS["iso8601"]


def parse_timestamp(text: str | None) -> Stamp:
    """Seconds since the epoch of a time written in any layout of :data:`LAYOUTS` (ISO 8601 /
    RFC 3339 with ``,`` or ``.`` fractions, a plain epoch number, PostgreSQL's, BSD syslog's,
    asctime's, ``yymmdd HHMMSS``); None if unreadable. Times without a zone are taken as UTC."""
    return detect(text)[0]


def detect(text: str | None, reference: float | None = None) -> tuple[Stamp, Layout | None]:
    """The stamp of ``text`` and the first layout of :data:`LAYOUTS` that reads it (a yearless
    one inferring the year against ``reference``, None: now)."""
    if not text:
        return None, None
    if len(text) >= 10 and text[4] == "-" and text[7] == "-":  # the common case
        stamp = _ISO.one(text)
        if stamp is not None:
            return stamp, _ISO
    for layout in LAYOUTS.values():
        stamp = layout.read(text, reference)
        if stamp is not None:
            return stamp, layout
    stamp = _ISO.one(text.strip())
    return stamp, (_ISO if stamp is not None else None)


class StampReader:
    """One source's reader of times: the layout named by its ``ts_format`` (a name in
    :data:`LAYOUTS` or a ``strptime`` pattern), or, unset, the layout the first readable stamp
    shows, kept for the texts after it (a text it cannot read is tried against every layout,
    and the layout that reads it is kept from then on). ``today`` gives the time a yearless
    stamp's year is inferred against (None: the wall clock; a replayed file: its mtime)."""

    def __init__(self, ts_format: str | None = None, today: Callable[[], float] | None = None) -> None:
        self.fixed = ts_format is not None
        self.today = today
        if ts_format is None:
            self.layout: Layout | None = None
        elif ts_format in LAYOUTS:
            self.layout = LAYOUTS[ts_format]
        else:
            self.layout = Layout(ts_format, strptime_reader(ts_format), yearless=_yearless(ts_format))

    def one(self, text: str | None) -> Stamp:
        if not text:
            return None
        layout = self.layout
        reference = self.today() if self.today is not None else None
        if layout is not None:
            stamp = layout.read(text, reference)
            if stamp is not None or self.fixed:
                return stamp
        stamp, found = detect(text, reference)
        if found is not None:
            self.layout = found
        return stamp

    def many(self, texts: Sequence[str | None]) -> list[Stamp]:
        layout = self.layout
        if layout is None:
            return list(map(self.one, texts))
        stamps = layout.block(texts) if layout.block is not None else None
        if stamps is None:
            reference = self.today() if self.today is not None else None
            stamps = [layout.read(t, reference) if t else None for t in texts]
        if self.fixed or None not in stamps:
            return stamps
        return [s if s is not None else self.one(t) for s, t in zip(stamps, texts)]


def check_ts_format(value: str | None) -> str | None:
    """A ``ts_format`` as the config takes it: a layout's name or a ``strptime`` pattern."""
    if value is None or value in LAYOUTS:
        return value
    if "%" not in value:
        raise ValueError(f"ts_format: {value!r} is neither a layout ({', '.join(LAYOUTS)}) nor a strptime "
                         "pattern such as '%d/%b/%Y:%H:%M:%S %z'")
    try:
        datetime.now().strftime(value)
    except ValueError as exc:
        raise ValueError(f"ts_format: {value!r}: {exc}") from exc
    return value


__all__ = ["LAYOUTS", "MONTHS", "Layout", "StampReader", "check_ts_format", "detect", "infer_year", "yearless_midnight", "iso8601", "iso8601_block", "iso8601_numpy", "parse_timestamp"]
