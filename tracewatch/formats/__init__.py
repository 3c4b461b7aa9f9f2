"""Formats: turn decoded lines into records.

Stage: sources → **formats** → templates. One module per input format, each a subclass of
:class:`Format` registered in :data:`FORMATS`. A format writes one thing, its per-record parser
``feed(line, offset)`` (and ``flush()`` for what it holds back at the end of a stream); both
give a list of :class:`~tracewatch.records.Record` and :class:`~tracewatch.records.Rejection`.
The pipeline reads a block of lines at a time through :meth:`Format.read_block`, which hands on
one :class:`~tracewatch.records.Columns` value (the records as columns, the rejections beside
them); its default loops over ``feed``, and a format may override it for speed as long as it
gives exactly what the loop gives (``tests/test_formats.py`` checks that for every format in
the table). A format never raises for bad data: it rejects the line with a reason, keeping it
as a whole-line record when that still makes sense.

Adding a format: a module here with a :class:`Format` subclass (its ``name``, ``feed``, and
``samples``: a few source options and lines it reads, which the shared tests use), one line in
:data:`FORMATS`, and a test module of its own.
"""

from __future__ import annotations

import importlib
import time
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, ClassVar

import orjson

from ..records import Columns, Record, Rejection
from ..timestamps import parse_timestamp

if TYPE_CHECKING:  # the config imports this table; the formats import the config only when used
    from ..config import SourceConfig

Output = list  # list[Record | Rejection]: what feed and flush give

# format name (as in the config) -> "module:class" in this package: text (it reads anything) first,
# then the structured formats most specific first (`tracewatch init` prefers the earlier on a tie)
FORMATS: dict[str, str] = {
    "text": "text:TextFormat",
    "otlp-json": "otlp:OtlpJsonFormat",
    "otlp-logs-json": "otlp_logs:OtlpLogsJsonFormat",
    "journald": "journald:JournaldFormat",
    "cri": "container:CriFormat",
    "docker-json": "container:DockerJsonFormat",
    "syslog": "syslog:SyslogFormat",
    "strace": "strace:StraceFormat",
    "jsonl": "jsonl:JsonlFormat",
}


class Format:
    """One source's reader of one stream (a fresh object per file being read)."""

    name: ClassVar[str]
    # (source options, lines): what the format reads, for its docs and the shared tests
    samples: ClassVar[list[tuple[dict, list[str]]]] = []
    # records of one session may arrive out of time order (a trace's spans in several exports,
    # from several files): the session's events are put in time order when it closes
    by_time: ClassVar[bool] = False
    # the reasons it may reject a line for (the metrics show each at 0 from the start)
    reasons: ClassVar[tuple[str, ...]] = ()

    def __init__(self, src: SourceConfig) -> None:
        self.source = src.name
        self.today: Callable[[], float] | None = None  # see dated_by (None: the wall clock)

    def open_stream(self, stream: str) -> None:
        """Told the name of the stream it reads before the first line (a file's path in batch
        runs, ``path@dev:ino`` live); formats that take something from a file's name use it."""

    def dated_by(self, today: Callable[[], float]) -> None:
        """Told what "now" is for stamps without a year or date (the wall clock unless told: a
        file replayed in batch is dated by its modification time); formats read it by :meth:`now`."""
        self.today = today

    def now(self) -> float:
        """"Now" for stamps without a year or date (:meth:`dated_by`)."""
        return time.time() if self.today is None else self.today()

    @classmethod
    def reject_reasons(cls, src: SourceConfig) -> tuple[str, ...]:
        """The reasons this format, with ``src``'s options, may reject a line for."""
        return cls.reasons

    @staticmethod
    def alert_fields(src: SourceConfig, key: str | None) -> dict:
        """Fields this format adds to an alert of a session with session key ``key``."""
        return {}

    def feed(self, line: str, offset: int) -> Output:
        """The records (and rejections) of one line; a format holding lines back (a multi-line
        record not yet complete) may give nothing now and more later."""
        raise NotImplementedError

    def flush(self) -> Output:
        """What the format still holds at the end of a stream."""
        return []

    @property
    def held_from(self) -> int | None:
        """Offset of the first line still held back (a checkpoint resumes the stream there)."""
        return None

    def read_block(self, lines: Sequence[str], offsets: Sequence[int]) -> Columns:
        """The records of a block of lines as columns, rejections beside them: ``feed`` of every
        line, in order. Override it for speed only with the same result."""
        return collect(map(self.feed, lines, offsets))

    def finish(self) -> Columns:
        """:meth:`flush` as columns."""
        return collect((self.flush(),))


def collect(outputs) -> Columns:
    """The records of many ``feed`` outputs as one :class:`Columns`; the whole-line record a
    rejection keeps goes into the columns too."""
    records: list[Record] = []
    rejected: list[Rejection] = []
    for out in outputs:
        if len(out) == 1 and type(out[0]) is Record:  # the common case: one line, one record
            records.append(out[0])
            continue
        for item in out:
            if type(item) is not Record:
                rejected.append(item)
                item = item.record
                if item is None:
                    continue
            records.append(item)
    return Columns.of(records, rejected)


JSON_OBJECT_REASONS = ("empty", "bad_json", "not_an_object")  # what json_object rejects for


def json_object(line: str) -> dict | Rejection:
    """A line holding one JSON object, or its rejection (``empty``, ``bad_json``, ``not_an_object``)."""
    if not line.strip():
        return Rejection("empty", line)
    try:
        obj = orjson.loads(line)
    except orjson.JSONDecodeError:
        return Rejection("bad_json", line)
    return obj if isinstance(obj, dict) else Rejection("not_an_object", line)


def _list(seq: Sequence) -> list:
    """A block's lines or offsets as a column: the list itself when it is one (the pipeline
    hands each block a list of its own), else a copy."""
    return seq if type(seq) is list else list(seq)


def feed_lines(fmt: Format, lines) -> Output:
    """Everything a format gives for ``lines`` (offsets 0, 1, ...), then what it held back: a
    whole input read at once, for tools and tests."""
    out: Output = []
    for offset, line in enumerate(lines):
        out += fmt.feed(line, offset)
    return out + fmt.flush()


def format_class(name: str) -> type[Format]:
    """The :class:`Format` subclass registered under ``name``."""
    module, cls = FORMATS[name].split(":")
    return getattr(importlib.import_module(f"{__name__}.{module}"), cls)


def make_format(src: SourceConfig, stream: str | None = None, today: Callable[[], float] | None = None) -> Format:
    """The format object for one source (a fresh one per file being read), told its stream and
    the "now" of its yearless stamps (:meth:`Format.dated_by`; None: the wall clock)."""
    fmt = format_class(src.format)(src)
    if today is not None:
        fmt.dated_by(today)
    if stream is not None:
        fmt.open_stream(stream)
    return fmt


__all__ = ["FORMATS", "Columns", "Format", "Output", "Record", "Rejection", "collect", "feed_lines",
           "format_class", "make_format", "parse_timestamp"]
