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
from typing import TYPE_CHECKING

from .alerts.alert import Redactor, build_verdict
from .config import Config
from .formats import Format, make_format
from .records import Record
from .rejects import reject_log
from .sessions import Session, Sessionizer
from .templates import TemplateTree

if TYPE_CHECKING:
    from .model.baseline import Baseline

SCORE_BATCH = 256
TICK_EVERY = 1024


class Pipeline:
    def __init__(self, cfg: Config, baseline: Baseline | None = None, *,
                 on_verdict: Callable[[dict], None] | None = None, score_all: bool = False,
                 clock: Callable[[], float] | None = None,
                 on_quiet: Callable[[str, tuple[int, ...]], None] | None = None) -> None:
        self.cfg = cfg
        # refit (tracewatch/refit.py): called with (source, event sequence) of every scored
        # session that raised nothing
        self.on_quiet = on_quiet
        self.baseline = baseline
        tcfg = cfg.templates
        self.miner = baseline.miner if baseline else TemplateTree(tcfg.routing_tokens, tcfg.join_share, tcfg.max_branches)
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
        """Feed ``(line, offset, repair)`` triples of one stream, line by line through the
        format; its records go on through the stages ``TICK_EVERY`` at a time."""
        feed, repaired = self._format(source, stream).feed, self.repaired
        records: list[Record] = []
        n = 0
        for line, offset, repair in lines:
            n += 1
            if repair is not None:
                repaired[(source, repair)] += 1
            out = feed(line, offset)
            if type(out) is Record:  # the common case: one line, one record
                records.append(out)
            else:
                records += self._accept(source, out)
            if len(records) >= TICK_EVERY:
                self._add_records(source, records)
                records = []
        self.lines[source] += n
        self._add_records(source, records)

    def feed_block(self, source: str, stream: str, lines: list[str], offsets: list[int],
                   repairs: list[str | None] | None = None) -> None:
        """Feed a block of lines of one stream (``repairs`` None: all decoded cleanly) — what
        the batch reader and the daemon's followers hand on. The same as :meth:`feed_lines`;
        when the format can read the whole block at once (``match_block``), it does."""
        match_block = getattr(self._format(source, stream), "match_block", None)
        if match_block is None:
            self.feed_lines(source, stream, zip(lines, offsets, repairs or repeat(None)))
            return
        # TICK_EVERY lines at a time: a line the format cannot read in bulk (no match, bad JSON,
        # repaired bytes) sends only its part down the per-line path, and what a part allocates
        # (a JSON object per line) is freed before the next one
        for lo in range(0, len(lines), TICK_EVERY):
            part, part_offsets = lines[lo:lo + TICK_EVERY], offsets[lo:lo + TICK_EVERY]
            part_repairs = repairs[lo:lo + TICK_EVERY] if repairs is not None else None
            columns = None if part_repairs is not None and any(part_repairs) else match_block(part)
            if columns is None:  # a line the per-line path must see: this part goes that way
                self.feed_lines(source, stream, zip(part, part_offsets, part_repairs or repeat(None)))
                continue
            self.lines[source] += len(part)
            self.records[source] += len(part)
            keys, stamps, messages = columns
            self._add_columns(source, keys, stamps, self.miner.add_many(messages), part, part_offsets, messages)

    def _accept(self, source: str, out) -> list[Record]:
        """The records among a format's output; rejections are counted and sampled, and the
        whole-line record a rejection may carry is kept."""
        records = []
        for item in out:
            if type(item) is not Record:
                self.rejected[(source, item.reason)] += 1
                # bounded, redacted sample on disk: <state_dir>/rejects.jsonl
                reject_log(self.cfg.state_dir).add(source, item.reason, item.raw, self.redact)
                item = item.record
            if item is not None:
                records.append(item)
        return records

    def _add_records(self, source: str, records: list[Record]) -> None:
        """Records of one source as columns: messages become templates in one go (structured
        events one by one), then :meth:`_add_columns`."""
        if not records:
            return
        self.records[source] += len(records)
        messages = [r.message for r in records]
        events = [r.event for r in records]
        if events.count(None) == len(events):
            idxs = self.miner.add_many(messages)
        else:
            miner = self.miner
            idxs = [miner.add(m) if e is None else miner.add_event(e) for m, e in zip(messages, events)]
        self._add_columns(source, [r.key for r in records], [r.ts for r in records], idxs,
                          [r.raw for r in records], [r.offset for r in records], messages)

    def _add_columns(self, source: str, keys: list, stamps: list, idxs: list[int], raws: list[str],
                     offsets: list[int], messages: list[str]) -> None:
        """Records whose template indices are known, as columns: the sessionizer takes them
        ``TICK_EVERY`` at a time, then (batch) idle sessions are closed, and closed sessions
        are scored ``SCORE_BATCH`` at a time."""
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
            self._add_records(source, self._accept(source, fmt.flush()))
        if self.clock is None:
            self._file_watermark = 0.0

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
            verdict = build_verdict(sess, seq, score, cluster, dist, unseen_share, p, far, b,
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
