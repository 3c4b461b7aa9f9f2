"""Formats text and jsonl: named groups, session keys, kept rejects, Python logging's own output."""

from __future__ import annotations

import io
import logging
import time
from datetime import datetime, timezone

import orjson
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tracewatch.config import SourceConfig
from tracewatch.formats import _iso_block, items, parse_timestamp, timestamps
from tracewatch.formats.jsonl import JsonlFormat
from tracewatch.formats.text import TextFormat
from tracewatch.records import Record, Rejection


def test_text_groups_and_key():
    src = SourceConfig(name="api", line_pattern=r"^(?P<ts>\S+) (?P<level>[A-Z]+) (?P<message>.*)$",
                       session_key=r"req=(?P<key>[0-9a-f]+)")
    fmt = TextFormat(src)
    [rec] = items(fmt.feed("2026-11-30T10:00:00.250Z INFO req=ab12 door 5 opened", 42))
    assert isinstance(rec, Record)
    assert rec.key == "ab12" and rec.level == "INFO" and rec.message == "req=ab12 door 5 opened"
    assert rec.ts == datetime(2026, 11, 30, 10, 0, 0, 250000, tzinfo=timezone.utc).timestamp()
    assert rec.offset == 42


def test_text_line_not_matching_is_kept_and_counted():
    fmt = TextFormat(SourceConfig(name="api", line_pattern=r"^(?P<level>[A-Z]+): (?P<message>.*)$"))
    [rej] = fmt.feed("garbage without a level", 0)
    assert isinstance(rej, Rejection) and rej.reason == "no_match"
    assert rej.record is not None and rej.record.message == "garbage without a level"
    [empty] = fmt.feed("   ", 10)
    assert empty.reason == "empty" and empty.record is None


def test_text_without_pattern_uses_whole_line():
    rec = TextFormat(SourceConfig(name="x")).feed("hello world 17", 0)
    assert isinstance(rec, Record)  # the one-line-one-record fast path returns it bare
    assert rec.message == "hello world 17" and rec.key is None


def test_python_logging_default_format_is_read():
    # Python's logging module writes asctime as "YYYY-MM-DD HH:MM:SS,mmm" (logging docs,
    # Formatter.formatTime); with Formatter.converter = time.gmtime the time is UTC. The line is
    # produced by the real module, then parsed back and compared with LogRecord.created.
    stream = io.StringIO()
    created: list[float] = []
    logger = logging.getLogger("tracewatch-test-logging")
    logger.propagate = False
    handler = logging.StreamHandler(stream)
    formatter = logging.Formatter("%(asctime)s %(levelname)s %(name)s %(message)s")
    formatter.converter = time.gmtime
    handler.setFormatter(formatter)
    handler.addFilter(lambda r: created.append(r.created) or True)
    logger.addHandler(handler)
    logger.warning("compartment %d jammed", 7)
    logger.removeHandler(handler)
    line = stream.getvalue().rstrip("\n")
    src = SourceConfig(name="py", line_pattern=r"^(?P<ts>\S+ \S+) (?P<level>[A-Z]+) (?P<logger>\S+) (?P<message>.*)$")
    [rec] = items(TextFormat(src).feed(line, 0))
    assert rec.level == "WARNING" and rec.message == "compartment 7 jammed"
    assert abs(rec.ts - created[0]) < 0.001  # asctime keeps milliseconds


def test_parse_timestamp_forms():
    # RFC 3339 section 5.8 examples (from the RFC text)
    assert parse_timestamp("1985-04-12T23:20:50.52Z") == datetime(1985, 4, 12, 23, 20, 50, 520000, tzinfo=timezone.utc).timestamp()
    assert parse_timestamp("1996-12-19T16:39:57-08:00") == datetime(1996, 12, 20, 0, 39, 57, tzinfo=timezone.utc).timestamp()
    assert parse_timestamp("1700000000") == 1700000000.0
    assert parse_timestamp("1700000000123") == 1700000000.123
    assert parse_timestamp("not a time") is None


def test_jsonl_fields_and_rejects():
    src = SourceConfig(name="app", format="jsonl", message_field="msg", session_key="ctx.req",
                       time_field="t", level_field="lvl", event_field="kind")
    fmt = JsonlFormat(src)
    line = orjson.dumps({"t": 1700000000.5, "lvl": "info", "msg": "door 3 opened", "ctx": {"req": 77}}).decode()
    rec = fmt.feed(line, 5)
    assert isinstance(rec, Record)  # handed on bare
    assert (rec.key, rec.ts, rec.level, rec.message, rec.event) == ("77", 1700000000.5, "info", "door 3 opened", None)
    [rec] = items(fmt.feed('{"kind": "door.open", "ctx": {"req": "a"}}', 0))
    assert rec.event == "door.open"
    [bad] = fmt.feed('{"msg": "unterminated', 0)
    assert bad.reason == "bad_json" and bad.record is None
    [arr] = fmt.feed("[1, 2]", 0)
    assert arr.reason == "not_an_object"
    [nomsg] = fmt.feed('{"other": 1}', 0)
    assert nomsg.reason == "no_message_field" and nomsg.record is not None


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


def test_match_block_equals_the_per_line_path():
    """The block readers (text and jsonl) give exactly the fields the per-line path gives,
    and decline (None) a block holding any line the per-line path would reject."""
    text_src = SourceConfig(name="t", line_pattern=r"^(?P<ts>\S+) (?P<level>[A-Z]+) (?P<message>.*)$",
                            session_key=r"req=(?P<key>\w+)")
    json_src = SourceConfig(name="j", format="jsonl", message_field="msg", session_key="req", time_field="t")
    text_lines = [f"2026-11-30T10:00:0{i}.5Z INFO req=k{i % 3} door {i} opened" for i in range(9)]
    json_lines = [orjson.dumps({"t": t, "msg": f"door {i} opened", "req": i % 3}).decode()
                  for i, t in enumerate(["2026-11-30T10:00:00Z", 1764496800, 1764496800123] * 3)]
    for fmt, lines in ((TextFormat(text_src), text_lines), (JsonlFormat(json_src), json_lines)):
        keys, stamps, messages = fmt.match_block(lines)
        one_by_one = [r for line in lines for r in items(fmt.feed(line, 0))]
        assert keys == [r.key for r in one_by_one]
        assert stamps == [r.ts for r in one_by_one]
        assert messages == [r.message for r in one_by_one]
        assert fmt.match_block(lines + ["", "{not json"]) is None


_LAYOUT = st.tuples(st.sampled_from("T "), st.integers(0, 6), st.sampled_from(".,"),
                    st.sampled_from(["", "Z", "+00:00", "+05:30", "-08:00", "+14:00", "-23:59"]))
_MOMENT = st.datetimes(min_value=datetime(1700, 1, 1), max_value=datetime(2255, 1, 1))  # exact as doubles


@settings(max_examples=300, deadline=None)
@given(layout=_LAYOUT, moments=st.lists(_MOMENT, min_size=1, max_size=40))
def test_block_timestamps_equal_datetime(layout, moments):
    """``timestamps`` of a block sharing one layout (the numpy path) equals, exactly,
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
    assert _iso_block(texts) is not None  # this layout takes the block path
    assert timestamps(texts) == expected


@pytest.mark.parametrize("texts", [
    ["2026-11-30T10:00:00Z", "2026-11-30T10:00:01+01:00"],  # layouts differ
    ["2026-02-30T10:00:00Z"],  # no such day
    ["2026-11-30T24:00:00Z"],  # no such hour
    ["2026-11-30T10:00:00.1234567Z"],  # beyond microseconds
    ["2026-11-30T10:00:00Z", "2026-11-30T10:00:0xZ"],  # not a digit
], ids=["mixed-layouts", "february-30", "hour-24", "nanoseconds", "not-a-digit"])
def test_block_timestamps_fall_back_to_the_general_path(texts):
    assert _iso_block(texts) is None
    assert timestamps(texts) == [parse_timestamp(t) for t in texts]
