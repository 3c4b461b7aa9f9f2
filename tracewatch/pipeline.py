"""The pipeline: wires every stage; the batch commands and the daemon drive the same object.

    lines ──format──► Columns (records, rejections) ──miner──► template indices
          ──sessionizer──► closed Session ──vectoriser + scorer──► verdict ──► on_verdict(dict)

Lines come in blocks (``feed_block``, from the batch reader and the daemon's followers) and go
through the stages as columns, by one path. Without a baseline the pipeline collects closed
sessions for fitting; with one it scores them. Batch callers feed lines and call :meth:`flush`;
the daemon feeds lines and calls :meth:`tick` with its clock so idle sessions close.
"""

from __future__ import annotations

import enum
from collections import Counter
from collections.abc import Callable
from typing import TYPE_CHECKING, NamedTuple

from .alerts.alert import Redactor, build_verdict
from .config import Config
from .formats import Format, format_class, make_format
from .records import Columns
from .rejects import reject_log
from .sessions import Session, Sessionizer
from .templates import TemplateTree

if TYPE_CHECKING:
    from .model.baseline import Baseline

SCORE_BATCH = 256
TICK_EVERY = 1024


class Formatted(NamedTuple):
    """The format stage's output for a block of lines (:meth:`Pipeline.format_block`)."""

    lines: int  # lines read
    repairs: list[str]  # how each mended line was mended when decoded (``invalid_utf8``, ...)
    parts: list[Columns]  # the records and rejections, ``TICK_EVERY`` lines at a time

    def plain(self) -> list:
        """JSON-ready (what crosses the pipe of sources/ahead.py)."""
        return [self.lines, self.repairs, [c.plain() for c in self.parts]]

    @classmethod
    def from_plain(cls, data: list) -> "Formatted":
        """:meth:`plain` read back."""
        lines, repairs, parts = data
        return cls(lines, repairs, [Columns.from_plain(p) for p in parts])


class Problem(enum.Enum):
    """What an input problem (:meth:`Pipeline.input_problems`) is about."""

    REJECTED = "rejected"  # lines rejected
    UNTIMED = "untimed"  # keyed records without a usable time


class InputProblem(NamedTuple):
    source: str
    kind: Problem
    what: str  # the problem in words, for display
    count: int
    total: int  # the lines (or records) ``count`` is out of


_UNTIMED_TEXT = "records with a session key carry no usable time"
_HINTS = {Problem.REJECTED: " (check format and line_pattern)", Problem.UNTIMED: " (check ts_format)"}


class Pipeline:
    def __init__(self, cfg: Config, baseline: Baseline | None = None, *,
                 on_verdict: Callable[[dict], None] | None = None, score_all: bool = False,
                 clock: Callable[[], float] | None = None,
                 on_quiet: Callable[[str, tuple[int, ...]], None] | None = None,
                 on_records: Callable[[str, str, Columns, list[int]], None] | None = None,
                 sample_rejects: bool = True,
                 dating: Callable[[str], Callable[[], float] | None] | None = None) -> None:
        self.cfg = cfg
        # a stream's "now" for stamps without a year (Format.dated_by); None: the wall clock
        self.dating = dating
        # `tracewatch templates`: called with (source, stream, records, template indices) of
        # every block of records, in input order
        self.on_records = on_records
        self.sample_rejects = sample_rejects  # rejected lines sampled to <state_dir>/rejects.jsonl
        # refit (tracewatch/refit.py): called with (source, event sequence) of every scored
        # session that raised nothing
        self.on_quiet = on_quiet
        self.baseline = baseline
        tcfg = cfg.templates
        self.miner = baseline.miner if baseline else TemplateTree(tcfg.routing_tokens, tcfg.join_share, tcfg.max_branches)
        self.scorer = baseline.make_scorer() if baseline else None
        self.sessionizer = Sessionizer(cfg.sessions, frozenset(s.name for s in cfg.sources
                                                               if format_class(s.format).by_time))
        if baseline is not None:
            self.sessionizer.unseen_from = self.miner.n_seen
        self.on_verdict = on_verdict or (lambda v: None)
        self.score_all = score_all
        self.clock = clock
        self.redact = Redactor(cfg.redact)
        self._sources = {s.name: s for s in cfg.sources}
        # what a source's format adds to its alerts (the container's names, for container logs)
        self._alert_fields = {s.name: format_class(s.format).alert_fields for s in cfg.sources}
        # the reasons a source's format may reject a line for (the metrics start each at 0)
        self.reject_reasons = {s.name: format_class(s.format).reject_reasons(s) for s in cfg.sources}
        self._formats: dict[tuple[str, str], Format] = {}
        self._closed: list[Session] = []
        self._watermark = 0.0
        self._file_watermark = 0.0  # batch: newest record time of the file being read
        # batch of several files (tracewatch/batch.py): mined rows go to this instead of the
        # sessionizer, called with (source, stream, rows), and come back through sessionize()
        self.hold: Callable[[str, str, tuple], None] | None = None
        # fit mode: (source, key, sequence) of every closed session
        self.collected: list[tuple[str, str, tuple[int, ...]]] = []
        # plain counters; the metrics module exports them
        self.records = Counter()  # source -> records accepted
        self.rejected = Counter()  # (source, reason) -> lines
        self.repaired = Counter()  # (source, reason) -> lines decoded with replacement / truncated
        self.lines = Counter()  # source -> lines read
        self.untimed = Counter()  # source -> records with a session key but no usable time
        self.sessions_scored = Counter()  # source -> sessions
        self.alerts = Counter()  # (source, reason) -> alerts

    # -- input ---------------------------------------------------------------------------
    def _format(self, source: str, stream: str) -> Format:
        fmt = self._formats.get((source, stream))
        if fmt is None:
            today = self.dating(stream) if self.dating is not None else None
            fmt = self._formats[(source, stream)] = make_format(self._sources[source], stream, today)
        return fmt

    def feed_line(self, source: str, stream: str, line: str, offset: int = -1,
                  repair: str | None = None) -> None:
        """One line (tools and tests): :meth:`feed_block` of a block of one."""
        self.feed_block(source, stream, [line], [offset], [repair])

    def feed_block(self, source: str, stream: str, lines: list[str], offsets: list[int],
                   repairs: list[str | None] | None = None) -> None:
        """Feed a block of lines of one stream (``repairs``: how each line was mended when it was
        decoded, None for all clean) — what the batch reader and the daemon's followers hand
        on: :meth:`format_block`, then :meth:`take`."""
        self.take(source, stream, self.format_block(source, stream, lines, offsets, repairs))

    def format_block(self, source: str, stream: str, lines: list[str], offsets: list[int],
                     repairs: list[str | None] | None = None) -> Formatted:
        """The format stage of a block of lines, ``TICK_EVERY`` lines at a time (so what a part
        allocates, a JSON object per line, is freed before the next one). It needs nothing from
        the later stages: a batch run computes it in a process of its own (sources/ahead.py)."""
        fmt = self._format(source, stream)
        return Formatted(len(lines), [r for r in repairs if r is not None] if repairs is not None else [],
                         [fmt.read_block(lines[lo:lo + TICK_EVERY], offsets[lo:lo + TICK_EVERY])
                          for lo in range(0, len(lines), TICK_EVERY)])

    def format_end(self, source: str, stream: str) -> Formatted:
        """What the format of a stream that ended still holds; the format is let go."""
        fmt = self._formats.pop((source, stream), None)
        return Formatted(0, [], [fmt.finish()] if fmt is not None else [])

    def take(self, source: str, stream: str, formatted: Formatted) -> None:
        """The format stage's output of a block: counted, then on through the later stages."""
        self.repaired.update((source, r) for r in formatted.repairs)
        self.lines[source] += formatted.lines
        for cols in formatted.parts:
            self._take(source, stream, cols)

    def end_stream(self, source: str, stream: str) -> None:
        """A file ended (batch) or was rotated away: take what its format still holds.

        A batch run of one file (no clock) closes idle sessions by that file's own times; the
        clock starts again for the next file of a ``templates`` run. Several files of a
        ``fit`` or ``score`` run are merged by time first (tracewatch/batch.py)."""
        self.take(source, stream, self.format_end(source, stream))
        if self.clock is None and self.hold is None:
            self._file_watermark = 0.0

    def _take(self, source: str, stream: str, cols: Columns) -> None:
        """A format's records and rejections: rejections are counted and sampled; the records'
        messages become templates, the sessionizer takes them ``TICK_EVERY`` at a time, then
        (batch) idle sessions are closed, and closed sessions are scored ``SCORE_BATCH`` at a
        time."""
        for item in cols.rejected:
            self.rejected[(source, item.reason)] += 1
            if self.sample_rejects:  # bounded, redacted sample on disk: <state_dir>/rejects.jsonl
                reject_log(self.cfg.state_dir).add(source, item.reason, item.raw, self.redact)
        if not len(cols):
            return
        self.records[source] += len(cols)
        if None in cols.times:  # keyed records without a time: their sessions never idle out
            self.untimed[source] += sum(1 for key, ts in zip(cols.keys, cols.times) if ts is None and key is not None)
        idxs = self.miner.add_many(cols.messages, cols.events)
        self.miner.note_severity(idxs, cols.levels)  # the level of templates the baseline never saw
        if self.on_records is not None:
            self.on_records(source, stream, cols, idxs)
        columns = (cols.keys, cols.times, idxs, cols.raws, cols.offsets, cols.messages)
        if self.hold is not None:  # batch of several files: the time merge decides when
            self.hold(source, stream, columns)
            return
        self.sessionize(source, columns)

    def sessionize(self, source: str, columns) -> None:
        """Rows of one source (keys, times, template indices, raws, offsets, messages) to the
        sessionizer, ``TICK_EVERY`` at a time; then (batch) idle sessions are closed by the
        event-time clock — the newest time of the file, or of the time merge of several files
        (tracewatch/batch.py) — and closed sessions are scored ``SCORE_BATCH`` at a time."""
        n = len(columns[0])
        for lo in range(0, n, TICK_EVERY):
            part = columns if n <= TICK_EVERY else [c[lo:lo + TICK_EVERY] for c in columns]
            now = self.clock() if self.clock is not None else self._file_watermark
            newest = self.sessionizer.add_many(source, *part, now, self._closed)
            if newest is not None:
                self._watermark = max(self._watermark, newest)
                self._file_watermark = max(self._file_watermark, newest)
            if self.clock is None:
                self.sessionizer.tick(self._file_watermark, self._closed)
            if len(self._closed) >= SCORE_BATCH:
                self._drain()

    # -- time and the end ------------------------------------------------------------------
    def tick(self, now: float) -> None:
        self.sessionizer.tick(now, self._closed)
        self._drain()

    def flush(self) -> None:
        for source, stream in list(self._formats):
            self.end_stream(source, stream)
        self.sessionizer.flush(self._closed)
        self._drain()

    # -- sessions out ------------------------------------------------------------------------
    def _drain(self) -> None:
        closed, self._closed = self._closed, []
        closed = [s for s in closed if s.events and not s.partial]  # partial: see Sessionizer._evict
        if not closed:
            return
        if self.scorer is None:
            self.collected.extend((s.source, s.key, tuple(s.events)) for s in closed)
            return
        self._score(closed)

    def _score(self, sessions: list[Session]) -> None:
        b = self.baseline
        seqs = [tuple(s.events) for s in sessions]
        sources = [s.source for s in sessions]
        results, p_values, fars, unseens = b.judge(self.scorer, sources, seqs)  # the one rule
        self.sessions_scored.update(sources)
        on_quiet = self.on_quiet
        for sess, seq, (score, cluster, dist, unseen_share), p, far, unseen in zip(
                sessions, seqs, results, p_values.tolist(), fars.tolist(), unseens.tolist()):
            if on_quiet is not None and not (far or unseen):
                on_quiet(sess.source, seq)  # refit: a quiet session for the pool
            if not (far or unseen or self.score_all):
                continue
            alarm = far or unseen
            verdict = build_verdict(sess, seq, score, cluster, dist, unseen_share, p, far, unseen, b,
                                    self.redact, explain_it=alarm)
            verdict.update(self._alert_fields[sess.source](self._sources[sess.source], sess.key))
            for reason in verdict["reasons"]:
                self.alerts[(sess.source, reason)] += 1
            self.on_verdict(verdict)

    def input_problems(self) -> list[InputProblem]:
        """Every problem of a source whose input was badly read: lines rejected (``what`` names
        the reasons) or keyed records without a usable time."""
        out = []
        for src in self.cfg.sources:
            name = src.name
            rejected = sorted(((n, r) for (s, r), n in self.rejected.items() if s == name), reverse=True)
            if rejected:
                reasons = ", ".join(f"{r}={n}" for n, r in rejected)
                out.append(InputProblem(name, Problem.REJECTED, f"lines rejected ({reasons})",
                                        sum(n for n, _ in rejected), self.lines[name]))
            if self.untimed[name]:
                out.append(InputProblem(name, Problem.UNTIMED, _UNTIMED_TEXT, self.untimed[name], self.records[name]))
        return out

    def fit_sessions(self) -> list[tuple[str, tuple[int, ...]]]:
        """``(source, event sequence)`` of every session collected for fitting."""
        return [(source, seq) for source, _, seq in self.collected]

    def fit_keys(self) -> list[str]:
        """The session key of each of :meth:`fit_sessions`, in the same order."""
        return [key for _, key, _ in self.collected]

    # -- daemon hooks: live time, checkpoints, baseline switches ---------------------------
    # With ``clock`` given, the pipeline never ticks by itself; the daemon calls
    # ``tick(live_time())`` (tracewatch.sessions.LiveTime: the watermark below, moved on by the
    # wall clock while input is quiet), so idle timeouts close the same sessions as a batch run.
    @property
    def watermark(self) -> float:
        """The newest record timestamp fed so far (0.0 before any)."""
        return self._watermark

    @watermark.setter
    def watermark(self, value: float) -> None:
        self._watermark = value

    def held_from(self, source: str, stream: str) -> int | None:
        """Offset of the first line a format still holds for a stream (a multi-line record not
        yet complete, ``Format.held_from``); a checkpoint resumes the stream there. Right for
        formats whose held lines give no record until the held one is complete (continuation
        lines, a multi-line JSON document)."""
        fmt = self._formats.get((source, stream))
        return fmt.held_from if fmt is not None else None

    def use_baseline(self, baseline: Baseline) -> None:
        """Switch baselines between sessions: sessions already closed are scored with the old
        one; open sessions keep their events, re-expressed in the new baseline's templates."""
        self._drain()
        self.sessionizer.remap(baseline.miner.adopt(self.miner))
        self.baseline, self.miner, self.scorer = baseline, baseline.miner, baseline.make_scorer()
        self.sessionizer.unseen_from = self.miner.n_seen


def problem_line(pipeline: Pipeline, problem: InputProblem, *, refuse: bool = False) -> str:
    """One input problem (:meth:`Pipeline.input_problems`) in words, with the share it is
    measured against and what to check; the daemon logs the same line."""
    source, kind, what, count, total = problem
    limit = pipeline.cfg.source(source).max_unread_share
    above = total > 0 and count / total > limit
    tail = (f", above max_unread_share {limit}; no baseline written" if refuse
            else (f", above max_unread_share {limit}" if above else ""))
    return f"source '{source}': {count} of {total} {what}{tail}{_HINTS[kind]}"

