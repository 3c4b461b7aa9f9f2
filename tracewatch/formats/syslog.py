"""Format ``syslog``: RFC 5424 and RFC 3164 (BSD) syslog lines, as syslog daemons write them.

Stage: sources → **formats** → templates. Each line becomes one record whose message (MSG, or
the CONTENT after a BSD tag) is mined into templates; severity comes from PRI.

- RFC 5424: ``<PRI>VERSION TIMESTAMP HOSTNAME APP-NAME PROCID MSGID SD [MSG]`` with NILVALUE
  ``-``, structured data whose values escape ``"`` ``\\`` ``]`` with a backslash, and an
  optional UTF-8 BOM before MSG.
- RFC 3164: ``<PRI>Mmm dd hh:mm:ss HOSTNAME TAG[PID]: CONTENT`` (day space-padded). The
  timestamp has no year and no zone: it is read as UTC, in the latest year that does not put it
  more than a day ahead of the clock. Files written by syslog daemons often drop ``<PRI>`` or use
  an RFC 3339 timestamp instead; both are read too.

The session key comes from ``session_field`` (a header field or ``[SD-ID PARAM]``), else from
``session_key`` (a regex with group ``key`` searched in the message). A line that is not
syslog is rejected as ``not_syslog`` and kept as a whole-line record; a bad timestamp, PRI or
structured data is counted by reason and the rest of the line is still used.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from collections.abc import Sequence
from datetime import datetime
from functools import partial
from itertools import repeat
from operator import and_

from ..config import SourceConfig
from ..records import Columns, Record, Rejection
from ..timestamps import MONTHS, infer_year, iso8601_numpy
from . import Format, Output, _list

# RFC 5424 section 6.2.1, table 2 (the same names as RFC 3164 section 4.1.1)
SEVERITIES = ("emerg", "alert", "crit", "err", "warning", "notice", "info", "debug")
HEADER_FIELDS = ("hostname", "app_name", "procid", "msgid")
NIL = "-"
BOM = "\ufeff"

_SD_NAME = r'[^ =\]"]{1,32}'
# PARAM-VALUE: any characters but '"' and '\', or a backslash and any character, written as an
# unrolled loop (one character class at a time: several times quicker in Python's re than the
# alternation per character)
_SD_VALUE = r'[^"\\]*(?:\\.[^"\\]*)*'
_SD_ELEMENT_RE = rf'\[{_SD_NAME}(?: {_SD_NAME}="{_SD_VALUE}")*\]'
# header, then STRUCTURED-DATA (NILVALUE or elements), then an optional MSG; a line whose
# structured data is malformed matches only the looser second form
_RFC5424 = re.compile(rf"<(\d{{1,3}})>[1-9]\d{{0,2}} (\S+) (\S+) (\S+) (\S+) (\S+) (-|(?:{_SD_ELEMENT_RE})+)"
                      r"(?: (.*))?\Z", re.S)
_RFC5424_LOOSE = re.compile(r"<(\d{1,3})>[1-9]\d{0,2} (\S+) (\S+) (\S+) (\S+) (\S+)(?: (.*))?\Z", re.S)
_RFC3339 = re.compile(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(?:\.\d{1,6})?(?:Z|[+-]\d\d:\d\d)\Z")
_SD_ELEMENT = re.compile(rf'\[({_SD_NAME})((?: {_SD_NAME}="{_SD_VALUE}")*)\]', re.S)
_SD_PARAM = re.compile(rf'({_SD_NAME})="({_SD_VALUE})"', re.S)
_SD_ESCAPE = re.compile(r'\\(["\\\]])')
_RFC3164 = re.compile(r"(?:<(\d{1,3})>)?(Jan|Feb|Mar|Apr|May|Jun|Jul|Aug|Sep|Oct|Nov|Dec) ([ \d]?\d) "
                      r"(\d\d):(\d\d):(\d\d) (\S+)(?: (.*))?\Z", re.S)
_FILE3339 = re.compile(r"(?:<(\d{1,3})>)?(\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(?:\.\d+)?(?:Z|[+-]\d\d:\d\d)) (\S+)"
                       r"(?: (.*))?\Z", re.S)
# a BSD TAG is only taken as such when "[pid]" or ":" ends it (RFC 3164 section 5.4, example 2)
_TAG = re.compile(r"([^\s\[\]:]{1,48})(?:\[([^\]\s]*)\]:?|:) ?(.*)\Z", re.S)
_SD_FIELD = re.compile(r"\[(\S+) (\S+)\]")
_group = re.Match.group
_AND7 = partial(and_, 7)  # PRI & 7: the severity


def unescape_sd(value: str) -> str:
    """A PARAM-VALUE with its escapes resolved; a backslash before any other character stays
    (RFC 5424 section 6.3.3)."""
    return _SD_ESCAPE.sub(r"\1", value) if "\\" in value else value


def parse_structured_data(text: str) -> tuple[dict[str, dict[str, str]], int] | None:
    """``{sd_id: {param: value}}`` of the SD-ELEMENTs at the start of ``text`` and where they
    end; None when ``text`` does not start with a well-formed element. The first occurrence
    of an element or a parameter wins."""
    sd: dict[str, dict[str, str]] = {}
    pos = 0
    while pos < len(text) and text[pos] == "[":
        m = _SD_ELEMENT.match(text, pos)
        if m is None:
            return None
        params = sd.setdefault(m.group(1), {})
        for name, value in _SD_PARAM.findall(m.group(2)):
            params.setdefault(name, unescape_sd(value))
        pos = m.end()
    return (sd, pos) if pos else None


def _rfc3339(text: str) -> float | None:
    if not _RFC3339.match(text):
        return None
    try:
        return datetime.fromisoformat(text).timestamp()
    except (ValueError, OverflowError):
        return None


@dataclass(slots=True)
class SyslogMessage:
    """One parsed syslog line; header fields are None where the line has NILVALUE or lacks them."""

    form: str  # "rfc5424", "rfc3164" or "rfc3339-file"
    pri: int | None
    ts: float | None
    hostname: str | None
    app_name: str | None
    procid: str | None
    msgid: str | None
    sd_text: str  # the STRUCTURED-DATA as written ("" when there is none)
    message: str
    problem: str | None = None  # reason the line is counted as rejected, though still used

    @property
    def sd(self) -> dict[str, dict[str, str]]:
        """``{sd_id: {param: value}}``, escapes resolved (parsed when asked for)."""
        parsed = parse_structured_data(self.sd_text) if self.sd_text else None
        return parsed[0] if parsed else {}

    @property
    def facility(self) -> int | None:
        return None if self.pri is None else self.pri >> 3

    @property
    def severity(self) -> str | None:
        return SEVERITIES[self.pri & 7] if self.pri is not None and self.pri <= 191 else None


def parse(line: str, now: float) -> SyslogMessage | None:
    """Parse one line in any of the three forms; None when it is not syslog. ``now`` (epoch
    seconds) picks the year of an RFC 3164 date."""
    if line.startswith("<"):
        if (m := _RFC5424.match(line)) is not None:
            return _rfc5424(m.groups(), None)
        if (m := _RFC5424_LOOSE.match(line)) is not None:
            return _rfc5424((*m.groups()[:6], NIL, m.group(7)), "bad_structured_data")
    if (m := _RFC3164.match(line)) is not None:
        pri, mon, day, hh, mm, ss, host, msg = m.groups()
        ts = infer_year(MONTHS[mon], int(day), f"{hh}:{mm}:{ss}", None, now)
        return _bsd("rfc3164", pri, ts, host, msg, None if ts is not None else "bad_timestamp")
    if (m := _FILE3339.match(line)) is not None:
        pri, stamp, host, msg = m.groups()
        try:
            ts = datetime.fromisoformat(stamp).timestamp()
        except (ValueError, OverflowError):
            ts = None
        return _bsd("rfc3339-file", pri, ts, host, msg, None if ts is not None else "bad_timestamp")
    return None


def _rfc5424(groups: tuple, problem: str | None) -> SyslogMessage:
    pri, stamp, host, app, procid, msgid, sd_text, message = groups
    ts = None
    if stamp != NIL:
        ts = _rfc3339(stamp)
        if ts is None:
            problem = problem or "bad_timestamp"
    message = message or ""
    if message.startswith(BOM):
        message = message[1:]
    return _checked(SyslogMessage("rfc5424", int(pri), ts, None if host == NIL else host, None if app == NIL else app,
                                  None if procid == NIL else procid, None if msgid == NIL else msgid,
                                  "" if sd_text == NIL else sd_text, message, problem))


def _bsd(form: str, pri: str | None, ts: float | None, host: str, msg: str | None,
         problem: str | None) -> SyslogMessage:
    msg = msg or ""
    t = _TAG.match(msg)
    app, procid, content = (t.group(1), t.group(2) or None, t.group(3)) if t else (None, None, msg)
    return _checked(SyslogMessage(form, None if pri is None else int(pri), ts, host, app, procid, None, "",
                                  content, problem))


def _checked(msg: SyslogMessage) -> SyslogMessage:
    if msg.pri is not None and msg.pri > 191 and msg.problem is None:  # RFC 5424 6.2.1: 0..191
        msg.problem = "bad_pri"
    return msg


class SyslogFormat(Format):
    name = "syslog"
    reasons = ("empty", "not_syslog", "bad_structured_data", "bad_timestamp", "bad_pri")
    samples = [
        ({"session_field": "[req@32473 id]"},
         ['<134>1 2026-11-30T10:00:00.250Z locker-gw-3 locker-api 812 - [req@32473 id="a1"] door 5 opened',
          '<134>1 2026-11-30T10:00:00.250+01:00 locker-gw-3 locker-api 812 ID7 [req@32473 id="a\\"b"][x@1 k="v"] \ufeffok',
          '<134>1 2026-11-30T10:00:01.5Z gw api 812 - [req@32473 x="1"][req@32473 id="z9"] the SD-ID twice',
          "<11>1 - - - - - - ", '<134>1 2026-11-30T10:00:00Z h a p m [bad sd', "<999>1 - h a p m - pri too high"]),
        ({"session_key": r"req=(?P<key>\S+)"},
         ["<134>Nov 30 10:00:00 locker-gw-3 locker-api[812]: req=a1 door 5 opened",
          "Nov  3 09:05:01 gw cron: job started", "2026-11-30T10:00:00.5Z gw app: req=b2 rfc3339 file",
          "Feb 30 10:00:00 gw app: no such day", "plain text, not syslog"]),
        ({"session_field": "procid"}, ["<13>1 2026-11-30T10:00:00Z gw app 4711 - - started"]),
    ]

    def __init__(self, src: SourceConfig) -> None:
        super().__init__(src)
        field = src.session_field
        self._header = field if field in HEADER_FIELDS else None
        sd = _SD_FIELD.fullmatch(field) if field and self._header is None else None
        # the one SD-ELEMENT and parameter asked for, found without parsing the others
        self._sd_element = re.compile(rf'\[{re.escape(sd.group(1))}((?: {_SD_NAME}="{_SD_VALUE}")*)\]',
                                      re.S) if sd else None
        self._sd_param = re.compile(rf' {re.escape(sd.group(2))}="({_SD_VALUE})"', re.S) if sd else None
        # both in one search, for blocks: the first such element that holds the parameter (the
        # same one while the SD-ID occurs once, as RFC 5424 section 6.3.2 requires)
        self._sd_id = f"[{sd.group(1)}" if sd else ""
        self._sd_both = re.compile(rf'\[{re.escape(sd.group(1))}(?: {_SD_NAME}="{_SD_VALUE}")*? '
                                   rf'{re.escape(sd.group(2))}="({_SD_VALUE})"(?: {_SD_NAME}="{_SD_VALUE}")*\]',
                                   re.S) if sd else None
        self._key_re = re.compile(src.session_key) if src.session_key else None

    def _sd_key(self, sd_text: str) -> str | None:
        """The structured-data parameter ``session_field`` names, escapes resolved."""
        element = self._sd_element.search(sd_text)
        param = self._sd_param.search(element.group(1)) if element else None
        return unescape_sd(param.group(1)) if param else None

    def _sd_keys(self, sd_texts: list[str]) -> list[str | None]:
        """:meth:`_sd_key` of many STRUCTURED-DATA texts (NILVALUE: None), in C-level ``map``s
        while every text has the parameter and no escape."""
        if max(map(str.count, sd_texts, repeat(self._sd_id))) == 1:
            found = list(map(self._sd_both.search, sd_texts))
            if None not in found:
                values = list(map(_group, found, repeat(1)))
                if "\\" not in "".join(values):
                    return values
        return [self._sd_key(sd) if sd != NIL else None for sd in sd_texts]

    def _key(self, msg: SyslogMessage | None, message: str) -> str | None:
        key = None
        if msg is not None:
            if self._header is not None:
                key = getattr(msg, self._header)
            elif self._sd_element is not None and msg.sd_text:
                key = self._sd_key(msg.sd_text)
        if key is None and self._key_re is not None:
            m = self._key_re.search(message)
            key = m.group("key") if m else None
        return key

    def read_block(self, lines: Sequence[str], offsets: Sequence[int]) -> Columns:
        """A block of clean RFC 5424 lines (the usual case for files a syslog daemon writes in
        that form) read column by column in C-level ``map``s; any other block line by line."""
        found = list(map(_RFC5424.match, lines))
        if None in found or not found:
            return super().read_block(lines, offsets)
        pris = list(map(int, map(_group, found, repeat(1))))
        stamp = list(map(_group, found, repeat(2)))
        # every text in the layout of the first (iso8601_numpy checks it), which is RFC 3339's
        stamps = iso8601_numpy(stamp) if max(pris) <= 191 and _RFC3339.match(stamp[0]) else None
        if stamps is None:
            return super().read_block(lines, offsets)
        message = list(map(_group, found, repeat(8)))
        if None in message:
            message = [m or "" for m in message]
        if BOM in "".join(message):
            return super().read_block(lines, offsets)
        n = len(found)
        if self._header is not None:
            keys = list(map(_group, found, repeat(3 + HEADER_FIELDS.index(self._header))))
            if NIL in keys:
                keys = [None if k == NIL else k for k in keys]
        elif self._sd_element is not None:
            keys = self._sd_keys(list(map(_group, found, repeat(7))))
        else:
            keys = [None] * n
        if self._key_re is not None and None in keys:
            keys = [k if k is not None else self._key(None, m) for k, m in zip(keys, message)]
        return Columns(keys, stamps, list(map(SEVERITIES.__getitem__, map(_AND7, pris))), message, [None] * n,
                       _list(lines), _list(offsets))

    def feed(self, line: str, offset: int) -> Output:
        if not line.strip():
            return [Rejection("empty", line)]
        msg = parse(line, self.now())  # a yearless RFC 3164 stamp is placed against it
        if msg is None:
            rec = Record(self.source, self._key(None, line), None, None, line, line, offset)
            return [Rejection("not_syslog", line, rec)]
        rec = Record(self.source, self._key(msg, msg.message), msg.ts, msg.severity, msg.message, line, offset)
        return [rec] if msg.problem is None else [Rejection(msg.problem, line, rec)]
