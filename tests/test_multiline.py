"""Multi-line text records: a Python traceback written by the standard ``logging`` module stays
one record with its stack, up to ``continuation_max`` lines."""

from __future__ import annotations

import io
import logging

import pytest

from tracewatch.config import SourceConfig, parse_config
from tracewatch.formats import feed_lines
from tracewatch.formats.text import TextFormat
from tracewatch.pipeline import Pipeline
from tracewatch.records import Record, Rejection

# logging's "%(asctime)s" is "YYYY-MM-DD HH:MM:SS,mmm" (Python docs, logging.Formatter.formatTime)
PATTERN = r"^(?P<ts>\d{4}-\d\d-\d\d \d\d:\d\d:\d\d,\d{3}) (?P<level>[A-Z]+) (?P<logger>\S+) (?P<message>.*)$"
NOT_A_NEW_RECORD = r"^(?!\d{4}-\d\d-\d\d \d\d:\d\d:\d\d,\d{3} )"


def logging_output() -> tuple[list[str], int]:
    """Lines Python's logging module writes for four calls, one of them logging a chained
    exception with its traceback; and how many lines that record spans."""
    stream = io.StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s %(message)s"))
    log = logging.getLogger("lockers.test_multiline")
    log.addHandler(handler)
    log.propagate = False
    log.setLevel(logging.INFO)
    try:
        log.info("door 7 opened on locker LK-204")
        try:
            try:
                {}["compartment"]
            except KeyError as exc:
                raise RuntimeError("reservation failed for parcel PX1234") from exc
        except RuntimeError:
            log.exception("deposit aborted for courier CR2001")
        log.warning("retrying deposit for courier CR2001")
        log.info("door 7 closed after 1200ms")
    finally:
        log.removeHandler(handler)
    lines = stream.getvalue().splitlines()
    start = next(i for i, x in enumerate(lines) if "deposit aborted" in x)
    end = next(i for i, x in enumerate(lines) if "retrying deposit" in x)
    return lines, end - start


def test_traceback_stays_with_its_record():
    lines, span = logging_output()
    # the chained traceback has the blank lines and the "direct cause" sentence Python prints
    assert "" in lines and any("direct cause" in x for x in lines) and lines[2] == "Traceback (most recent call last):"
    out = feed_lines(TextFormat(SourceConfig(name="app", line_pattern=PATTERN, continuation_pattern=NOT_A_NEW_RECORD)),
               lines)
    assert all(isinstance(r, Record) for r in out)
    assert [r.message for r in out] == ["door 7 opened on locker LK-204", "deposit aborted for courier CR2001",
                                        "retrying deposit for courier CR2001", "door 7 closed after 1200ms"]
    err = out[1]
    assert err.level == "ERROR" and err.raw.count("\n") + 1 == span
    assert err.raw.splitlines()[-1] == "RuntimeError: reservation failed for parcel PX1234"
    assert "KeyError: 'compartment'" in err.raw
    # every line is accounted for: in a record's raw text, once
    assert sum(r.raw.count("\n") + 1 for r in out) == len(lines)


def test_continuation_lines_over_the_cap_are_counted_not_kept():
    lines, span = logging_output()
    fmt = TextFormat(SourceConfig(name="app", line_pattern=PATTERN, continuation_pattern=NOT_A_NEW_RECORD,
                                  continuation_max=3))
    out = feed_lines(fmt, lines)
    records = [r for r in out if isinstance(r, Record)]
    capped = [r for r in out if isinstance(r, Rejection)]
    assert len(records) == 4 and records[1].raw.count("\n") == 3
    assert {r.reason for r in capped} == {"continuation_cap"} and len(capped) == span - 1 - 3
    assert sum(r.raw.count("\n") + 1 for r in records) + len(capped) == len(lines)


def test_without_a_continuation_pattern_each_line_is_its_own_record():
    lines, span = logging_output()
    out = feed_lines(TextFormat(SourceConfig(name="app", line_pattern=PATTERN)), lines)
    reasons = [r.reason for r in out if isinstance(r, Rejection)]
    # the stack lines do not match the pattern: counted as no_match (and kept), blank ones as empty
    assert reasons.count("no_match") + reasons.count("empty") == span - 1 and reasons.count("empty") >= 1


def test_through_the_pipeline_the_stack_adds_no_templates(tmp_path):
    lines, _ = logging_output()
    cfg = parse_config({"state_dir": str(tmp_path), "sources": [
        {"name": "app", "line_pattern": PATTERN, "continuation_pattern": NOT_A_NEW_RECORD}]})
    pipe = Pipeline(cfg)
    for i, line in enumerate(lines):
        pipe.feed_line("app", "app.log", line, i)
    pipe.flush()
    assert pipe.records["app"] == 4 and not pipe.rejected and pipe.lines["app"] == len(lines)
    assert len(pipe.miner.templates) <= 4


@pytest.mark.parametrize("bad", ["(", "a[", "(?P<x"])
def test_a_bad_continuation_pattern_is_a_config_error(bad):
    from tracewatch.errors import ConfigError

    with pytest.raises(ConfigError, match="continuation_pattern: invalid regular expression"):
        parse_config({"sources": [{"name": "app", "continuation_pattern": bad}]})
