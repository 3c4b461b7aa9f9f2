"""Sessions: events grouped by session key into ordered sequences.

Stage: templates → **sessions** → features. A session closes on an end pattern, an idle
timeout, a maximum duration or a maximum event count, or when the number of open sessions
reaches its bound (the oldest is closed early: ``evicted``). Records without a key fall
into time windows per source (or, without timestamps, runs of ``max_events`` records).

Time comes from the records when they carry it, otherwise from the clock the caller passes
in, so batch replays and the live daemon close sessions the same way.

Live time (the daemon, :class:`LiveTime`): sessions are closed in *event time*. ``now`` is the
newest record timestamp read so far (the watermark) plus the wall-clock time that has passed
since the watermark last moved, counted only while the daemon has no unread input. So

- a session that a batch replay closes by idle timeout (a later record of its key, or the
  watermark, is more than ``idle_timeout_s`` past its last event) closes live too, and no later
  than the batch would close it;
- the wall clock only moves time on while input is quiet, so catching up on a backlog (after a
  restart, or a burst faster than the daemon) never ages sessions that are still being read;
- the one case where live and batch differ is a writer that pauses for longer than
  ``idle_timeout_s`` minus the gap between two events of one session in its own timestamps
  (a replay of old logs at a slow pace): live, the session closes during the pause.

Without any timestamps, ``now`` is the wall clock.
"""

from __future__ import annotations

import heapq
import itertools
import re
import time
from collections import OrderedDict
from collections.abc import Callable, Sequence
from itertools import repeat

from .config import SessionsConfig

# raw sample lines kept per session for its alert: its first FIRST_SAMPLES lines, then lines of
# events never seen at fit (the example in its incident's title), MAX_SAMPLES in all (bounds memory
# per open session)
FIRST_SAMPLES = 3
MAX_SAMPLES = 6


class Session:
    __slots__ = ("source", "key", "events", "first_ts", "last_ts", "last_seen", "first_raw",
                 "first_offset", "samples", "close_reason", "partial", "times")

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
        self.partial = False  # cut short by an eviction, or the rest of one: never judged
        # each event's time, kept only for sources whose records may arrive out of time order
        # (spans of one trace in several exports): the events are put in time order at close
        self.times: list[float] | None = None

    def order_by_time(self) -> None:
        """Events in time order (stable: equal times keep arrival order), when kept times say
        they arrived otherwise."""
        times = self.times
        if times is not None and any(a > b for a, b in zip(times, times[1:])):
            order = sorted(range(len(times)), key=times.__getitem__)
            self.events = [self.events[i] for i in order]
            self.times = [times[i] for i in order]

    def __repr__(self) -> str:
        return f"Session({self.source}:{self.key}, {len(self.events)} events, {self.close_reason or 'open'})"


class Sessionizer:
    """Open sessions keyed by (source, key), ordered by last activity."""

    def __init__(self, cfg: SessionsConfig, by_time: frozenset[str] = frozenset()) -> None:
        self.idle = cfg.idle_timeout_s
        # sources whose sessions are put in time order at close (formats with ``by_time``)
        self.by_time = by_time
        self.max_duration = cfg.max_duration_s
        self.max_events = cfg.max_events
        self.window = cfg.window_s
        self.max_open = cfg.max_open_sessions
        self._end = re.compile(cfg.end_pattern) if cfg.end_pattern else None
        self.open: OrderedDict[tuple[str, str], Session] = OrderedDict()
        # (first time + max_duration, creation number, session) of open sessions, earliest first;
        # entries of sessions closed otherwise are dropped when they come up
        self._deadlines: list[tuple[float, int, Session]] = []
        self._created = itertools.count()
        self._counts: dict[str, int] = {}
        # template indices from here on are events never seen at fit (the pipeline sets it to the
        # baseline's count of templates): their lines are kept as samples beyond the first ones
        self.unseen_from = 1 << 62
        self.evicted = 0
        # key -> last activity of sessions evicted lately (bounded): what comes later for such a
        # key within the idle timeout is the rest of a session cut short, not a session of its own
        self._evicted_keys: OrderedDict[tuple[str, str], float] = OrderedDict()

    def add(self, source: str, key: str | None, ts: float | None, now: float, event: int,
            raw: str, offset: int, message: str, closed: list[Session]) -> None:
        """Append one event; sessions that close because of it are appended to ``closed``."""
        self.add_many(source, (key,), (ts,), (event,), (raw,), (offset,), (message,), now, closed)

    def add_many(self, source: str, keys, stamps, events, raws, offsets, messages, now: float,
                 closed: list[Session]) -> float | None:
        """Append events of one source in order (the loop of :meth:`add`, with its lookups done
        once and what does not depend on the open sessions computed for the whole batch first).
        A record without a time takes ``now``, moved on by the times of the records before it;
        returns the newest record time, or None when no record had one."""
        if None in stamps:
            times, newest = [], None
            for ts in stamps:
                if ts is None:
                    times.append(now)
                else:
                    times.append(ts)
                    if ts > now:
                        now = ts
                    if newest is None or ts > newest:
                        newest = ts
        else:
            times, newest = stamps, max(stamps, default=None)
        if None in keys:
            keys = [key if key is not None else self._window_key(source, ts) for key, ts in zip(keys, stamps)]
        open_, get, move_to_end = self.open, self.open.get, self.open.move_to_end
        deadlines = self._deadlines if self.max_duration < float("inf") else None
        evicted_keys = self._evicted_keys
        idle, max_duration, max_events, end = self.idle, self.max_duration, self.max_events, self._end
        by_time = source in self.by_time
        unseen_from = self.unseen_from
        for skey, t, event, raw, offset, message in zip(zip(repeat(source), keys), times, events, raws, offsets,
                                                         messages):
            sess = get(skey)
            if sess is not None and (t - sess.last_seen > idle or t - sess.first_ts > max_duration):
                self._close(skey, "idle" if t - sess.last_seen > idle else "max_duration", closed)
                sess = None
            if sess is None:
                if len(open_) >= self.max_open:
                    self._evict(closed)
                sess = open_[skey] = Session(source, skey[1], t, raw, offset)
                if evicted_keys and skey in evicted_keys and t - evicted_keys.pop(skey) <= idle:
                    sess.partial = True
                if deadlines is not None:
                    heapq.heappush(deadlines, (t + max_duration, next(self._created), sess))
                if by_time:
                    sess.times = []
            else:
                move_to_end(skey)
                if by_time and (t < sess.first_ts or (t == sess.first_ts and raw < sess.first_raw)):
                    # the session starts at its earliest record whatever the order of arrival
                    # (which file the follower read first): its start and alert id stay the same
                    sess.first_ts, sess.first_raw, sess.first_offset = t, raw, offset
                    if deadlines is not None:  # its max_duration deadline moves with it (the old entry is skipped)
                        heapq.heappush(deadlines, (t + max_duration, next(self._created), sess))
            evs, samples = sess.events, sess.samples
            evs.append(event)
            if by_time and sess.times is not None:
                sess.times.append(t)
            if t > sess.last_ts:
                sess.last_ts = t
            sess.last_seen = t
            if len(samples) < FIRST_SAMPLES or (event >= unseen_from and len(samples) < MAX_SAMPLES):
                samples.append(raw)
            if end is not None and end.search(message):
                self._close(skey, "end", closed)
            elif len(evs) >= max_events:
                self._close(skey, "max_events", closed)
        return newest

    def _window_key(self, source: str, ts: float | None) -> str:
        if ts is not None:
            return f"window@{int(ts // self.window) * self.window:.0f}"
        n = self._counts.get(source, 0)
        self._counts[source] = n + 1
        return f"run#{n // self.max_events}"

    def _evict(self, closed: list[Session]) -> None:
        """Close the least recently active session early to make room; it and what comes later
        for its key are marked ``partial``. An eviction is tracewatch out of room, not the
        application misbehaving, so judging the pieces would only raise false alarms."""
        skey, sess = next(iter(self.open.items()))
        sess.partial = True
        self._close(skey, "evicted", closed)
        self.evicted += 1
        keys = self._evicted_keys
        keys[skey] = sess.last_seen
        if len(keys) > self.max_open:
            keys.popitem(last=False)

    def _close(self, skey: tuple[str, str], reason: str, closed: list[Session]) -> None:
        sess = self.open.pop(skey)
        sess.order_by_time()
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
        deadlines = self._deadlines
        while deadlines and deadlines[0][0] < now:
            sess = heapq.heappop(deadlines)[2]
            skey = (sess.source, sess.key)
            if self.open.get(skey) is sess:
                self._close(skey, "max_duration", closed)
        if len(deadlines) > 2 * len(self.open) + 1024:  # mostly sessions closed otherwise: rebuild
            self._track_deadlines()

    def _track_deadlines(self) -> None:
        self._deadlines = []
        if self.max_duration < float("inf"):
            self._deadlines = [(s.first_ts + self.max_duration, next(self._created), s) for s in self.open.values()]
            heapq.heapify(self._deadlines)

    def flush(self, closed: list[Session]) -> None:
        for skey in list(self.open):
            self._close(skey, "flush", closed)
        self._deadlines.clear()

    # -- live operation: checkpoints and baseline switches (daemon) -----------------------
    def to_state(self, *, with_open: bool = True) -> dict:
        """Open sessions (oldest activity first) and counters, JSON-ready, for a checkpoint."""
        state = {"run_counts": dict(self._counts), "evicted": self.evicted}
        if with_open:
            state["open"] = [entry for part in self.open_state() for entry in part]
        return state

    def open_state(self, per_part: int = 5000):
        """The open sessions as checkpoint entries, ``per_part`` at a time."""
        part = []
        for s in self.open.values():
            part.append([s.source, s.key, s.events, s.first_ts, s.last_ts, s.last_seen, s.first_raw,
                         s.first_offset, s.samples])
            if len(part) >= per_part:
                yield part
                part = []
        if part:
            yield part

    def restore_state(self, state: dict) -> None:
        """Put back what :meth:`to_state` saved; replaces any open sessions."""
        self.open.clear()
        for source, key, events, first_ts, last_ts, last_seen, first_raw, first_offset, samples in state["open"]:
            sess = Session(source, key, first_ts, first_raw, first_offset)
            sess.events = list(events)
            sess.last_ts, sess.last_seen, sess.samples = last_ts, last_seen, list(samples)
            self.open[(source, key)] = sess
        self._track_deadlines()
        self._counts = dict(state["run_counts"])
        self.evicted = int(state["evicted"])

    def remap(self, mapping: Sequence[int]) -> None:
        """Re-express open sessions' events in another template numbering (a new baseline)."""
        for sess in self.open.values():
            sess.events = [mapping[e] for e in sess.events]


class LiveTime:
    """The daemon's clock for closing sessions: event time that moves on while input is quiet
    (the rule is in this module's docstring).

    ``watermark()`` gives the newest record timestamp fed so far (0.0 before any); ``wall`` is
    the replaceable wall clock. Call :meth:`hold` whenever input is still waiting to be read.
    """

    def __init__(self, watermark: Callable[[], float], wall: Callable[[], float] = time.time) -> None:
        self.watermark = watermark
        self.wall = wall
        self._mark = 0.0
        self._quiet = 0.0  # wall seconds counted since the watermark last moved
        self._since = wall()

    def __call__(self) -> float:
        mark, wall = self.watermark(), self.wall()
        if mark != self._mark:
            self._mark, self._quiet = mark, 0.0
        else:
            self._quiet += max(0.0, wall - self._since)
        self._since = wall
        return mark + self._quiet if mark else wall

    def hold(self) -> None:
        """Input is still waiting: the wall time since the clock was last read does not count."""
        self._since = self.wall()
