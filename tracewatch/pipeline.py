"""The pipeline: wires every stage; the batch commands and the daemon drive the same object.

    line ──format──► Record ──miner──► template index ──sessionizer──► closed Session
         ──vectoriser + scorer──► verdict ──► on_verdict(dict)

Without a baseline the pipeline collects closed sessions for fitting; with one it scores
them. Batch callers feed lines and call :meth:`flush`; the daemon feeds lines and calls
:meth:`tick` with its clock so idle sessions close.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable
from itertools import repeat

import numpy as np

from .alerts.alert import Redactor, build_verdict
from .baselines import Baseline
from .config import Config
from .formats import Format, items, make_format
from .records import Record, Rejection
from .rejects import reject_log
from .sessions import Session, Sessionizer
from .templates import TemplateMiner

SCORE_BATCH = 256
TICK_EVERY = 1024


class Pipeline:
    def __init__(self, cfg: Config, baseline: Baseline | None = None, *,
                 on_verdict: Callable[[dict], None] | None = None, score_all: bool = False,
                 clock: Callable[[], float] | None = None) -> None:
        self.cfg = cfg
        self.baseline = baseline
        tcfg = cfg.templates
        self.miner = baseline.miner if baseline else TemplateMiner(tcfg.depth, tcfg.similarity, tcfg.max_children)
        self.scorer = baseline.make_scorer() if baseline else None
        self.sessionizer = Sessionizer(cfg.sessions)
        self.on_verdict = on_verdict or (lambda v: None)
        self.score_all = score_all
        self.clock = clock
        self.redact = Redactor(cfg.redact)
        self._sources = {s.name: s for s in cfg.sources}
        self._formats: dict[tuple[str, str], Format] = {}
        self._closed: list[Session] = []
        self._watermark = 0.0
        self._file_watermark = 0.0  # batch: newest record time of the file being read
        self._since_tick = 0
        # fit mode: (source, key, sequence) of every closed session
        self.collected: list[tuple[str, str, tuple[int, ...]]] = []
        # plain counters; the metrics module exports them
        self.records = Counter()  # source -> records accepted
        self.rejected = Counter()  # (source, reason) -> lines
        self.repaired = Counter()  # (source, reason) -> lines decoded with replacement / truncated
        self.lines = Counter()  # source -> lines read
        self.sessions_scored = Counter()  # source -> sessions
        self.alerts = Counter()  # (source, reason) -> alerts

    # -- input ---------------------------------------------------------------------------
    def _format(self, source: str, stream: str) -> Format:
        fmt = self._formats.get((source, stream))
        if fmt is None:
            fmt = self._formats[(source, stream)] = make_format(self._sources[source])
        return fmt

    def feed_line(self, source: str, stream: str, line: str, offset: int = -1,
                  repair: str | None = None) -> None:
        self.feed_lines(source, stream, ((line, offset, repair),))

    def feed_lines(self, source: str, stream: str, lines) -> None:
        """Feed ``(line, offset, repair)`` triples of one stream: the same as calling
        :meth:`feed_line` for each, with the per-line lookups done once. A list of cleanly
        decoded lines (what the daemon's followers hand on) goes the block way."""
        if type(lines) is list and lines:
            texts, offsets, repairs = zip(*lines)
            if not any(repairs):
                self.feed_block(source, stream, list(texts), list(offsets))
                return
        feed = self._format(source, stream).feed
        add, take, repaired = self._add_record, self._take, self.repaired
        n = n_records = 0
        for line, offset, repair in lines:
            n += 1
            if repair is not None:
                repaired[(source, repair)] += 1
            out = feed(line, offset)
            if type(out) is Record:  # the common case: one line, one record
                n_records += 1
                add(out)
                continue
            for item in out:
                if type(item) is Record:
                    n_records += 1
                    add(item)
                else:
                    take(source, item)
        self.lines[source] += n
        self.records[source] += n_records

    def feed_block(self, source: str, stream: str, lines: list[str], offsets: list[int],
                   repairs: list[str | None] | None = None) -> None:
        """Feed a block of lines of one stream (``repairs`` None: all decoded cleanly). The same
        as :meth:`feed_lines`; when the format can read the whole block at once
        (``match_block``), its records go through the stages column by column."""
        match_block = getattr(self._format(source, stream), "match_block", None)
        columns = match_block(lines) if match_block is not None and repairs is None and lines else None
        if columns is None:
            self.feed_lines(source, stream, zip(lines, offsets, repairs or repeat(None)))
            return
        self.lines[source] += len(lines)
        self.records[source] += len(lines)
        keys, stamps, messages = columns
        self._add_columns(source, keys, stamps, self.miner.add_many(messages), lines, offsets, messages)

    def _add_columns(self, source: str, keys: list, stamps: list, idxs: list[int], raws: list[str],
                     offsets: list[int], messages: list[str]) -> None:
        """:meth:`_add_record` for many records whose template indices are already known: the
        sessionizer takes them ``TICK_EVERY`` at a time, then idle sessions are closed and
        closed sessions scored, as the per-record path does."""
        for lo in range(0, len(keys), TICK_EVERY):
            hi = lo + TICK_EVERY
            now = self.clock() if self.clock is not None else self._file_watermark
            newest = self.sessionizer.add_many(source, keys[lo:hi], stamps[lo:hi], idxs[lo:hi], raws[lo:hi],
                                               offsets[lo:hi], messages[lo:hi], now, self._closed)
            if newest is not None:
                self._watermark = max(self._watermark, newest)
                self._file_watermark = max(self._file_watermark, newest)
            if self.clock is None:
                self.sessionizer.tick(self._file_watermark, self._closed)
            if len(self._closed) >= SCORE_BATCH:
                self._drain()

    def end_stream(self, source: str, stream: str) -> None:
        """A file ended (batch) or was rotated away: flush what its format holds.

        In batch runs (no clock) the event-time clock that closes idle sessions follows one
        file at a time: files are read one after another, and the next one may start earlier
        (another host, another source), so its sessions must not look idle next to the newest
        time of the file before."""
        fmt = self._formats.pop((source, stream), None)
        if fmt is not None:
            for item in fmt.flush():
                self._take(source, item)
        if self.clock is None:
            self._file_watermark = 0.0

    def _take(self, source: str, item: Record | Rejection) -> None:
        if type(item) is Record:
            self.feed_record(item)
            return
        self.rejected[(source, item.reason)] += 1
        # bounded, redacted sample on disk: <state_dir>/rejects.jsonl
        reject_log(self.cfg.state_dir).add(source, item.reason, item.raw, self.redact)
        if item.record is not None:
            self.feed_record(item.record)

    def feed_record(self, rec: Record) -> None:
        self.records[rec.source] += 1
        self._add_record(rec)

    def _add_record(self, rec: Record) -> None:
        idx = self.miner.add_event(rec.event) if rec.event is not None else self.miner.add(rec.message)
        ts = rec.ts
        if ts is not None:
            if ts > self._watermark:
                self._watermark = ts
            if ts > self._file_watermark:
                self._file_watermark = ts
        now = self.clock() if self.clock is not None else self._file_watermark
        closed = self._closed
        self.sessionizer.add(rec.source, rec.key, ts, now, idx, rec.raw, rec.offset, rec.message, closed)
        self._since_tick += 1
        if self._since_tick >= TICK_EVERY and self.clock is None:
            self._since_tick = 0
            self.sessionizer.tick(self._file_watermark, closed)
        if len(closed) >= SCORE_BATCH:
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
        closed = [s for s in closed if s.events]
        if not closed:
            return
        if self.scorer is None:
            self.collected.extend((s.source, s.key, tuple(s.events)) for s in closed)
            return
        self._score(closed)

    def _score(self, sessions: list[Session]) -> None:
        b = self.baseline
        seqs = [tuple(s.events) for s in sessions]
        by_source: dict[str, list[int]] = {}
        for i, sess in enumerate(sessions):
            by_source.setdefault(sess.source, []).append(i)
        results: list = [None] * len(sessions)
        p_values = np.empty(len(sessions))
        for source, rows in by_source.items():  # each source: its own clusters and calibration
            for i, res in zip(rows, self.scorer.score(source, [seqs[i] for i in rows])):
                results[i] = res
            p_values[rows] = b.conformal(source).p_values([results[i][0] for i in rows])
        rate = b.false_alarm_rate
        n_seen = self.miner.n_seen
        for sess, seq, (score, cluster, dist, unseen_share), p in zip(sessions, seqs, results, p_values):
            self.sessions_scored[sess.source] += 1
            far = p <= rate
            unseen = max(seq) >= n_seen
            if not (far or unseen or self.score_all):
                continue
            alarm = far or unseen
            verdict = build_verdict(sess, seq, score, cluster, dist, unseen_share, float(p), far, b,
                                    self.redact, explain_it=alarm)
            for reason in verdict["reasons"]:
                self.alerts[(sess.source, reason)] += 1
            self.on_verdict(verdict)

    def fit_sessions(self) -> list[tuple[str, tuple[int, ...]]]:
        """``(source, event sequence)`` of every session collected for fitting."""
        return [(source, seq) for source, _, seq in self.collected]

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
        yet complete), for formats that say so with a ``held_from`` attribute; a checkpoint
        resumes the stream there. Right for formats whose held lines give no record until the
        held one is complete (continuation lines, a multi-line JSON document)."""
        return getattr(self._formats.get((source, stream)), "held_from", None)

    def use_baseline(self, baseline: Baseline) -> None:
        """Switch baselines between sessions: sessions already closed are scored with the old
        one; open sessions keep their events, re-expressed in the new baseline's templates."""
        self._drain()
        self.sessionizer.remap(baseline.miner.adopt(self.miner))
        self.baseline, self.miner, self.scorer = baseline, baseline.miner, baseline.make_scorer()
