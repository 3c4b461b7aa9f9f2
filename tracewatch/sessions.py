"""Sessions: events grouped by session key into ordered sequences.

Stage: templates → **sessions** → features. A session closes on an end pattern, an idle
timeout, a maximum duration or a maximum event count, or when the number of open sessions
reaches its bound (the oldest is closed early: ``evicted``). Records without a key fall
into time windows per source (or, without timestamps, runs of ``max_events`` records).

Time comes from the records when they carry it, otherwise from the clock the caller passes
in, so batch replays and the live daemon close sessions the same way.
"""

from __future__ import annotations

import re
from collections import OrderedDict

from .config import SessionsConfig

MAX_SAMPLES = 5


class Session:
    __slots__ = ("source", "key", "events", "first_ts", "last_ts", "last_seen", "first_raw",
                 "first_offset", "samples", "close_reason")

    def __init__(self, source: str, key: str, now: float, first_raw: str, offset: int) -> None:
        self.source = source
        self.key = key
        self.events: list[int] = []
        self.first_ts = now
        self.last_ts = now
        self.last_seen = now
        self.first_raw = first_raw
        self.first_offset = offset
        self.samples: list[str] = []
        self.close_reason = ""

    def __repr__(self) -> str:
        return f"Session({self.source}:{self.key}, {len(self.events)} events, {self.close_reason or 'open'})"


class Sessionizer:
    """Open sessions keyed by (source, key), ordered by last activity."""

    def __init__(self, cfg: SessionsConfig) -> None:
        self.idle = cfg.idle_timeout_s
        self.max_duration = cfg.max_duration_s
        self.max_events = cfg.max_events
        self.window = cfg.window_s
        self.max_open = cfg.max_open_sessions
        self._end = re.compile(cfg.end_pattern) if cfg.end_pattern else None
        self.open: OrderedDict[tuple[str, str], Session] = OrderedDict()
        self._counts: dict[str, int] = {}
        self.evicted = 0

    def add(self, source: str, key: str | None, ts: float | None, now: float, event: int,
            raw: str, offset: int, message: str, closed: list[Session]) -> None:
        """Append one event; sessions that close because of it are appended to ``closed``."""
        t = ts if ts is not None else now
        if key is None:
            key = self._window_key(source, ts)
        skey = (source, key)
        sess = self.open.get(skey)
        if sess is not None and (t - sess.last_seen > self.idle or t - sess.first_ts > self.max_duration):
            self._close(skey, "idle" if t - sess.last_seen > self.idle else "max_duration", closed)
            sess = None
        if sess is None:
            if len(self.open) >= self.max_open:
                oldest = next(iter(self.open))
                self._close(oldest, "evicted", closed)
                self.evicted += 1
            sess = self.open[skey] = Session(source, key, t, raw, offset)
        else:
            self.open.move_to_end(skey)
        sess.events.append(event)
        if t > sess.last_ts:
            sess.last_ts = t
        sess.last_seen = t
        if len(sess.samples) < MAX_SAMPLES:
            sess.samples.append(raw)
        if self._end is not None and self._end.search(message):
            self._close(skey, "end", closed)
        elif len(sess.events) >= self.max_events:
            self._close(skey, "max_events", closed)

    def _window_key(self, source: str, ts: float | None) -> str:
        if ts is not None:
            return f"window@{int(ts // self.window) * self.window:.0f}"
        n = self._counts.get(source, 0)
        self._counts[source] = n + 1
        return f"run#{n // self.max_events}"

    def _close(self, skey: tuple[str, str], reason: str, closed: list[Session]) -> None:
        sess = self.open.pop(skey)
        sess.close_reason = reason
        closed.append(sess)

    def tick(self, now: float, closed: list[Session]) -> None:
        """Close sessions idle for longer than the timeout or older than the maximum duration."""
        while self.open:
            skey, sess = next(iter(self.open.items()))
            if now - sess.last_seen > self.idle:
                self._close(skey, "idle", closed)
            else:
                break
        if self.max_duration < float("inf"):
            for skey in [k for k, s in self.open.items() if now - s.first_ts > self.max_duration]:
                self._close(skey, "max_duration", closed)

    def flush(self, closed: list[Session]) -> None:
        for skey in list(self.open):
            self._close(skey, "flush", closed)
