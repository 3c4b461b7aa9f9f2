"""Batch driver: feed whole files through the pipeline once (fit, score, templates).

Stage: **sources** (batch). Which source an input file belongs to comes from ``--source``,
from the config's ``paths`` globs, or — with a single source — is that source.
"""

from __future__ import annotations

import fnmatch
import os
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from functools import partial
from itertools import repeat
from operator import itemgetter
from pathlib import Path

import orjson

from .config import Config
from .errors import ConfigError, InputError
from .pipeline import Formatted, Pipeline, problem_line
from .sources.ahead import CAN_FORK, read_ahead
from .sources.files import expand_inputs, read_blocks


def assign_sources(cfg: Config, inputs: list[str], source: str | None = None) -> list[tuple[str, Path]]:
    """``(source name, path)`` for every input; with no inputs, the config's own paths."""
    if not cfg.sources:
        raise ConfigError("config: no [[sources]] defined")
    if source is not None:
        cfg.source(source)
    if not inputs:
        out = []
        for src in cfg.sources:
            if source is None or src.name == source:
                out.extend((src.name, p) for p in expand_inputs(src.paths))
        if not out:
            raise InputError("no input files: give INPUT paths or set paths = [...] in the sources")
        return out
    pairs = []
    for path in expand_inputs(inputs):
        if source is not None:
            pairs.append((source, path))
        elif len(cfg.sources) == 1:
            pairs.append((cfg.sources[0].name, path))
        else:
            hits = [s.name for s in cfg.sources
                    if any(fnmatch.fnmatch(str(path), g) or fnmatch.fnmatch(path.name, Path(g).name)
                           for g in s.paths)]
            if len(hits) != 1:
                why = "matches no source's paths" if not hits else f"matches several sources ({', '.join(hits)})"
                raise InputError(f"{path}: {why}; say which with --source NAME")
            pairs.append((hits[0], path))
    return pairs


OnBytes = Callable[[int], object] | None  # told the bytes of every read (a progress bar)


@contextmanager
def byte_progress(pairs: list[tuple[str, Path]], what: str) -> Iterator[OnBytes]:
    """A progress bar of the input bytes read, on stderr, only when stderr is a terminal
    (tqdm); None otherwise, so pipes, logs and tests see nothing of it."""
    if not sys.stderr.isatty():
        yield None
        return
    from tqdm import tqdm

    total = 0
    for _, path in pairs:
        try:
            total += path.stat().st_size
        except OSError:
            pass  # reading it says why
    with tqdm(total=total, desc=what, unit="B", unit_scale=True, unit_divisor=1024, file=sys.stderr,
              leave=False, dynamic_ncols=True) as bar:
        yield bar.update


def file_time(stream: str) -> Callable[[], float] | None:
    """The "now" of a file read once: its modification time, so that a replay of old files
    places stamps without a year (RFC 3164's ``Mmm dd hh:mm:ss``) in the year they were written,
    not the year of the replay — common practice for rotated syslog files; the daemon keeps the
    wall clock for files it follows as they grow. None (the wall clock) if it cannot be read."""
    try:
        mtime = os.stat(stream).st_mtime
    except (OSError, ValueError):
        return None
    return lambda: mtime


def run_files(pipeline: Pipeline, pairs: list[tuple[str, Path]], *,
              on_block: Callable[[str, list[int]], None] | None = None, on_bytes: OnBytes = None,
              ahead: bool = CAN_FORK) -> None:
    """Feed every file to the pipeline, then flush it; ``on_block`` sees the stream and the
    line offsets of every block read, before the pipeline does, ``on_bytes`` the bytes of every
    read. Several files are read merged by record time (:class:`TimeMerge`), as the daemon sees
    them arrive; ``templates`` (with ``on_block``) reads them one after another, in input order.
    Either way the files are read and parsed ahead in a process of its own (``ahead``:
    sources/ahead.py)."""
    if len(pairs) > 1 and on_block is None:
        TimeMerge(pipeline, pairs, on_bytes, ahead=ahead).run()
        return
    for source, path in pairs:
        stream = str(path)
        for formatted, offsets, n_bytes in read_ahead(partial(_formatted, pipeline, source, path), _encode, _decode,
                                                      in_child=ahead):
            if on_bytes is not None:
                on_bytes(n_bytes)
            if on_block is not None and offsets:
                on_block(stream, offsets)
            pipeline.take(source, stream, formatted)
        pipeline.end_stream(source, stream)
    pipeline.flush()


def _formatted(pipeline: Pipeline, source: str, path: Path) -> Iterator[tuple[Formatted, list[int], int]]:
    """The format stage of one file, block by block — ``(what the format made of the lines,
    their offsets, bytes read)`` — and at its end what the format still held."""
    stream, read = str(path), []
    for lines, offsets, repairs in read_blocks(path, pipeline.cfg.source(source).line_limit, read.append):
        yield pipeline.format_block(source, stream, lines, offsets, repairs), offsets, sum(read)
        read.clear()
    yield pipeline.format_end(source, stream), [], sum(read)


def _encode(item: tuple) -> bytes:
    """A reader's item — a :class:`Formatted` first, then plain values — as JSON."""
    return orjson.dumps([item[0].plain(), *item[1:]])


def _decode(data) -> tuple:
    """:func:`_encode` read back."""
    first, *rest = orjson.loads(data)
    return Formatted.from_plain(first), *rest


class TimeMerge:
    """A k-way merge of many files by record time, for batch runs: a trace whose spans sit in
    three services' files, or a request logged by two hosts, becomes one session, and the
    event-time clock that closes idle sessions is the merged one — what the daemon sees when
    the files grow live.

    The next block is always read from the open file that is furthest behind (the smallest
    newest time read from it). Mined rows wait per source until every open file has been read
    past their time (the low watermark: the smallest of the open files' newest times), then go
    to the sessionizer in time order (input order among equal times; a record without a time
    takes the time of the record before it in its file), and idle sessions are closed by the
    merged clock. Memory stays about one block per file. Each file must be roughly in time order
    on its own, as logs are; a record older than what was already released is taken late, as
    the daemon would take it. The reading, in that order, and the format stage run ahead in a
    process of their own (:meth:`blocks`)."""

    def __init__(self, pipeline: Pipeline, pairs: list[tuple[str, Path]], on_bytes: OnBytes = None, *,
                 ahead: bool = CAN_FORK) -> None:
        self.pipeline = pipeline
        self.pairs = pairs
        self.on_bytes = on_bytes
        self.ahead = ahead
        self.newest = {str(path): float("-inf") for _, path in pairs}  # newest time read
        self.waiting: dict[str, list[tuple]] = {}  # source -> (sort time, seq, row)
        self._seq = 0

    def blocks(self) -> Iterator[tuple[Formatted, str, str, int, bool]]:
        """The files' blocks through the format stage in merge order — ``(what the format made of
        the block, source, stream, bytes read, whether the file ended)`` — choosing by the
        times the format read, so it needs nothing of the later stages (run ahead)."""
        pipeline, read = self.pipeline, []
        newest = dict(self.newest)
        files = [(source, str(path), read_blocks(path, pipeline.cfg.source(source).line_limit, read.append))
                 for source, path in self.pairs]
        while files:
            i = min(range(len(files)), key=lambda j: newest[files[j][1]])
            source, stream, blocks = files[i]
            block = next(blocks, None)
            if block is None:
                del files[i]
                yield pipeline.format_end(source, stream), source, stream, sum(read), True
            else:
                formatted = pipeline.format_block(source, stream, *block)
                newest[stream] = max((t for cols in formatted.parts for t in cols.times if t is not None),
                                     default=newest[stream])
                yield formatted, source, stream, sum(read), False
            read.clear()

    def hold(self, source: str, stream: str, rows: tuple) -> None:
        last = self.newest[stream]
        out = self.waiting.setdefault(source, [])
        seq = self._seq
        for row in zip(*rows):
            ts = row[1]
            if ts is not None and ts > last:
                last = ts
            out.append((last, seq, row))
            seq += 1
        self._seq = seq
        self.newest[stream] = last

    def release(self, until: float) -> None:
        for source, rows in self.waiting.items():
            ready = [r for r in rows if r[0] <= until]
            if not ready:
                continue
            if len(ready) < len(rows):
                rows[:] = [r for r in rows if r[0] > until]
            else:
                rows.clear()
            ready.sort(key=itemgetter(0, 1))  # time, then input order (seq is unique: rows never compared)
            self.pipeline.sessionize(source, [list(c) for c in zip(*(r[2] for r in ready))])

    def run(self) -> None:
        pipeline = self.pipeline
        pipeline.hold = self.hold
        try:
            open_streams = [str(path) for _, path in self.pairs]
            for formatted, source, stream, n_bytes, ended in read_ahead(self.blocks, _encode, _decode,
                                                                        in_child=self.ahead):
                if self.on_bytes is not None:
                    self.on_bytes(n_bytes)
                pipeline.take(source, stream, formatted)
                if ended:
                    pipeline.end_stream(source, stream)
                    open_streams.remove(stream)
                if open_streams:
                    self.release(min(self.newest[s] for s in open_streams))
            self.release(float("inf"))
        finally:
            pipeline.hold = None
        pipeline.flush()


def template_rows(cfg: Config, pairs: list[tuple[str, Path]]) -> tuple[list[tuple[int, int]], Pipeline]:
    """``(line number, template index)`` of every record of the files, in input order (the
    line a record starts on; 0 where it has none), and the pipeline that mined them."""
    numbers: dict[str, dict[int, int]] = {}
    rows: list[tuple[int, int]] = []

    def number(stream: str, offsets: list[int]) -> None:
        of = numbers.setdefault(stream, {})
        of.update(zip(offsets, range(len(of) + 1, len(of) + 1 + len(offsets))))

    def take(source: str, stream: str, cols, idxs: list[int]) -> None:
        rows.extend(zip(map(numbers[stream].get, cols.offsets, repeat(0)), idxs))

    pipeline = Pipeline(cfg, on_records=take, sample_rejects=False, dating=file_time)
    run_files(pipeline, pairs, on_block=number)
    return rows, pipeline


def unread_lines(pipeline: Pipeline, *, refuse: bool) -> list[str]:
    """One line per input problem of the run (:meth:`Pipeline.input_problems`). With ``refuse``
    (fit) only the problems above the source's ``max_unread_share``, worded as a refusal; else
    (score) every problem, as a warning."""
    out = []
    for problem in pipeline.input_problems():
        limit = pipeline.cfg.source(problem.source).max_unread_share
        if refuse and not (problem.total > 0 and problem.count / problem.total > limit):
            continue
        out.append(("fit refused: " if refuse else "warning: ") + problem_line(pipeline, problem, refuse=refuse))
    return out


def fit_files(cfg: Config, pairs: list[tuple[str, Path]], on_bytes: OnBytes = None):
    """Read normal sessions from files, fit a baseline, save it as the current version."""
    from .baselines import check_writable, save_baseline
    from .model.baseline import fit_baseline

    check_writable(cfg.state_dir)
    pipeline = Pipeline(cfg, dating=file_time)
    run_files(pipeline, pairs, on_bytes=on_bytes)
    for line in unread_lines(pipeline, refuse=True):
        raise InputError(line)
    baseline = fit_baseline(pipeline.fit_sessions(), pipeline.miner, cfg, pipeline.fit_keys())
    path = save_baseline(baseline, cfg.state_dir)
    return baseline, path, pipeline


def score_files(cfg: Config, pairs: list[tuple[str, Path]], baseline, on_verdict, *, score_all: bool = False,
                on_bytes: OnBytes = None) -> Pipeline:
    pipeline = Pipeline(cfg, baseline, on_verdict=on_verdict, score_all=score_all, dating=file_time)
    run_files(pipeline, pairs, on_bytes=on_bytes)
    return pipeline


def group_files(cfg: Config, pairs: list[tuple[str, Path]], baseline, store, *, on_bytes: OnBytes = None) -> Pipeline:
    """``score --incidents``: replay the files and group their alerts into incidents in ``store``
    as the daemon would — its tracker (and triage, when enabled), every session counted for the
    rates — on the replay's event clock: incidents with no alert for ``auto_resolve_s`` are
    resolved when that clock has moved on a minute, as the daemon's tick would have."""
    from .alerts.incidents import alert_time, tracker_for

    clock = [0.0, 0.0]  # the newest event time replayed so far; the one of the last tick
    tracker = tracker_for(store, cfg, clock=lambda: clock[0])

    def on_verdict(verdict: dict) -> None:
        clock[0] = max(clock[0], alert_time(verdict, lambda: clock[0]))
        if clock[0] - clock[1] >= 60:  # a tick is a transaction: once a minute of event time
            clock[1] = clock[0]
            tracker.tick(clock[0])
        tracker.add(verdict)

    pipeline = score_files(cfg, pairs, baseline, on_verdict, score_all=True, on_bytes=on_bytes)
    tracker.flush()
    return pipeline
