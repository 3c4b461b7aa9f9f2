"""Format ``journald``: the systemd journal's JSON export, one entry per line.

Stage: sources → **formats** → templates. Lines are what ``journalctl -o json`` writes (in
files, for batch runs, or live from ``journalctl --follow``: tracewatch/sources/journal.py).
The rules followed are systemd's "Journal JSON Format" (systemd.io/JOURNAL_EXPORT_FORMATS) and
the field meanings of systemd.journal-fields(7):

- ``MESSAGE`` is the message: a JSON string, or — when the value is not valid UTF-8 — an array
  of byte values (decoded here with replacement characters, and counted as ``invalid_utf8``); a
  field that occurs more than once in an entry is an array of such values (the first is taken);
  ``null`` is a value journalctl left out as too large (it does so past 4096 bytes unless given
  ``--all``, which tracewatch's own journalctl always is): such an entry is rejected as
  ``message_elided`` and kept as a whole-line record.
- ``PRIORITY`` (0–7, syslog's severities) becomes the level, as RFC 5424 names them.
- ``__REALTIME_TIMESTAMP`` (µs since the epoch, a decimal string) is the record's time.
- The session key: the values of ``journal_key_fields`` (for example ``_SYSTEMD_UNIT`` and
  ``_PID``: one session per process of a unit) joined with ``/``, then ``:`` and the match of
  the ``session_key`` regex (group ``key``) in the message, when one is given. An entry with
  neither is keyless (time windows).

A record's raw text is the entry as JSON with its fields sorted: journalctl writes an entry's
fields in an order that changes from run to run, and an alert's id (and so its being recognised
after a restart) depends on the raw text of the session's first record.

A line that is not a JSON object is rejected as ``bad_json`` / ``not_an_object``.
"""

from __future__ import annotations

import re

import orjson


from ..config import SourceConfig
from ..records import Record, Rejection
from . import JSON_OBJECT_REASONS, Format, Output, json_object

# RFC 5424 section 6.2.1 severities, as the syslog format names them (tracewatch/formats/syslog.py)
SEVERITIES = ("emerg", "alert", "crit", "err", "warning", "notice", "info", "debug")
ELIDED = "message_elided"
INVALID_UTF8 = "invalid_utf8"


def field_text(value) -> tuple[str | None, bool]:
    """A journal field's value as text, and whether it had to be mended (bytes not UTF-8)."""
    if isinstance(value, list) and value and not all(isinstance(x, int) for x in value):
        value = value[0]  # the field occurred more than once: the first value
    if isinstance(value, str):
        return value, False
    if isinstance(value, list) and all(isinstance(x, int) and 0 <= x < 256 for x in value):
        raw = bytes(value)
        try:
            return raw.decode("utf-8"), False
        except UnicodeDecodeError:
            return raw.decode("utf-8", errors="replace"), True
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return str(value), False
    return None, False


class JournaldFormat(Format):
    name = "journald"
    reasons = (*JSON_OBJECT_REASONS, ELIDED, INVALID_UTF8)
    samples = [
        ({"journal_key_fields": ["_SYSTEMD_UNIT", "_PID"]}, [
            '{"__CURSOR":"s=9f0c;i=1;b=2d1e;m=a1;t=5f2;x=11","__REALTIME_TIMESTAMP":"1764496800250000",'
            '"PRIORITY":"6","_SYSTEMD_UNIT":"locker-api.service","_PID":"812","MESSAGE":"door 5 opened on LK-4"}',
            '{"__REALTIME_TIMESTAMP":"1764496801000000","PRIORITY":"3","_PID":"812",'
            '"MESSAGE":[100,111,111,114,32,255,32,106,97,109,109,101,100]}',
            '{"__REALTIME_TIMESTAMP":"1764496802000000","PRIORITY":"4","MESSAGE":null}',
            '{"__REALTIME_TIMESTAMP":"x","MESSAGE":["first copy","second copy"]}',
            '{"PRIORITY":"9","MESSAGE":"kernel: link up"}', "[1]", "{cut", ""]),
        ({"session_key": r"req=(?P<key>\w+)", "journal_key_fields": ["SYSLOG_IDENTIFIER"]}, [
            '{"__REALTIME_TIMESTAMP":"1764496800250000","SYSLOG_IDENTIFIER":"locker-api","MESSAGE":"req=a7 reserved"}',
            '{"__REALTIME_TIMESTAMP":"1764496800300000","MESSAGE":"req=a7 door opened"}',
            '{"__REALTIME_TIMESTAMP":"1764496800300000","MESSAGE":"no request"}']),
    ]

    def __init__(self, src: SourceConfig) -> None:
        super().__init__(src)
        self.fields = tuple(src.journal_key_fields)
        self._key = re.compile(src.session_key) if src.session_key else None

    def feed(self, line: str, offset: int) -> Output:
        entry = json_object(line)
        if type(entry) is Rejection:
            return [entry]
        line = orjson.dumps(entry, option=orjson.OPT_SORT_KEYS).decode()  # the same text on every run
        message, mended = field_text(entry.get("MESSAGE"))
        key = self._session_key(entry, message or "")
        ts = _micros(entry.get("__REALTIME_TIMESTAMP"))
        level = _level(entry.get("PRIORITY"))
        if message is None:
            return [Rejection(ELIDED, line, Record(self.source, key, ts, level, line, line, offset))]
        rec = Record(self.source, key, ts, level, message, line, offset)
        return [Rejection(INVALID_UTF8, line, rec)] if mended else [rec]

    def _session_key(self, entry: dict, message: str) -> str | None:
        key = None
        if self.fields:
            values = [field_text(entry.get(f))[0] for f in self.fields]
            if any(v is not None for v in values):
                key = "/".join(v if v is not None else "-" for v in values)
        if self._key is not None:
            m = self._key.search(message)
            if m is not None:
                found = m.group("key")
                key = found if key is None else f"{key}:{found}"
        return key


def _micros(value) -> float | None:
    """``__REALTIME_TIMESTAMP``: microseconds since the epoch as a decimal string."""
    if isinstance(value, str) and value.isdigit() and len(value) <= 20:
        return int(value) / 1e6
    return None


def _level(value) -> str | None:
    if isinstance(value, str) and len(value) == 1 and "0" <= value <= "7":
        return SEVERITIES[int(value)]
    return None
