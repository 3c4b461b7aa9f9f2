"""Timestamps: every layout read as Python's own datetime reads it, one text or a block at once."""

from __future__ import annotations

from datetime import datetime, timezone

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tracewatch.timestamps import (LAYOUTS, StampReader, check_ts_format, iso8601_numpy, parse_timestamp,
                                   syslog_yearless)


def test_parse_timestamp_forms():
    # RFC 3339 section 5.8 examples (from the RFC text)
    assert parse_timestamp("1985-04-12T23:20:50.52Z") == datetime(1985, 4, 12, 23, 20, 50, 520000, tzinfo=timezone.utc).timestamp()
    assert parse_timestamp("1996-12-19T16:39:57-08:00") == datetime(1996, 12, 20, 0, 39, 57, tzinfo=timezone.utc).timestamp()
    assert parse_timestamp("1700000000") == 1700000000.0
    assert parse_timestamp("1700000000123") == 1700000000.123
    assert parse_timestamp("not a time") is None


def test_parse_timestamp_equals_datetime():
    # parse_timestamp must give exactly what datetime.fromisoformat().timestamp() gives
    import random

    rng = random.Random(1)
    for _ in range(2000):
        base = datetime(2026, 1, 1, tzinfo=timezone.utc).timestamp() + rng.randrange(0, 3 * 86400)
        micros = rng.randrange(0, 10**6)
        digits = rng.choice([1, 2, 3, 6])
        frac = f"{micros:06d}"[:digits]
        text = datetime.fromtimestamp(base, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%S") + "." + frac
        for zone in ("Z", "+02:00", ""):
            expected = datetime.fromisoformat(text + zone).replace(
                tzinfo=datetime.fromisoformat(text + zone).tzinfo or timezone.utc).timestamp()
            assert parse_timestamp(text + zone) == expected
        comma = text.replace(".", ",")
        assert parse_timestamp(comma) == parse_timestamp(text)


_LAYOUT = st.tuples(st.sampled_from("T "), st.integers(0, 6), st.sampled_from(".,"),
                    st.sampled_from(["", "Z", "+00:00", "+05:30", "-08:00", "+14:00", "-23:59"]))
_MOMENT = st.datetimes(min_value=datetime(1700, 1, 1), max_value=datetime(2255, 1, 1))  # exact as doubles


@settings(max_examples=300, deadline=None)
@given(layout=_LAYOUT, moments=st.lists(_MOMENT, min_size=1, max_size=40))
def test_block_timestamps_equal_datetime(layout, moments):
    """``StampReader().many`` of a block sharing one layout (the numpy path) equals, exactly,
    Python's own ``datetime.fromisoformat(...).timestamp()`` of each text (the reference;
    times without a zone taken as UTC, as parse_timestamp does)."""
    sep, frac, dot, zone = layout
    texts = []
    for m in moments:
        text = m.strftime(f"%Y-%m-%d{sep}%H:%M:%S")
        if frac:
            text += dot + f"{m.microsecond:06d}"[:frac]
        texts.append(text + zone)
    expected = []
    for text in texts:
        dt = datetime.fromisoformat(text.replace(",", "."))
        expected.append(dt.replace(tzinfo=dt.tzinfo or timezone.utc).timestamp())
    assert iso8601_numpy(texts) is not None  # this layout takes the block path
    assert StampReader().many(texts) == expected


@pytest.mark.parametrize("texts", [
    ["2026-11-30T10:00:00Z", "2026-11-30T10:00:01+01:00"],  # layouts differ
    ["2026-02-30T10:00:00Z"],  # no such day
    ["2026-11-30T24:00:00Z"],  # no such hour
    ["2026-11-30T10:00:00.1234567Z"],  # beyond microseconds
    ["2026-11-30T10:00:00Z", "2026-11-30T10:00:0xZ"],  # not a digit
], ids=["mixed-layouts", "february-30", "hour-24", "nanoseconds", "not-a-digit"])
def test_block_timestamps_fall_back_to_the_general_path(texts):
    assert iso8601_numpy(texts) is None
    assert StampReader().many(texts) == [parse_timestamp(t) for t in texts]


_ISO_TEXT = st.tuples(_LAYOUT, _MOMENT).map(
    lambda t: t[1].strftime(f"%Y-%m-%d{t[0][0]}%H:%M:%S") + (t[0][2] + "123456"[:t[0][1]] if t[0][1] else "") + t[0][3])


@pytest.mark.parametrize("layout", [x for x in LAYOUTS.values() if x.block is not None], ids=lambda x: x.name)
@settings(max_examples=200, deadline=None)
@given(texts=st.lists(st.one_of(_ISO_TEXT, _ISO_TEXT.map(lambda t: t[:-1]), st.text(max_size=30)), max_size=20))
def test_every_block_reader_equals_its_one_text_reader(layout, texts):
    """A layout's block reader, where it answers, gives what its one-text reader gives; and
    a StampReader's ``many`` of any texts is ``parse_timestamp`` of each."""
    got = layout.block(texts)
    if got is not None:
        assert got == [layout.one(t) for t in texts]
    assert StampReader().many([*texts, None]) == [*map(parse_timestamp, texts), None]


# -- the other common layouts: expected values computed with datetime(..., tzinfo=utc).timestamp()
_UTC = timezone.utc


@pytest.mark.parametrize(("text", "expected"), [
    ("2026-12-02 07:40:34.082 UTC", datetime(2026, 12, 2, 7, 40, 34, 82000, tzinfo=_UTC)),  # PostgreSQL %m
    ("2026-12-02 07:40:34 UTC", datetime(2026, 12, 2, 7, 40, 34, tzinfo=_UTC)),  # PostgreSQL %t
    ("2026-12-02 10:40:34.082 +03", datetime(2026, 12, 2, 7, 40, 34, 82000, tzinfo=_UTC)),
    ("[Sun Dec 04 04:47:44 2005]", datetime(2005, 12, 4, 4, 47, 44, tzinfo=_UTC)),  # Apache httpd 2.2
    ("Sun Dec 04 04:47:44.123456 2005", datetime(2005, 12, 4, 4, 47, 44, 123456, tzinfo=_UTC)),  # 2.4
    ("081109 203615", datetime(2008, 11, 9, 20, 36, 15, tzinfo=_UTC)),
    ("2015-07-29 17:41:44,747", datetime(2015, 7, 29, 17, 41, 44, 747000, tzinfo=_UTC)),  # log4j
])
def test_common_layouts(text, expected):
    assert parse_timestamp(text) == expected.timestamp()
    assert StampReader().many([text, text]) == [expected.timestamp()] * 2


def test_named_layout_and_strptime_pattern():
    assert StampReader("yymmdd").one("081109 203615") == datetime(2008, 11, 9, 20, 36, 15, tzinfo=_UTC).timestamp()
    assert StampReader("yymmdd").one("2008-11-09T20:36:15Z") is None  # a set layout reads only itself
    clf = StampReader("%d/%b/%Y:%H:%M:%S %z")  # web server access logs
    assert clf.one("10/Oct/2000:13:55:36 -0700") == datetime(2000, 10, 10, 20, 55, 36, tzinfo=_UTC).timestamp()
    with pytest.raises(ValueError, match="neither a layout"):
        check_ts_format("dd-mm-yyyy")


@pytest.mark.parametrize(("ref", "expected"), [
    (datetime(2026, 12, 2, 8, 0, tzinfo=_UTC), datetime(2026, 12, 2, 7, 40, 34, tzinfo=_UTC)),
    (datetime(2027, 1, 1, 0, 5, tzinfo=_UTC), datetime(2026, 12, 2, 7, 40, 34, tzinfo=_UTC)),  # Dec read in Jan
    (datetime(2026, 12, 1, 12, 0, tzinfo=_UTC), datetime(2026, 12, 2, 7, 40, 34, tzinfo=_UTC)),  # < 1 day skew
    (datetime(2026, 11, 30, 0, 0, tzinfo=_UTC), datetime(2025, 12, 2, 7, 40, 34, tzinfo=_UTC)),
])
def test_syslog_year_inference(ref, expected):
    assert syslog_yearless("Dec  2 07:40:34", ref.timestamp()) == expected.timestamp()


def test_jan_stamp_read_just_before_new_year():
    ref = datetime(2026, 12, 31, 23, 59, tzinfo=_UTC).timestamp()
    assert syslog_yearless("Jan  1 00:00:10", ref) == datetime(2027, 1, 1, 0, 0, 10, tzinfo=_UTC).timestamp()
    assert syslog_yearless("Feb 29 10:00:00", datetime(2026, 3, 1, tzinfo=_UTC).timestamp()) == \
        datetime(2024, 2, 29, 10, tzinfo=_UTC).timestamp()


def test_auto_detection_keeps_the_first_layout():
    reader = StampReader()
    assert reader.many(["081109 203615", "081109 203616"])[1] == datetime(2008, 11, 9, 20, 36, 16, tzinfo=_UTC).timestamp()
    assert reader.layout is LAYOUTS["yymmdd"]
    assert reader.one("garbage") is None and reader.layout is LAYOUTS["yymmdd"]


def test_text_source_with_ts_format(tmp_path):
    from tracewatch.config import parse_config
    from tracewatch.formats import make_format

    cfg = parse_config({"state_dir": str(tmp_path), "sources": [{
        "name": "db", "ts_format": "postgres",
        "line_pattern": r"^(?P<ts>\S+ \S+ \S+) \[(?P<key>\d+)\] (?P<message>.*)$"}]})
    fmt = make_format(cfg.sources[0])
    cols = fmt.read_block(["2026-12-02 07:40:34.082 UTC [4242] LOG:  checkpoint starting: time",
                           "2026-12-02 07:40:35.100 UTC [4242] LOG:  checkpoint complete"], [0, 1])
    assert cols.times == [datetime(2026, 12, 2, 7, 40, 34, 82000, tzinfo=_UTC).timestamp(),
                          datetime(2026, 12, 2, 7, 40, 35, 100000, tzinfo=_UTC).timestamp()]
    with pytest.raises(Exception, match="ts_format"):
        parse_config({"sources": [{"name": "db", "ts_format": "nope"}]})


def test_jsonl_source_with_ts_format(tmp_path):
    from tracewatch.config import parse_config
    from tracewatch.formats import make_format

    cfg = parse_config({"sources": [{"name": "jobs", "format": "jsonl", "ts_format": "asctime", "session_key": "job"}]})
    cols = make_format(cfg.sources[0]).read_block(
        ['{"time": "Sun Dec 04 04:47:44 2005", "job": "j1", "message": "slot 3 assigned"}'], [0])
    assert cols.times == [datetime(2005, 12, 4, 4, 47, 44, tzinfo=_UTC).timestamp()]
    with pytest.raises(Exception, match="ts_format: only used with"):
        parse_config({"sources": [{"name": "t", "format": "syslog", "ts_format": "asctime"}]})
