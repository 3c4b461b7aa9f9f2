"""Every registered format, by the same rules: its block reader gives exactly what its
per-record parser gives, line after line, for any lines cut into blocks of any size.

Covers each format in ``tracewatch.formats.FORMATS`` automatically, with the source options and
lines the format declares in ``samples``, mutated and mixed with lines no format reads (empty,
blank, non-ASCII, cut short, decoded with replacement characters as the readers mend invalid
UTF-8)."""

from __future__ import annotations

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tracewatch.config import SourceConfig
from tracewatch.formats import FORMATS, Columns, Format, collect, feed_lines, format_class, make_format
from tracewatch.records import Record

CASES = [(name, i) for name in FORMATS for i in range(len(format_class(name).samples))]


def _source(name: str, options: dict) -> SourceConfig:
    return SourceConfig(name="src", format=name, **options)


def _rows(cols: Columns) -> tuple:
    return (cols.keys, cols.times, cols.levels, cols.messages, cols.events, cols.raws, cols.offsets,
            [(r.reason, r.raw, r.record) for r in cols.rejected])


@st.composite
def _lines(draw, samples: list[str]) -> list[str]:
    """Lines around a format's own: as they are, cut, with text put in, as the batch reader mends
    invalid bytes, or anything at all."""
    sample = st.sampled_from(samples)
    cut = st.tuples(sample, st.integers(0, 200)).map(lambda t: t[0][:t[1]])
    spliced = st.tuples(sample, st.integers(0, 200), st.text(max_size=8)).map(lambda t: t[0][:t[1]] + t[2] + t[0][t[1]:])
    mended = st.tuples(sample, st.binary(max_size=4)).map(
        lambda t: (t[0].encode() + b"\xff" + t[1]).decode("utf-8", errors="replace"))
    other = st.one_of(st.just(""), st.just("   "), st.text(max_size=40),
                      st.text(st.characters(min_codepoint=128), max_size=12))
    weighted = st.one_of(sample, sample, sample, cut, spliced, mended, other)
    return draw(st.lists(weighted, max_size=60))


def test_every_format_is_registered_with_samples():
    for name in FORMATS:
        cls = format_class(name)
        assert issubclass(cls, Format) and cls.name == name
        assert cls.samples, f"{name}: declare samples (source options and lines) for the shared tests"
        for options, lines in cls.samples:
            assert any(type(x) is Record for x in feed_lines(make_format(_source(name, options)), lines)), \
                f"{name}: samples {options} give no record"


@pytest.mark.parametrize("name, case", CASES, ids=[f"{n}-{i}" for n, i in CASES])
@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_block_reader_equals_the_per_record_parser(name, case, data):
    options, samples = format_class(name).samples[case]
    src = _source(name, options)
    lines = data.draw(_lines(samples), label="lines")
    offsets = list(range(0, 100 * len(lines), 100))
    cuts = sorted(data.draw(st.lists(st.integers(0, len(lines)), max_size=6), label="cuts"))

    one = make_format(src)
    held = {}
    expected = []
    for i, (line, offset) in enumerate(zip(lines, offsets)):
        held[i] = one.held_from
        expected.append(one.feed(line, offset))
    held[len(lines)] = one.held_from
    expected.append(one.flush())

    block = make_format(src)
    got = Columns.of([])
    for lo, hi in zip([0, *cuts], [*cuts, len(lines)]):
        assert block.held_from == held[lo]
        got.extend(block.read_block(lines[lo:hi], offsets[lo:hi]))
    assert block.held_from == held[len(lines)]
    got.extend(block.finish())
    assert _rows(got) == _rows(collect(expected))
    assert {r.reason for r in got.rejected} <= set(format_class(name).reject_reasons(src))  # (metrics start them at 0)
    assert all(type(m) is str for m in got.messages)
