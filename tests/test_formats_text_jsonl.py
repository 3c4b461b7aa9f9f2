"""Formats text and jsonl: named groups, session keys, kept rejects, Python logging's own output."""

from __future__ import annotations

import io
import logging
import time
from datetime import datetime, timezone

import orjson

from tracewatch.config import SourceConfig
from tracewatch.formats.jsonl import JsonlFormat
from tracewatch.formats.text import TextFormat
from tracewatch.records import Record, Rejection


def test_text_groups_and_key():
    src = SourceConfig(name="api", line_pattern=r"^(?P<ts>\S+) (?P<level>[A-Z]+) (?P<message>.*)$",
                       session_key=r"req=(?P<key>[0-9a-f]+)")
    fmt = TextFormat(src)
    [rec] = fmt.feed("2026-11-30T10:00:00.250Z INFO req=ab12 door 5 opened", 42)
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
    [rec] = TextFormat(SourceConfig(name="x")).feed("hello world 17", 0)
    assert isinstance(rec, Record)
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
    [rec] = TextFormat(src).feed(line, 0)
    assert rec.level == "WARNING" and rec.message == "compartment 7 jammed"
    assert abs(rec.ts - created[0]) < 0.001  # asctime keeps milliseconds


def test_jsonl_fields_and_rejects():
    src = SourceConfig(name="app", format="jsonl", message_field="msg", session_key="ctx.req",
                       time_field="t", level_field="lvl", event_field="kind")
    fmt = JsonlFormat(src)
    line = orjson.dumps({"t": 1700000000.5, "lvl": "info", "msg": "door 3 opened", "ctx": {"req": 77}}).decode()
    [rec] = fmt.feed(line, 5)
    assert isinstance(rec, Record)
    assert (rec.key, rec.ts, rec.level, rec.message, rec.event) == ("77", 1700000000.5, "info", "door 3 opened", None)
    [rec] = fmt.feed('{"kind": "door.open", "ctx": {"req": "a"}}', 0)
    assert rec.event == "door.open"
    [bad] = fmt.feed('{"msg": "unterminated', 0)
    assert bad.reason == "bad_json" and bad.record is None
    [arr] = fmt.feed("[1, 2]", 0)
    assert arr.reason == "not_an_object"
    [nomsg] = fmt.feed('{"other": 1}', 0)
    assert nomsg.reason == "no_message_field" and nomsg.record is not None
