"""Live source: follow files as they grow.

Stage: **sources** (daemon) → formats. Hands complete new lines on to a sink in blocks, as
``feed_block(source, stream, lines, offsets, repairs)``, and says ``end_stream(source, stream)``
when a file is finished — the sink is the pipeline. Lines are decoded as the batch reader
decodes them (:func:`tracewatch.sources.files.block_of`).

Filesystem notifications (watchdog: inotify, or a polling observer for network filesystems)
only wake the follower up; ``stat`` decides what happened. A file is known by its device and
inode plus a fingerprint of its head, so a reused inode is a new file.

- Files matching a source's globs are picked up as they appear. On the daemon's very first
  start (no checkpoint) the files already there start at their end or their beginning as the
  source's ``start_at`` says; a file that appears later is read from its beginning.
- Rotation by rename, or deletion: the old file is read to its end first — and for
  ``rotation_grace_s`` longer while it still grows — before the new file at its path.
  A file renamed to a name the globs still match is simply followed under its new name.
- Copytruncate (the file got shorter than what was read, or its head changed): what the copy
  (a file beside it with the same head) holds beyond the read offset is read from the copy,
  then the files rotated after that copy (two rotations between two reads, found as below),
  then the file again from 0. A copy the globs match is not read a second time.
- After a restart, each checkpointed file is looked for as it may have become while the daemon
  was down: at its path, or renamed beside it (its device and inode, and the same head); if its
  inode was truncated since (copytruncate: the head changed, or it is shorter than the saved
  offset), the copy beside it with the saved head, from the saved offset. The rotations made
  while the daemon was down come next, oldest first: the files beside it named after a followed
  file (``app.log`` → ``app.log.1``, ``app.log-20261130``; not compressed ones) that were
  written after the checkpointed file and that the globs do not match, read from 0 — except a
  copy of a file still followed (a copy made just before a truncate that has not happened yet).
  Then the files at the globbed paths, the truncated inode among them, from 0.
- Rotated files are read one after another, the one that stopped growing first first, and a
  source's followed files wait until they are: lines go on in the order they were written.
- A last line without its newline is held until the newline arrives; a finished file that
  ends that way hands it on as a line, as the batch reader does.
"""

from __future__ import annotations

import glob
import hashlib
import logging
import os
import stat
import time
from collections.abc import Callable
from typing import Protocol

from ..config import SourceConfig
from ..errors import InputError
from .files import block_of, decode_line

log = logging.getLogger("tracewatch.follow")

FINGERPRINT_BYTES = 1024
CHUNK_BYTES = 1 << 20  # read per file per poll: keeps ticks, checkpoints and HTTP responsive
START_SCAN_BYTES = 1 << 16  # start_at = "end": back up to the last newline within this much
_WILD = frozenset("*?[")
COMPRESSED = (".gz", ".bz2", ".xz", ".zst", ".lz4", ".zip", ".Z")  # rotated and compressed: not readable as lines


class LineSink(Protocol):
    def feed_block(self, source: str, stream: str, lines: list[str], offsets: list[int],
                   repairs: list[str | None] | None) -> None: ...

    def end_stream(self, source: str, stream: str) -> None: ...


def _head(fd: int, n: int) -> tuple[str, int]:
    data = os.pread(fd, n, 0)
    return hashlib.blake2b(data, digest_size=16).hexdigest(), len(data)


def watch_dirs(pattern: str) -> tuple[str, bool]:
    """The folder a glob lives in and whether files below it may be deeper (recursive watch)."""
    parts = os.path.abspath(pattern).split(os.sep)
    for i, part in enumerate(parts):
        if _WILD & set(part):
            return os.sep.join(parts[:i]) or os.sep, i < len(parts) - 1
    return os.path.dirname(os.path.abspath(pattern)), False


class Tail:
    """One file being read: an open descriptor, the offset of the first line not yet handed on
    (``offset``), the next byte to read (``pos``) and the partial line in between."""

    def __init__(self, src: SourceConfig, path: str, fd: int, st: os.stat_result, offset: int,
                 now: float) -> None:
        self.source = src.name
        self.max_line_bytes = src.line_limit
        self.path = path
        self.fd = fd
        self.dev, self.ino = st.st_dev, st.st_ino
        self.stream = f"{path}@{st.st_dev}:{st.st_ino}"
        self.offset = self.pos = offset
        self.partial = bytearray()
        self.partial_len = 0
        self.size = st.st_size
        self.fp, self.fp_len = _head(fd, FINGERPRINT_BYTES)
        self.former = ("", 0)  # the head before the last truncation
        self.rotated_at: float | None = None  # when no glob-matched path pointed to it any more
        self.ended_ns = 0  # its mtime then: rotated files are read in the order they stopped growing
        self.grew_at = now
        self.behind_since: float | None = None

    @property
    def identity(self) -> tuple[int, int]:
        return self.dev, self.ino

    def head_matches(self, fd: int) -> bool:
        return self.fp_len == 0 or _head(fd, self.fp_len) == (self.fp, self.fp_len)

    def is_copy(self, fd: int) -> bool:
        """Does the file open at ``fd`` start as this one did (now, or before it was truncated)?"""
        return any(n >= 64 and _head(fd, n) == (fp, n) for fp, n in ((self.fp, self.fp_len), self.former))

    def consume(self, data: bytes, sink: LineSink) -> None:
        """Hand on every complete line in ``data`` (which follows ``pos``) as a block, decoded as
        the batch reader decodes (:func:`~tracewatch.sources.files.block_of`); hold the rest."""
        self.pos += len(data)
        cut = data.rfind(b"\n") + 1
        body, tail = data[:cut], data[cut:]
        cap = self.max_line_bytes + 1  # enough to know that a line is too long
        offset = self.offset
        if body and self.partial_len:  # the first line began in an earlier read
            end = body.index(b"\n")
            first = bytes(self.partial) + body[:max(0, min(end, cap - len(self.partial)))]
            text, repair = decode_line(first[:-1] if first.endswith(b"\r") else first, self.max_line_bytes)
            sink.feed_block(self.source, self.stream, [text], [offset], [repair])
            offset += self.partial_len + end + 1
            self.partial.clear()
            self.partial_len = 0
            body = body[end + 1:]
        if body:
            sink.feed_block(self.source, self.stream, *block_of(body, offset, self.max_line_bytes))
            offset += len(body)
        self.offset = offset
        if tail:
            if len(self.partial) < cap:
                self.partial += tail[:cap - len(self.partial)]
            self.partial_len += len(tail)

    def finish_partial(self, sink: LineSink) -> None:
        """The file ends without a newline: its last line is a line all the same."""
        if self.partial_len:
            self.consume(b"\n", sink)
            self.pos -= 1  # the newline was ours, not the file's
            self.offset -= 1

    def reset(self) -> None:
        """Read the file again from 0 (after it was truncated)."""
        self.offset = self.pos = self.size = 0
        self.partial.clear()
        self.partial_len = 0
        self.former = (self.fp, self.fp_len)
        self.fp, self.fp_len = _head(self.fd, FINGERPRINT_BYTES)

    def close(self) -> None:
        os.close(self.fd)


class Follower:
    """Follows every source's globs and hands new lines to ``sink``.

    Drive it with :meth:`attach` once, then :meth:`poll` whenever something may have changed
    (a notification, or the poll interval); ``clock`` is monotonic seconds and replaceable.
    """

    def __init__(self, sources: list[SourceConfig], sink: LineSink, *, rotation_grace_s: float = 2.0,
                 rescan_interval_s: float = 1.0, clock: Callable[[], float] = time.monotonic,
                 chunk_bytes: int = CHUNK_BYTES) -> None:
        self.sources = {s.name: s for s in sources}
        self.sink = sink
        self.grace = rotation_grace_s
        self.rescan_interval = rescan_interval_s
        self.clock = clock
        self.chunk = chunk_bytes
        self.tails: list[Tail] = []
        self.globs = {s.name: [os.path.abspath(p) for p in s.paths] for s in sources}
        self.dirs = {s.name: sorted({watch_dirs(p)[0] for p in s.paths}) for s in sources}
        self.detached: dict[str, str] = {}  # source -> why it is not attached
        self.rescan_wanted = True
        self._last_scan = -1e18
        self._first_start = True
        self._unreadable: set[str] = set()

    # -- start -----------------------------------------------------------------------------
    def check_paths(self) -> None:
        """Start-up check: every source's folders exist and are readable."""
        for name, dirs in self.dirs.items():
            if not self.globs[name]:
                raise InputError(f"source {name!r}: no paths = [...] to follow")
            for d in dirs:
                if not os.path.isdir(d):
                    raise InputError(f"source {name!r}: folder {d} does not exist")
                if not os.access(d, os.R_OK | os.X_OK):
                    raise InputError(f"source {name!r}: folder {d} is not readable")

    def attach(self, saved: list[dict] | None = None) -> None:
        """Open the files: those in ``saved`` (a checkpoint) where they were left (the module
        docstring says where they are looked for), then the rotations made while the daemon was
        down, then the others: by ``start_at`` on a first start (``saved is None``), else from
        their beginning."""
        self._first_start = saved is None
        now = self.clock()
        moved: list[tuple[SourceConfig, str, int]] = []  # (source, folder, mtime of what was found)
        saved_ns: dict[str, int] = {}  # per source: the newest mtime of the files the checkpoint names
        for pos in saved or []:
            src = self.sources.get(pos["source"])
            if src is None:
                log.warning("checkpoint names source %r, which the config no longer has; its file "
                            "%s is not followed", pos["source"], pos["path"])
                continue
            if not self._watched(src.name, pos["path"]):
                log.warning("checkpoint names %s for source %s, outside the folders it follows; not read",
                            pos["path"], src.name)
                continue
            saved_ns[src.name] = max(saved_ns.get(src.name, 0), pos.get("mtime_ns", 0))
            identity = (pos["dev"], pos["ino"])
            found = self._with_head(os.path.dirname(pos["path"]), (pos["fp"], pos["fp_len"]), pos["offset"],
                                    want=identity, first=pos["path"])
            if found is None:
                log.warning("%s (source %s) is gone since the checkpoint, and no copy of it was found; lines "
                            "written to it after byte %d were not read", pos["path"], src.name, pos["offset"])
                moved.append((src, os.path.dirname(pos["path"]), 0))
                continue
            path, fd, st = found
            self.tails.append(Tail(src, path, fd, st, pos["offset"], now))
            if (st.st_dev, st.st_ino) != identity:
                log.info("%s was truncated since the checkpoint; reading its bytes from %d on from the copy %s",
                         pos["path"], pos["offset"], path)
            if path != pos["path"] or (st.st_dev, st.st_ino) != identity:
                moved.append((src, os.path.dirname(path), st.st_mtime_ns))
            elif not pos["fp_len"]:  # empty then: no head tells whether it was copied and truncated since
                moved.append((src, os.path.dirname(path), 0))
        for src, folder, found_ns in moved:
            # rotated while down = written after the checkpoint: later than any file it names was
            # then (a rotated file read before the checkpoint stopped growing before those did)
            self._follow_rotated(src, folder, max(found_ns, saved_ns.get(src.name, 0)), now,
                                 "was rotated while tracewatch was down")
        self._scan(now, startup=True)

    def _watched(self, name: str, path: str) -> bool:
        """Is ``path`` in a folder that source ``name`` follows (a checkpoint may be tampered with)?"""
        folder = os.path.dirname(os.path.abspath(path))
        for pattern in self.globs[name]:
            top, recursive = watch_dirs(pattern)
            if folder == top or (recursive and folder.startswith(top.rstrip(os.sep) + os.sep)):
                return True
        return False

    def _open(self, path: str) -> tuple[int, os.stat_result] | None:
        try:
            fd = os.open(path, os.O_RDONLY | os.O_CLOEXEC)
        except FileNotFoundError:
            return None
        st = os.fstat(fd)
        if not stat.S_ISREG(st.st_mode):
            os.close(fd)
            return None
        return fd, st

    def _siblings(self, folder: str, first: str | None = None) -> list[tuple[str, os.stat_result]]:
        """The regular files in ``folder`` (``first`` first) with their ``stat``."""
        try:
            names = sorted(e.path for e in os.scandir(folder) if e.path != first)
        except OSError:
            names = []
        out = []
        for path in ([first] if first else []) + names:
            try:
                st = os.stat(path)
            except OSError:
                continue
            if stat.S_ISREG(st.st_mode):
                out.append((path, st))
        return out

    def _with_head(self, folder: str, head: tuple[str, int], min_size: int, *, want: tuple[int, int] | None = None,
                   skip: tuple[int, int] | None = None, first: str | None = None
                   ) -> tuple[str, int, os.stat_result] | None:
        """The file in ``folder`` that starts with ``head`` and holds at least ``min_size`` bytes:
        the one with the identity ``want`` if it does, else the newest other one (a copy; never
        ``skip``, and only for a head of at least one byte). Returned open."""
        best = None
        for path, st in self._siblings(folder, first):
            same = (st.st_dev, st.st_ino) == want
            if st.st_size < min_size or (st.st_dev, st.st_ino) == skip or not (same or head[1]):
                continue
            if not same and best is not None and st.st_mtime_ns <= best[2].st_mtime_ns:
                continue
            opened = self._open(path)
            if opened is None:
                continue
            fd, st = opened
            if head[1] and _head(fd, head[1]) != head:
                os.close(fd)
                continue
            if best is not None:
                os.close(best[1])
            best = (path, fd, st)
            if same:
                break
        return best

    def _follow_rotated(self, src: SourceConfig, folder: str, since_ns: int, now: float, why: str) -> None:
        """Read, as rotated files, oldest first, the files of ``src`` rotated in ``folder`` that
        were written after ``since_ns``: named after a file the globs match, but not matched
        by them, not followed yet, not compressed, not a copy of a followed file. (On a
        filesystem whose timestamps are coarse, a rotation within the same tick as the last write
        before the checkpoint looks no newer than it, and is missed.)"""
        if not since_ns:
            return
        matched = {p for pattern in self.globs[src.name] for p in glob.glob(pattern, recursive=True)
                   if os.path.dirname(p) == folder}
        stems = {os.path.basename(p) for p in matched}
        known = {t.identity for t in self.tails}
        heads = []  # of the matched files: a copy of one is read through it, once it is truncated
        for path in matched:
            opened = self._open(path)
            if opened is not None:
                heads.append(_head(opened[0], FINGERPRINT_BYTES))
                os.close(opened[0])
        found = []
        for path, st in self._siblings(folder):
            name = os.path.basename(path)
            if (path in matched or (st.st_dev, st.st_ino) in known or st.st_mtime_ns <= since_ns
                    or name.endswith(COMPRESSED) or not any(name.startswith(s) and name != s for s in stems)):
                continue
            opened = self._open(path)
            if opened is None:
                continue
            fd, st = opened
            if any(t.is_copy(fd) for t in self.tails) or any(n >= 64 and _head(fd, n) == (fp, n) for fp, n in heads):
                os.close(fd)
                continue
            found.append((path, fd, st))
        for path, fd, st in sorted(found, key=lambda x: x[2].st_mtime_ns):
            log.info("%s %s; reading it from its start", path, why)
            t = Tail(src, path, fd, st, 0, now)
            t.rotated_at, t.ended_ns = now, st.st_mtime_ns
            self.tails.append(t)

    # -- the loop body -----------------------------------------------------------------------
    def poll(self) -> bool:
        """Confirm with ``stat``, pick up new files, read new lines; True while input is waiting."""
        now = self.clock()
        for t in self.tails:
            if t.rotated_at is None and not _points_to(t.path, t.identity):
                self.rescan_wanted = True
        if self.rescan_wanted or now - self._last_scan >= self.rescan_interval:
            self._scan(now, startup=False)
        behind = False
        waiting: set[str] = set()  # sources with a rotated file not read to its end yet
        for t in sorted(self.tails, key=lambda t: (t.rotated_at is None, t.ended_ns)):
            if t.source in waiting:
                behind = True
                continue
            try:
                behind |= self._read(t, self.chunk, now)
            except OSError as exc:
                if t.path not in self._unreadable:
                    self._unreadable.add(t.path)
                    log.warning("%s: read failed (%s); will retry", t.path, exc.strerror or exc)
                continue
            self._unreadable.discard(t.path)
            if t.rotated_at is not None:
                if t.pos < t.size:
                    waiting.add(t.source)
                elif now - max(t.grew_at, t.rotated_at) >= self.grace:
                    self._finish(t)
        return behind

    def _read(self, t: Tail, chunk: int, now: float) -> bool:
        st = os.fstat(t.fd)
        if st.st_size != t.size:
            t.grew_at = now
            if st.st_size < t.pos or not t.head_matches(t.fd):
                if self._truncated(t):
                    return True  # files rotated in between come first
                st = os.fstat(t.fd)
            elif t.fp_len < FINGERPRINT_BYTES and st.st_size > t.fp_len:
                t.fp, t.fp_len = _head(t.fd, FINGERPRINT_BYTES)
            t.size = st.st_size
        if t.pos < t.size:
            data = os.pread(t.fd, min(chunk, t.size - t.pos), t.pos)
            t.consume(data, self.sink)
        if t.pos < t.size:
            if t.behind_since is None:
                t.behind_since = now
            return True
        t.behind_since = None
        return False

    def _truncated(self, t: Tail) -> bool:
        """Copytruncate: finish from the copy what was not read yet, then the files rotated after
        the copy, if any (two rotations since the file was last read), then start again at 0.
        True when there are such files (they are read first)."""
        copy = None
        if t.fp_len:
            copy = self._with_head(os.path.dirname(t.path), (t.fp, t.fp_len), t.offset, skip=t.identity)
        if copy is not None:
            path, fd, st = copy
            log.info("%s was truncated; reading its last %s bytes from the copy %s", t.path,
                     st.st_size - t.offset, path)
            t.pos = t.offset
            t.partial.clear()
            t.partial_len = 0
            while data := os.pread(fd, self.chunk, t.pos):
                t.consume(data, self.sink)
            os.close(fd)
        elif t.size > t.pos:
            log.warning("%s was truncated before its last %d bytes were read; they are lost",
                        t.path, t.size - t.pos)
        t.finish_partial(self.sink)
        t.reset()
        if copy is None:
            return False
        n = len(self.tails)
        self._follow_rotated(self.sources[t.source], os.path.dirname(t.path), st.st_mtime_ns, self.clock(),
                             f"was rotated after {path}")
        return len(self.tails) > n

    def _finish(self, t: Tail) -> None:
        t.finish_partial(self.sink)
        self.sink.end_stream(t.source, t.stream)
        t.close()
        self.tails.remove(t)
        log.info("finished %s (source %s) at byte %d", t.path, t.source, t.pos)

    # -- discovery -------------------------------------------------------------------------
    def _scan(self, now: float, *, startup: bool) -> None:
        self.rescan_wanted = False
        self._last_scan = now
        found: dict[tuple[int, int], tuple[str, str]] = {}
        for name, patterns in self.globs.items():
            missing = [d for d in self.dirs[name] if not os.path.isdir(d)]
            if missing:
                self.detached[name] = f"folder {missing[0]} does not exist"
            else:
                self.detached.pop(name, None)
            for pattern in patterns:
                for path in sorted(glob.glob(pattern, recursive=True)):
                    try:
                        st = os.stat(path)
                    except OSError:
                        continue
                    if stat.S_ISREG(st.st_mode):
                        found.setdefault((st.st_dev, st.st_ino), (name, path))
        known = {t.identity: t for t in self.tails}
        for t in self.tails:
            hit = found.get(t.identity)
            if hit is not None:
                t.path, t.rotated_at = hit[1], None
            elif t.rotated_at is None:
                t.rotated_at = now
                t.ended_ns = os.fstat(t.fd).st_mtime_ns
                log.info("%s (source %s) was rotated or deleted; reading it to its end", t.path, t.source)
        for identity, (name, path) in found.items():
            if identity not in known:
                self._add(self.sources[name], path, now, startup=startup)

    def _add(self, src: SourceConfig, path: str, now: float, *, startup: bool) -> None:
        try:
            opened = self._open(path)
        except OSError as exc:
            if startup:
                raise InputError(f"{path}: cannot read: {exc.strerror or exc}") from exc
            if path not in self._unreadable:
                self._unreadable.add(path)
                log.warning("%s: cannot read (%s); will retry", path, exc.strerror or exc)
            return
        if opened is None:
            return
        self._unreadable.discard(path)
        fd, st = opened
        offset = 0
        copy_of = next((t for t in self.tails
                        if os.path.dirname(t.path) == os.path.dirname(path) and t.is_copy(fd)), None)
        if copy_of is not None:
            offset = st.st_size  # a copy (copytruncate): its lines come through the original
            log.info("%s looks like a copy of %s; not reading it again", path, copy_of.path)
        elif startup and self._first_start and src.start_at == "end":
            offset = _last_line_end(fd, st.st_size)
        self.tails.append(Tail(src, path, fd, st, offset, now))
        log.info("following %s (source %s) from byte %d", path, src.name, offset)

    # -- what the daemon reports and saves -----------------------------------------------------
    def positions(self, held_from: Callable[[str, str], int | None] | None = None) -> list[dict]:
        """Where to resume each file after a restart (JSON-ready, for the checkpoint)."""
        out = []
        for t in self.tails:
            offset = t.offset
            held = held_from(t.source, t.stream) if held_from is not None else None
            if held is not None and 0 <= held < offset:
                offset = held
            out.append({"source": t.source, "path": t.path, "dev": t.dev, "ino": t.ino, "offset": offset,
                        "fp": t.fp, "fp_len": t.fp_len, "size": t.size, "mtime_ns": _mtime_ns(t.fd)})
        return out

    def status(self) -> list[dict]:
        now = self.clock()
        return [{"source": t.source, "path": t.path, "offset": t.offset, "size": t.size,
                 "lag_bytes": max(0, t.size - t.pos),
                 "lag_seconds": 0.0 if t.behind_since is None else round(now - t.behind_since, 3),
                 "state": "rotated" if t.rotated_at is not None else "following"} for t in self.tails]

    def close(self) -> None:
        for t in self.tails:
            t.close()
        self.tails.clear()


def _mtime_ns(fd: int) -> int:
    try:
        return os.fstat(fd).st_mtime_ns
    except OSError:
        return 0


def _points_to(path: str, identity: tuple[int, int]) -> bool:
    try:
        st = os.stat(path)
    except OSError:
        return False
    return (st.st_dev, st.st_ino) == identity


def _last_line_end(fd: int, size: int) -> int:
    """Where the last complete line of a file ends (start there: no half line)."""
    start = max(0, size - START_SCAN_BYTES)
    data = os.pread(fd, size - start, start)
    cut = data.rfind(b"\n")
    return size if cut < 0 else start + cut + 1


class Watcher:
    """Filesystem notifications as wake-up hints for the follower (watchdog observers).

    ``wake(rescan)`` is called from watchdog's thread: ``rescan`` is True when files may have
    appeared, moved or gone. Folders that do not exist yet are watched once they appear
    (:meth:`refresh`)."""

    def __init__(self, folders: dict[str, bool], wake: Callable[[bool], None], *, polling: bool,
                 interval: float) -> None:
        from watchdog.events import FileSystemEventHandler
        from watchdog.observers import Observer
        from watchdog.observers.polling import PollingObserver

        class _Hint(FileSystemEventHandler):
            def on_any_event(self, event) -> None:
                if event.event_type in ("created", "deleted", "moved"):
                    wake(True)
                elif event.event_type in ("modified", "closed"):
                    wake(False)

        self.folders = folders
        self.polling = polling
        self.handler = _Hint()
        self.observer = PollingObserver(timeout=interval) if polling else Observer(timeout=interval)
        self.watches: dict[str, object] = {}

    def start(self) -> None:
        self.refresh()
        self.observer.start()

    def refresh(self) -> None:
        for folder, recursive in self.folders.items():
            exists = os.path.isdir(folder)
            if exists and folder not in self.watches:
                try:
                    self.watches[folder] = self.observer.schedule(self.handler, folder, recursive=recursive)
                except OSError as exc:
                    log.warning("cannot watch %s (%s); it is checked every poll interval instead",
                                folder, exc.strerror or exc)
                    self.watches[folder] = None
            elif not exists and folder in self.watches:
                watch = self.watches.pop(folder)
                if watch is not None:
                    try:
                        self.observer.unschedule(watch)
                    except (KeyError, OSError):
                        pass

    def stop(self) -> None:
        self.observer.stop()
        self.observer.join(timeout=5)
