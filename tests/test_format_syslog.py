"""Format ``syslog``: RFC 5424 and RFC 3164 messages, checked against the RFCs' own examples."""

from __future__ import annotations

from datetime import datetime, timezone

import pytest

from tracewatch.config import SourceConfig, parse_config
from tracewatch.errors import ConfigError
from tracewatch.formats.syslog import SyslogFormat, parse, parse_structured_data
from tracewatch.records import Record, Rejection

NOW = datetime(2026, 11, 30, 12, 0, tzinfo=timezone.utc).timestamp()
BOM = "\ufeff"  # the RFC writes the UTF-8 byte order mark as "BOM" in its examples


def utc(*args) -> float:
    return datetime(*args, tzinfo=timezone.utc).timestamp()


def fmt(**kw) -> SyslogFormat:
    f = SyslogFormat(SourceConfig(name="sys", format="syslog", **kw))
    f.dated_by(lambda: NOW)
    return f


# -- RFC 5424 --------------------------------------------------------------------------------
def test_rfc5424_example_1_no_structured_data():
    # RFC 5424 section 6.5, example 1: facility 4 (auth), severity 2 (crit), VERSION 1, PROCID
    # unknown, MSGID ID47, no STRUCTURED-DATA, MSG in UTF-8 preceded by a BOM.
    m = parse(f"<34>1 2003-10-11T22:14:15.003Z mymachine.example.com su - ID47 - {BOM}'su root' failed "
              "for lonvick on /dev/pts/8", NOW)
    assert (m.form, m.pri, m.facility, m.severity) == ("rfc5424", 34, 4, "crit")
    assert m.ts == pytest.approx(utc(2003, 10, 11, 22, 14, 15, 3000))
    assert (m.hostname, m.app_name, m.procid, m.msgid) == ("mymachine.example.com", "su", None, "ID47")
    assert m.sd == {}
    assert m.message == "'su root' failed for lonvick on /dev/pts/8"
    assert m.problem is None


def test_rfc5424_example_2_offset_and_no_bom():
    # RFC 5424 section 6.5, example 2: facility 20 (local4), severity 5 (notice), time with a
    # -07:00 offset and microseconds, PROCID 8710, MSGID unknown, MSG without BOM (MSG-ANY).
    m = parse("<165>1 2003-08-24T05:14:15.000003-07:00 192.0.2.1 myproc 8710 - - %% It's time to make "
              "the do-nuts.", NOW)
    assert (m.facility, m.severity) == (20, "notice")
    assert m.ts == pytest.approx(utc(2003, 8, 24, 12, 14, 15, 3))
    assert (m.hostname, m.app_name, m.procid, m.msgid) == ("192.0.2.1", "myproc", "8710", None)
    assert m.message == "%% It's time to make the do-nuts."


def test_rfc5424_example_3_structured_data():
    # RFC 5424 section 6.5, example 3: one SD-ELEMENT with three parameters, then a BOM and MSG.
    line = ('<165>1 2003-10-11T22:14:15.003Z mymachine.example.com evntslog - ID47 [exampleSDID@32473 '
            f'iut="3" eventSource="Application" eventID="1011"] {BOM}An application event log entry...')
    m = parse(line, NOW)
    assert m.sd == {"exampleSDID@32473": {"iut": "3", "eventSource": "Application", "eventID": "1011"}}
    assert m.message == "An application event log entry..."
    assert m.app_name == "evntslog" and m.msgid == "ID47"


def test_rfc5424_example_4_structured_data_only():
    # RFC 5424 section 6.5, example 4: two SD-ELEMENTs and no MSG at all.
    line = ('<165>1 2003-10-11T22:14:15.003Z mymachine.example.com evntslog - ID47 [exampleSDID@32473 '
            'iut="3" eventSource="Application" eventID="1011"][examplePriority@32473 class="high"]')
    m = parse(line, NOW)
    assert m.sd == {"exampleSDID@32473": {"iut": "3", "eventSource": "Application", "eventID": "1011"},
                    "examplePriority@32473": {"class": "high"}}
    assert m.message == "" and m.problem is None


def test_rfc5424_structured_data_validity_examples():
    # RFC 5424 section 6.3.5: example 3 (a space between elements) is not a second element —
    # read strictly, the second one is the start of MSG; example 4 (a space after "[") is invalid.
    first = '[exampleSDID@32473 iut="3" eventSource="Application" eventID="1011"]'
    sd, end = parse_structured_data(first + ' [examplePriority@32473 class="high"]')
    assert list(sd) == ["exampleSDID@32473"] and end == len(first)
    assert parse_structured_data('[ exampleSDID@32473 iut="3" eventSource="Application" eventID="1011"]'
                                 '[examplePriority@32473 class="high"]') is None
    m = parse('<165>1 2003-10-11T22:14:15.003Z host app - ID47 [ exampleSDID@32473 iut="3"] msg', NOW)
    assert m.problem == "bad_structured_data" and m.message == '[ exampleSDID@32473 iut="3"] msg'


def test_rfc5424_escapes_in_parameter_values():
    # RFC 5424 section 6.3.3: '"', '\' and ']' are escaped with '\'; a backslash before any other
    # character is kept as it is.
    m = parse(r'<13>1 - host app - - [x@1 a="say \"hi\"" b="C:\\dir" c="[1\]" d="tab\t"] body', NOW)
    assert m.sd["x@1"] == {"a": 'say "hi"', "b": "C:\\dir", "c": "[1]", "d": "tab\\t"}
    assert m.ts is None and m.message == "body"  # NILVALUE timestamp


def test_rfc5424_nilvalues_everywhere():
    m = parse("<14>1 - - - - - -", NOW)
    assert (m.ts, m.hostname, m.app_name, m.procid, m.msgid, m.sd, m.message) == (None,) * 5 + ({}, "")
    assert m.severity == "info"


# -- RFC 3164 --------------------------------------------------------------------------------
def test_rfc3164_example_1():
    # RFC 3164 section 5.4, example 1: facility 4, severity 2, HOSTNAME mymachine, TAG "su".
    m = parse("<34>Oct 11 22:14:15 mymachine su: 'su root' failed for lonvick on /dev/pts/8", NOW)
    assert (m.form, m.facility, m.severity, m.hostname, m.app_name) == ("rfc3164", 4, "crit", "mymachine", "su")
    assert m.message == "'su root' failed for lonvick on /dev/pts/8"
    assert m.ts == utc(2026, 10, 11, 22, 14, 15)


def test_rfc3164_example_2_space_padded_day_and_no_tag():
    # RFC 3164 section 5.4, example 2: a day below 10 is space-padded ("Feb  5"); the message
    # has no TAG, so all of "Use the BFG!" is the content.
    m = parse("<13>Feb  5 17:32:18 10.0.0.99 Use the BFG!", NOW)
    assert (m.facility, m.severity, m.hostname, m.app_name) == (1, "notice", "10.0.0.99", None)
    assert m.message == "Use the BFG!"
    assert m.ts == utc(2026, 2, 5, 17, 32, 18)


def test_rfc3164_example_4_relayed():
    # RFC 3164 section 5.4, example 4, as the relay forwards it with its own TIMESTAMP and
    # HOSTNAME in front: the original header ends up in the content.
    m = parse("<0>Oct 22 10:52:12 scapegoat 1990 Oct 22 10:52:01 TZ-6 scapegoat.dmz.example.org 10.1.2.3 "
              "sched[0]: That's All Folks!", NOW)
    assert (m.severity, m.facility, m.hostname) == ("emerg", 0, "scapegoat")
    assert m.message.startswith("1990 Oct 22 10:52:01 TZ-6") and m.message.endswith("sched[0]: That's All Folks!")


@pytest.mark.parametrize("line,year", [
    ("<13>Nov 30 11:00:00 h a: x", 2026),  # earlier today
    ("<13>Dec  1 06:00:00 h a: x", 2026),  # tomorrow in a zone ahead of UTC: within the slack
    ("<13>Dec 25 00:00:00 h a: x", 2025),  # weeks ahead: must be last year's
    ("<13>Jan  1 00:00:00 h a: x", 2026),
], ids=["earlier-today", "within-a-day", "weeks-ahead", "new-year"])
def test_rfc3164_year_is_never_in_the_future(line, year):
    m = parse(line, NOW)
    assert datetime.fromtimestamp(m.ts, tz=timezone.utc).year == year
    assert m.ts <= NOW + 86400


def test_rfc3164_year_around_new_year_and_leap_day():
    new_years_eve = utc(2026, 12, 31, 23, 30)
    assert parse("<13>Jan  1 00:10:00 h a: x", new_years_eve).ts == utc(2027, 1, 1, 0, 10)
    # Feb 29 exists in 2024, not in 2025 or 2026
    assert parse("<13>Feb 29 08:00:00 h a: x", NOW).ts == utc(2024, 2, 29, 8)


def test_file_forms_without_pri():
    # what syslog daemons write to /var/log: the BSD header without <PRI>, or an RFC 3339 stamp
    m = parse("Nov 29 08:01:02 locker-gw sshd[4242]: Accepted publickey for ops", NOW)
    assert (m.pri, m.severity, m.app_name, m.procid, m.message) == (None, None, "sshd", "4242",
                                                                    "Accepted publickey for ops")
    m = parse("2026-11-29T08:01:02.250+01:00 locker-gw systemd[1]: Started backup.service.", NOW)
    assert m.form == "rfc3339-file" and m.ts == utc(2026, 11, 29, 7, 1, 2, 250000) and m.procid == "1"


# -- records, keys, rejects ------------------------------------------------------------------
def test_session_key_from_header_sd_or_regex():
    line = ('<165>1 2003-10-11T22:14:15.003Z mymachine.example.com evntslog 77 ID47 [exampleSDID@32473 '
            'iut="3" eventID="1011"] order=ab12 reserved')
    keys = {f: fmt(session_field=f).feed(line, 0)[0].key
            for f in ("hostname", "app_name", "procid", "msgid", "[exampleSDID@32473 eventID]")}
    assert keys == {"hostname": "mymachine.example.com", "app_name": "evntslog", "procid": "77",
                    "msgid": "ID47", "[exampleSDID@32473 eventID]": "1011"}
    [rec] = fmt(session_key=r"order=(?P<key>\w+)").feed(line, 0)
    assert rec.key == "ab12"
    # the field is missing (NILVALUE procid): the regex is the fallback
    [rec] = fmt(session_field="procid", session_key=r"order=(?P<key>\w+)").feed(
        "<13>1 - h app - - - order=zz9 done", 0)
    assert rec.key == "zz9"


def test_record_fields_and_message_is_mined():
    [rec] = fmt().feed("<11>1 2026-11-30T10:00:00Z h app 1 - - door 4 jammed", 12)
    assert isinstance(rec, Record)  # a clean line: one record, no rejection
    assert (rec.level, rec.message, rec.event, rec.offset, rec.ts) == ("err", "door 4 jammed", None, 12,
                                                                      utc(2026, 11, 30, 10))


@pytest.mark.parametrize("line,reason,kept", [
    ("", "empty", False),
    ("not a syslog line at all", "not_syslog", True),
    ("<200>1 2026-11-30T10:00:00Z h a - - - x", "bad_pri", True),
    ("<13>1 2026-13-30T10:00:00Z h a - - - x", "bad_timestamp", True),
    ("<13>1 2026-11-30 10:00:00 h a - - - x", "bad_timestamp", True),
    ('<13>1 - h a - - [id p="unterminated] x', "bad_structured_data", True),
    ("<13>Feb 30 10:00:00 h a: x", "bad_timestamp", True),
], ids=["empty", "not-syslog", "pri-over-191", "month-13", "not-rfc3339", "open-quote", "feb-30"])
def test_bad_lines_are_rejected_by_reason_and_kept(line, reason, kept):
    [out] = fmt().feed(line, 0)
    assert isinstance(out, Rejection) and out.reason == reason
    assert (out.record is not None) == kept


def test_config_errors_name_the_key():
    with pytest.raises(ConfigError, match=r"session_field: use hostname"):
        parse_config({"sources": [{"name": "s", "format": "syslog", "session_field": "pid"}]})
    with pytest.raises(ConfigError, match=r'session_field: only used with format = "syslog"'):
        parse_config({"sources": [{"name": "s", "format": "text", "session_field": "procid"}]})
    with pytest.raises(ConfigError, match=r"session_key: .*\(\?P<key>"):
        parse_config({"sources": [{"name": "s", "format": "syslog", "session_key": "req=\\w+"}]})
