"""The systemd journal, live: ``journalctl --follow -o json`` as a child of the daemon.

Stage: **sources** (daemon) → formats (``journald``). A
:class:`~tracewatch.sources.streams.StreamSource`: the daemon's loop reads the child's output
without blocking and hands complete lines to the pipeline; the position a checkpoint saves is
the journal cursor (``__CURSOR``) of the last entry handed on, and after a restart journalctl
starts right after it (``--after-cursor``), so every entry is read once, as a followed file's
lines are.

- On the very first start (no checkpoint) ``start_at = "end"`` begins after the newest entry
  there is (its cursor is asked of ``journalctl --lines=1`` first, so even a crash before any new
  entry resumes there), ``"beginning"`` with the oldest.
- The child is ``journalctl --output=json --all --follow --lines=all --no-pager`` with the
  source's ``journalctl_args`` (matches, ``--unit=``, ``--file=``, ``--directory=``); ``--all``
  keeps fields over 4096 bytes instead of ``null``. It dies with the daemon (``setpriv
  --pdeathsig``, util-linux, where there is one). When it exits, the source is detached (the
  reason, from its stderr, is on ``/readyz`` and logged) and it is started again after
  ``RESTART_S`` from the last cursor.

What can be lost (the journal's own limits, not the reader's): entries journald never stored
(its rate limit, ``RateLimitIntervalSec=``/``RateLimitBurst=``, drops them and logs
"Suppressed N messages"); entries removed by journal rotation or vacuuming while tracewatch was
down or behind (journalctl then resumes at the nearest entry still there); a journal file that
is replaced or corrupted (journalctl skips what it cannot read).
"""

from __future__ import annotations

import fcntl
import logging
import os
import re
import shutil
import subprocess
import time
from collections.abc import Callable

import orjson

from ..config import SourceConfig
from .files import block_of
from .follow import LineSink

log = logging.getLogger("tracewatch.journal")

READ_CHUNK = 1 << 20  # bytes handed on per poll
RESTART_S = 5.0  # a journalctl that exited is started again after this long
STDERR_KEPT = 4096
OWN_ARGS = ("--output=json", "--all", "--no-pager")
_CURSOR = re.compile(rb'"__CURSOR"\s*:\s*"((?:[^"\\]|\\.)*)"')
_REALTIME = re.compile(rb'"__REALTIME_TIMESTAMP"\s*:\s*"([0-9]{1,20})"')


def last_cursor(block: bytes) -> str | None:
    """The ``__CURSOR`` of the last entry in a block of ``journalctl -o json`` lines."""
    found = _CURSOR.search(block, block.rfind(b"\n", 0, len(block) - 1) + 1)
    if found is None:  # the last line has none (journalctl always writes one): look further back
        found = ([None] + list(_CURSOR.finditer(block)))[-1]
    return orjson.loads(b'"' + found.group(1) + b'"') if found is not None else None


def last_realtime(block: bytes) -> int:
    """The ``__REALTIME_TIMESTAMP`` (µs) of the last entry in a block of ``journalctl -o json`` lines."""
    found = _REALTIME.search(block, block.rfind(b"\n", 0, len(block) - 1) + 1)
    return int(found.group(1)) if found is not None else 0


def _nonblocking(fd: int) -> None:
    fcntl.fcntl(fd, fcntl.F_SETFL, fcntl.fcntl(fd, fcntl.F_GETFL) | os.O_NONBLOCK)


class JournalFollower:
    """One journald source following the journal through ``journalctl``."""

    def __init__(self, src: SourceConfig, *, journalctl: str = "journalctl",
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.source = src.name
        self.src = src
        self.journalctl = journalctl
        self.clock = clock
        self.args = list(src.journalctl_args or [])
        self.stream = "journal:" + " ".join(self.args)
        self.cursor: str | None = None
        self.detached: str | None = "not attached yet"
        self.sink: LineSink | None = None
        self.child: subprocess.Popen | None = None
        self.pending = b""
        self.read_bytes = 0
        self.entries = 0
        self.stderr = b""
        self.restart_at = 0.0
        self.behind_since: float | None = None
        self.catch_up_to = 0  # µs: the newest entry when journalctl started, while not read yet

    # -- the child ----------------------------------------------------------------------------------
    def _argv(self, *extra: str) -> list[str]:
        argv = [self.journalctl, *OWN_ARGS, *extra, *self.args]
        setpriv = shutil.which("setpriv")
        return [setpriv, "--pdeathsig", "TERM", "--", *argv] if setpriv else argv

    def _newest(self) -> tuple[str | None, int]:
        """The cursor and time (µs) of the newest entry there is now."""
        try:
            done = subprocess.run(self._argv("--lines=1"), capture_output=True, timeout=60, stdin=subprocess.DEVNULL)
        except (OSError, subprocess.TimeoutExpired) as exc:
            log.warning("%s: cannot ask journalctl for the newest entry (%s)", self.source, exc)
            return None, 0
        if done.returncode != 0:
            return None, 0
        return last_cursor(done.stdout), last_realtime(done.stdout)

    def _start(self) -> None:
        # what is there already is a backlog: until it is read, the source is behind (so that
        # live time does not age open sessions while journalctl is still catching up)
        newest, realtime = self._newest()
        self.catch_up_to = realtime if newest is not None and newest != self.cursor else 0
        position = [f"--after-cursor={self.cursor}"] if self.cursor else []
        argv = self._argv("--follow", "--lines=all", *position)
        try:
            self.child = subprocess.Popen(argv, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                                          stderr=subprocess.PIPE, bufsize=0)
        except OSError as exc:
            self.child = None
            self.detached = f"cannot run {self.journalctl}: {exc.strerror or exc}"
            self.restart_at = self.clock() + RESTART_S
            log.error("source %s: %s; trying again in %g s", self.source, self.detached, RESTART_S)
            return
        _nonblocking(self.child.stdout.fileno())
        _nonblocking(self.child.stderr.fileno())
        self.pending, self.stderr = b"", b""
        self.detached = None
        log.info("source %s: following the journal (%s)%s", self.source, " ".join(argv),
                 f" after cursor {self.cursor}" if self.cursor else "")

    def attach(self, position: str | None, sink: LineSink) -> None:
        self.sink = sink
        self.cursor = position
        if position is None and self.src.start_at == "end":
            self.cursor = self._newest()[0]
        self._start()

    # -- the daemon's loop --------------------------------------------------------------------------
    def poll(self) -> bool:
        child = self.child
        if child is None:
            if self.clock() >= self.restart_at:
                self._start()
            return False
        self._drain_stderr()
        try:
            data = os.read(child.stdout.fileno(), READ_CHUNK)
        except BlockingIOError:
            data = None
        if data:
            self._take(data)
        behind = bool(self.catch_up_to) or (data is not None and len(data) == READ_CHUNK)
        self.behind_since = (self.behind_since or self.clock()) if behind else None
        if data is None or data or child.poll() is None:
            return behind
        self._exited(child.wait())  # end of output: journalctl exited
        return False

    def _take(self, data: bytes) -> None:
        block = self.pending + data
        cut = block.rfind(b"\n") + 1
        self.pending = block[cut:]
        if not cut:
            return
        body = block[:cut]
        lines, offsets, repairs = block_of(body, self.read_bytes, self.src.max_line_bytes)
        self.sink.feed_block(self.source, self.stream, lines, offsets, repairs)
        self.read_bytes += cut
        self.entries += len(lines)
        cursor = last_cursor(body)
        if cursor is not None:
            self.cursor = cursor
        if self.catch_up_to and last_realtime(body) >= self.catch_up_to:
            self.catch_up_to = 0

    def _drain_stderr(self) -> None:
        try:
            while chunk := os.read(self.child.stderr.fileno(), 65536):
                self.stderr = (self.stderr + chunk)[-STDERR_KEPT:]
        except BlockingIOError:
            pass

    def _exited(self, code: int) -> None:
        self._drain_stderr()
        why = self.stderr.decode(errors="replace").strip().splitlines()
        self.detached = f"journalctl exited ({code}): {why[-1] if why else 'no message'}"
        log.error("source %s: %s; starting it again in %g s from the last entry read", self.source,
                  self.detached, RESTART_S)
        self._close_child()
        self.catch_up_to = 0
        self.restart_at = self.clock() + RESTART_S

    def position(self) -> str | None:
        return self.cursor

    def saved(self) -> None:
        pass

    def status(self) -> dict:
        return {"source": self.source, "path": self.stream, "offset": self.read_bytes, "size": self.read_bytes,
                "lag_bytes": len(self.pending),
                "lag_seconds": 0.0 if self.behind_since is None else round(self.clock() - self.behind_since, 3),
                "state": "following" if self.detached is None else "restarting", "entries": self.entries}

    def _close_child(self) -> None:
        child, self.child = self.child, None
        if child is None:
            return
        if child.poll() is None:
            child.terminate()
            try:
                child.wait(timeout=5)
            except subprocess.TimeoutExpired:
                child.kill()
                child.wait(timeout=5)
        child.stdout.close()
        child.stderr.close()

    def close(self) -> None:
        self._close_child()
        self.detached = "closed"
