"""The spool: what the OTLP/HTTP receiver accepted, on disk before it is acknowledged.

Stage: **sources** (daemon) → formats. The receiver's threads append each accepted request as
one line of OTLP/JSON (:meth:`Spool.append`) to numbered files in ``<state_dir>/otlp/<source>/``;
the daemon's loop reads them back like a followed file (:meth:`Spool.poll`: lines in order,
offsets, one stream per file) into the pipeline. A :class:`~tracewatch.sources.streams.StreamSource`.

- The position a checkpoint saves is ``<file number>:<byte offset>`` of the first line not yet
  read; after a restart reading resumes there, and goes on through every later file. A file
  read to its end is deleted once a checkpoint past it is on disk.
- A request is answered only once its line is written (``write(2)`` to the file): ``kill -9``
  of the daemon loses no acknowledged request, and none is read twice. The files are fsynced
  at every checkpoint, so a power loss can lose what was acknowledged since the last one.
- ``max_queue_bytes`` bounds what is spooled and not read yet: past it :meth:`append` refuses
  (the receiver answers 429), so a daemon that cannot keep up pushes back on its senders
  instead of filling the disk.
- Each run writes a file of its own (the number after the highest there); a line cut short by
  a crash in the middle of its write (its request was never acknowledged) ends that file and is
  left out, with a warning.
"""

from __future__ import annotations

import logging
import os
import re
import threading
import time
from pathlib import Path

from ..errors import StateError
from .files import block_of
from .follow import LineSink

log = logging.getLogger("tracewatch.spool")

READ_CHUNK = 4 << 20  # bytes handed on per poll
_NAME = re.compile(r"^([0-9]{12})\.jsonl$")
_POSITION = re.compile(r"^([0-9]{1,12}):([0-9]{1,19})$")
NO_LIMIT = 1 << 62


class Spool:
    """One OTLP source's spool: appended by the receiver's threads, read by the daemon's loop."""

    def __init__(self, source: str, folder: Path, *, max_queue_bytes: int, file_bytes: int,
                 max_line_bytes: int = NO_LIMIT) -> None:
        self.source = source
        self.max_line_bytes = max_line_bytes  # a line is read up to this (the source's line_limit)
        self.folder = folder
        self.max_queue = max_queue_bytes
        self.file_bytes = file_bytes
        self.detached: str | None = "not attached yet"
        self.sink: LineSink | None = None
        self.lock = threading.Lock()  # the writer's state, and the sizes the reader may read up to
        self.sizes: dict[int, int] = {}  # file number -> bytes written (complete lines only)
        self.write_seq = -1
        self.write_fd = -1
        self.read_seq = 0
        self.read_offset = 0
        self.pending = 0  # bytes written and not read yet
        self.refused = 0  # appends refused because the queue was full
        self.accepted = 0  # lines appended
        self.behind_since: float | None = None
        self._saved_seq = -1
        self._position_seq = -1

    # -- the receiver's side ----------------------------------------------------------------------
    def append(self, line: bytes) -> str:
        """Write one line (no newline in it): ``"accepted"``; ``"full"`` (nothing written) while
        the queue is full, ``"closed"`` before :meth:`attach` and after :meth:`close`."""
        data = line + b"\n"
        with self.lock:
            if self.write_fd < 0:
                return "closed"
            if self.pending + len(data) > self.max_queue and self.pending:
                self.refused += 1
                return "full"
            if self.sizes[self.write_seq] >= self.file_bytes:
                self._next_file()
            view = memoryview(data)
            while view:
                view = view[os.write(self.write_fd, view):]
            self.sizes[self.write_seq] += len(data)
            self.pending += len(data)
            self.accepted += 1
        return "accepted"

    def _next_file(self) -> None:
        if self.write_fd >= 0:
            os.fsync(self.write_fd)
            os.close(self.write_fd)
        self.write_seq += 1
        path = self._path(self.write_seq)
        self.write_fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_APPEND | os.O_CLOEXEC, 0o600)
        self.sizes[self.write_seq] = os.fstat(self.write_fd).st_size

    def _path(self, seq: int) -> Path:
        return self.folder / f"{seq:012d}.jsonl"

    # -- the daemon's side ------------------------------------------------------------------------
    def attach(self, position: str | None, sink: LineSink) -> None:
        self.sink = sink
        try:
            self.folder.mkdir(parents=True, exist_ok=True, mode=0o700)
            found = sorted(int(m.group(1)) for m in map(_NAME.match, os.listdir(self.folder)) if m)
        except OSError as exc:
            raise StateError(f"{self.folder}: cannot use the OTLP spool folder: {exc.strerror or exc}") from exc
        start = (found[0], 0) if found else (0, 0)
        if position is not None:
            m = _POSITION.match(position)
            if m is None:
                raise StateError(f"checkpoint: OTLP spool position {position!r} of source {self.source} is not "
                                 "FILE:OFFSET; move the checkpoint away to start afresh")
            start = (int(m.group(1)), int(m.group(2)))
            if found and start[0] < found[0]:
                log.warning("%s: spool file %d of the checkpoint is gone; reading from file %d",
                            self.folder, start[0], found[0])
                start = (found[0], 0)
        for seq in found:
            if seq >= start[0]:
                self.sizes[seq] = self._complete_size(seq)
        if start[0] in self.sizes and start[1] > self.sizes[start[0]]:
            raise StateError(f"checkpoint: OTLP spool position {position} is past the end of "
                             f"{self._path(start[0])}; move the checkpoint away to start afresh")
        self.read_seq, self.read_offset = start
        self.pending = sum(self.sizes.values()) - (start[1] if start[0] in self.sizes else 0)
        self.write_seq = max([*found, start[0]])
        with self.lock:
            self._next_file()
        for seq in found:  # read to their ends already: a checkpoint was past them
            if seq < start[0]:
                self._delete(seq)
        self.detached = None

    def _complete_size(self, seq: int) -> int:
        """A file's size up to its last newline (a line cut short by a crash is left out)."""
        path = self._path(seq)
        size = path.stat().st_size
        if not size:
            return 0
        complete, at = 0, size
        with open(path, "rb") as fh:  # back from the end, a chunk at a time, to the last newline
            while at > 0:
                at = max(0, at - READ_CHUNK)
                fh.seek(at)
                cut = fh.read(min(READ_CHUNK, size - at)).rfind(b"\n")
                if cut >= 0:
                    complete = at + cut + 1
                    break
        if complete != size:
            log.warning("%s ends with %d bytes of a request cut short by a crash (never acknowledged); left out",
                        path, size - complete)
        return complete

    def poll(self) -> bool:
        """Hand on what was spooled since the last poll; True while more is waiting."""
        with self.lock:
            end = self.sizes.get(self.read_seq, 0)
            newer = self.read_seq < self.write_seq
        if self.read_offset < end:
            with open(self._path(self.read_seq), "rb") as fh:
                fh.seek(self.read_offset)
                data = fh.read(min(READ_CHUNK, end - self.read_offset))
                while b"\n" not in data[-READ_CHUNK:] and self.read_offset + len(data) < end:
                    data += fh.read(min(READ_CHUNK, end - self.read_offset - len(data)))  # a line longer than a chunk
            cut = data.rfind(b"\n") + 1
            if cut:
                stream = str(self._path(self.read_seq))
                self.sink.feed_block(self.source, stream, *block_of(data[:cut], self.read_offset, self.max_line_bytes))
                self.read_offset += cut
                with self.lock:
                    self.pending -= cut
        elif newer:  # this file is finished: on to the next
            self.sink.end_stream(self.source, str(self._path(self.read_seq)))
            self.read_seq, self.read_offset = self.read_seq + 1, 0
            return True
        with self.lock:
            behind = self.pending > 0
        self.behind_since = (self.behind_since or time.monotonic()) if behind else None
        return behind

    def position(self) -> str:
        self._position_seq = self.read_seq
        return f"{self.read_seq}:{self.read_offset}"

    def saved(self) -> None:
        """The checkpoint with :meth:`position` is on disk: files before it go; the one being
        written is fsynced (the next checkpoint's durability)."""
        with self.lock:
            if self.write_fd >= 0:
                os.fsync(self.write_fd)
        for seq in [s for s in self.sizes if s < self._position_seq]:
            self._delete(seq)

    def _delete(self, seq: int) -> None:
        try:
            self._path(seq).unlink()
        except FileNotFoundError:
            pass
        with self.lock:
            self.sizes.pop(seq, None)

    def status(self) -> dict:
        with self.lock:
            pending = self.pending
        return {"source": self.source, "path": str(self.folder), "offset": self.read_offset,
                "size": self.sizes.get(self.read_seq, 0), "lag_bytes": pending,
                "lag_seconds": 0.0 if self.behind_since is None else round(time.monotonic() - self.behind_since, 3),
                "state": "receiving", "accepted": self.accepted, "refused": self.refused}

    def close(self) -> None:
        with self.lock:
            if self.write_fd >= 0:
                os.fsync(self.write_fd)
                os.close(self.write_fd)
                self.write_fd = -1
        self.detached = "closed"
