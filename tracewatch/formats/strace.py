"""Format ``strace``: system-call traces written by ``strace -f`` (with or without ``-tt``,
``-ttt``, ``-T``).

Stage: sources → **formats** → templates. Each system call, signal and process exit becomes
a record whose event type bypasses template mining:

    openat(AT_FDCWD, "/etc/x", O_RDONLY) = -1 ENOENT (No such file...)   → openat:ENOENT
    --- SIGCHLD {si_signo=SIGCHLD, ...} ---                             → signal:SIGCHLD
    +++ exited with 1 +++                                               → exited:1
    +++ killed by SIGKILL +++                                           → killed:SIGKILL

Lines carry a ``[pid N]`` prefix (output to the terminal) or a bare pid (``-o FILE``); lines
without one belong to the first traced process, keyed ``main``. Other lines (strace's own
notices, the program's stderr, cut lines) are rejected as ``not_strace`` and kept out of the
sequences. A call split into
``name(... <unfinished ...>`` and ``<... name resumed> ...) = r`` becomes one record at the
time it started; a call still unfinished when its process exits is kept under its bare name.

The session is the pid, or with ``strace_session = "tree"`` the pid that started the process
tree: the return values of clone/clone3/fork/vfork map children to their root, and a child
whose first line comes before its parent's fork call has returned (strace prints it so) joins
the process with a fork in flight. The processes of a tree run at once and their lines
interleave as the scheduler pleases, so for tree sessions order across processes is noise:
``[features] ngram_max = 1`` (counts of events) suits them better than longer n-grams.
"""

from __future__ import annotations

import re
from datetime import datetime, timedelta

from ..config import SourceConfig
from ..records import Record, Rejection
from . import Format, Output

FORKS = frozenset({"clone", "clone3", "fork", "vfork"})
MAIN = "main"  # key of lines without a pid prefix
MAX_TRACKED = 65_536  # processes with a call in flight / known roots; past it the oldest go
# a first time of day up to this far past "now" is still of now's day (a writer's clock a little
# ahead of the reader's; common practice), one further on was printed the day before
AHEAD_S = 3600

_PREFIX = re.compile(r"(?:\[pid +(\d+)\] |(\d+) +)?"
                     r"(?:(\d\d):(\d\d):(\d\d)(\.\d+)? |(\d{9,10}\.\d+) )?(.*)\Z", re.S)
_CALL = re.compile(r"([a-z_][a-z0-9_]*)\((.*)\) += (\S+)(.*)\Z", re.S)
_RESUMED = re.compile(r"<\.\.\. ([a-z_][a-z0-9_]*) resumed>(.*)\) += (\S+)(.*)\Z", re.S)
_UNFINISHED = re.compile(r"([a-z_][a-z0-9_]*)\((.*?) ?<unfinished \.\.\.>\Z", re.S)
_ERRNO = re.compile(r"(?:<[^>]*>)? (E[A-Z0-9]+) \(")
_SIGNAL = re.compile(r"--- (?:stopped by )?(SIG[A-Z0-9+-]+)")
_EXIT = re.compile(r"\+\+\+ (?:exited with (-?\d+)|killed by (SIG[A-Z0-9+-]+)(?: \(core dumped\))?) \+\+\+\Z")


def _errno(ret: str, rest: str) -> str | None:
    """The errno name of a failed call: ``-1 ENOENT (...)`` or ``? ERESTARTSYS (...)``."""
    if ret not in ("-1", "?"):
        return None
    m = _ERRNO.match(rest)
    return m.group(1) if m else None


class StraceFormat(Format):
    name = "strace"
    reasons = ("empty", "not_strace")
    samples = [
        ({}, ['openat(AT_FDCWD, "/etc/x", O_RDONLY) = -1 ENOENT (No such file or directory)',
              "[pid  4242] 10:00:00.123456 clone(child_stack=NULL, flags=SIGCHLD) = 4243",
              "4243  1796163445.000100 read(3,  <unfinished ...>",
              "4242  1796163445.000200 --- SIGCHLD {si_signo=SIGCHLD, si_pid=4243} ---",
              "4243  1796163445.000300 <... read resumed>\"ab\", 2) = 2 <0.000010>",
              "4243  1796163445.000400 +++ exited with 1 +++", "strace: Process 4242 attached", "4244 wait4(-1,  <unfinished ...>"]),
        ({"strace_session": "tree"},
         ["100 clone(child_stack=NULL) = 101", "101 getpid() = 101", "101 +++ killed by SIGKILL +++"]),
    ]

    def __init__(self, src: SourceConfig) -> None:
        super().__init__(src)
        self.tree = src.strace_session == "tree"
        self._unfinished: dict[str, tuple[str, str, float | None, int]] = {}  # pid -> name, line, ts, offset
        self._root: dict[str, str] = {}  # pid -> the pid that started its tree (tree mode)
        self._day: float | None = None  # -tt / -t: local midnight the times of day count from
        self._last_tod = 0.0

    # -- time ---------------------------------------------------------------------------------
    def _time_of_day(self, h: str, m: str, s: str, frac: str | None) -> float | None:
        """``-t``/``-tt`` print the local time of day: the first one is dated by the day of
        :meth:`~tracewatch.formats.Format.now` (a replayed file's modification time, written
        after its lines: the day before when the time of day is past now's), the next ones
        roll over to the next day when the time goes back by more than twelve hours."""
        tod = int(h) * 3600 + int(m) * 60 + int(s) + (float(frac) if frac else 0.0)
        if tod >= 86400 + 1:
            return None
        if self._day is None:
            now = datetime.fromtimestamp(self.now())
            day = now.replace(hour=0, minute=0, second=0, microsecond=0)
            if tod > (now - day).total_seconds() + AHEAD_S:
                day -= timedelta(days=1)
            self._day = day.timestamp()
        elif tod < self._last_tod - 43200:
            self._day += 86400
        self._last_tod = tod
        return self._day + tod

    # -- sessions -----------------------------------------------------------------------------
    def _key(self, pid: str) -> str:
        if not self.tree:
            return pid
        root = self._root.get(pid)
        if root is None:
            if len(self._root) >= MAX_TRACKED:  # processes whose exit the trace never showed
                for old in list(self._root)[:MAX_TRACKED // 2]:
                    del self._root[old]
            forking = [p for p, u in self._unfinished.items() if u[0] in FORKS and p != pid]
            root = self._root.get(forking[-1], forking[-1]) if forking else pid
            self._root[pid] = root
        return root

    def _forked(self, pid: str, name: str, ret: str) -> None:
        if self.tree and name in FORKS and ret.isdigit():
            self._root.setdefault(ret, self._key(pid))

    # -- lines --------------------------------------------------------------------------------
    def feed(self, line: str, offset: int) -> Output:
        m = _PREFIX.match(line)
        pid = m.group(1) or m.group(2) or MAIN
        if m.group(3) is not None:
            ts = self._time_of_day(m.group(3), m.group(4), m.group(5), m.group(6))
        else:
            ts = float(m.group(7)) if m.group(7) else None
        body = m.group(8)
        if not body.strip():
            return [Rejection("empty", line)]
        c = _CALL.match(body)
        if c is not None:  # the common case: one line, one record
            return [self._record(pid, ts, self._result(pid, c), line, offset)]
        c = _RESUMED.match(body)
        if c is not None:
            event = self._result(pid, c)
            start = self._unfinished.pop(pid, None)
            if start is not None and start[0] == c.group(1):
                return [self._record(pid, start[2], event, start[1] + "\n" + line, start[3])]
            out = self._orphan(pid, start)
            return out + [self._record(pid, ts, event, line, offset)]
        c = _UNFINISHED.match(body)
        if c is not None:
            out = self._orphan(pid, self._unfinished.get(pid))
            if len(self._unfinished) >= MAX_TRACKED:  # a trace that never resumes its calls
                oldest = next(iter(self._unfinished))
                out += self._orphan(oldest, self._unfinished[oldest])
            self._unfinished[pid] = (c.group(1), line, ts, offset)
            if self.tree:
                self._key(pid)  # a fork in flight: know this pid's root before its child appears
            return out
        if body.startswith("--- "):
            s = _SIGNAL.match(body)
            if s is not None:
                return [self._record(pid, ts, f"signal:{s.group(1)}", line, offset)]
        elif body.startswith("+++ "):
            e = _EXIT.match(body)
            if e is not None:
                out = self._orphan(pid, self._unfinished.pop(pid, None))
                event = f"exited:{e.group(1)}" if e.group(1) is not None else f"killed:{e.group(2)}"
                out.append(self._record(pid, ts, event, line, offset))
                self._root.pop(pid, None)
                return out
        # not a call, signal or exit (strace's own notices, the program's stderr, a cut line):
        # counted, but kept out of the process's event sequence
        return [Rejection("not_strace", line)]

    def _result(self, pid: str, call: re.Match) -> str:
        """The event type of a finished call (name, and errno name when it failed)."""
        name, _args, ret, rest = call.groups()
        self._forked(pid, name, ret)
        err = _errno(ret, rest)
        return f"{name}:{err}" if err else name

    def _record(self, pid: str, ts: float | None, event: str, raw: str, offset: int) -> Record:
        return Record(self.source, self._key(pid), ts, None, event, raw, offset, event)

    def _orphan(self, pid: str, start: tuple | None) -> Output:
        """A call that never resumed (its process exited, or the trace lost the line): kept
        under its bare name."""
        if start is None:
            return []
        self._unfinished.pop(pid, None)
        name, line, ts, offset = start
        return [self._record(pid, ts, name, line, offset)]

    def flush(self) -> Output:
        out: Output = []
        for pid in list(self._unfinished):
            out += self._orphan(pid, self._unfinished[pid])
        return out
