"""Checkpoints and the alert journal: what lets the daemon stop (or crash) and carry on.

Stage: **sources** (daemon) ↔ sessions ↔ alerts. A checkpoint saves together, atomically
(temp file, fsync, rename), where every followed file was left (device, inode, a fingerprint
of its head, offset), the open sessions, the templates learned since the fit, the pipeline's
counters and the journal's length. It is plain JSON with a schema version, checked by
pydantic on load: loading never executes anything.

Exactly-once alerts. Alerts are appended to ``<state_dir>/alerts.jsonl`` as they are raised;
before each checkpoint the journal is fsynced and its length saved in the checkpoint. After a
crash the daemon restarts from the checkpoint and re-reads the lines that followed it, so the
alerts raised in between are raised again, with the same ``alert_id`` (a hash of the session's
source, key and first line). The journal holds exactly those after the saved length: they are
recognised by id and not appended twice; those not raised again yet when the next checkpoint
is written are carried in it (``pending``). A torn last line (a crash mid-write) is cut off
first; any other damaged line (a disk fault, an edit) is skipped, counted and logged once, and
left in the file — it is no record of its alert, so that alert is appended again if it is
raised again. Every other line keeps its alert and its number.
"""

from __future__ import annotations

import logging
import os
import time
from collections import Counter, deque
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import Annotated, Literal

import orjson
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from ..fs import atomic_write
from ..errors import StateError, first_problem
from ..sessions import MAX_SAMPLES
from .follow import FINGERPRINT_BYTES

log = logging.getLogger("tracewatch.checkpoint")

SCHEMA_VERSION = 1
COUNTERS = ("records", "rejected", "repaired", "lines", "sessions_scored", "alerts", "untimed")
TAIL_READ_BYTES = 8 << 20  # the recent alerts /api/alerts serves are read back from this much
PENDING_READ_BYTES = 1 << 20  # read back from a checkpoint's mark at a time, for its pending alerts


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)


# Bounds on what a checkpoint may hold: generous for any real state, so that a damaged or
# hand-edited file is refused with one line instead of making the daemon hang or run out of
# memory (the file's size is bounded too, before it is parsed).
MAX_CHECKPOINT_BYTES = 1 << 30
MAX_ITEMS = 10_000_000  # open sessions, events in one, templates, masked messages
MAX_TEXT = 1 << 26  # one line's text (a session key, a sample, a template)
MAX_NAME = 4096  # a path, a source name
MAX_OFFSET = (1 << 63) - 1  # what a file offset (off_t) can be
MAX_TS = 1e11  # seconds from 1970, either way (about the year 5100)

Count = Annotated[int, Field(ge=0, le=MAX_OFFSET)]
Offset = Annotated[int, Field(ge=-1, le=MAX_OFFSET)]  # -1: a line fed without one
Seconds = Annotated[float, Field(ge=-MAX_TS, le=MAX_TS)]
Name = Annotated[str, Field(max_length=MAX_NAME)]
Text = Annotated[str, Field(max_length=MAX_TEXT)]
Index = Annotated[int, Field(ge=0, le=MAX_ITEMS)]


class FilePosition(_Strict):
    """Where a followed file was left (written by :meth:`Follower.positions`)."""
    source: Name
    path: Annotated[str, Field(min_length=1, max_length=MAX_NAME)]
    dev: Count
    ino: Count
    offset: Count
    fp: Annotated[str, Field(pattern=r"^[0-9a-f]{32}$")]  # blake2b-128 of the head, in hex
    fp_len: int = Field(ge=0, le=FINGERPRINT_BYTES)
    size: Count = 0  # the file's size then, as read (0: not saved)
    mtime_ns: Count = 0  # its mtime then (0: not saved): a file rotated after the checkpoint is newer

    @model_validator(mode="after")
    def _consistent(self) -> FilePosition:
        if self.size and self.offset > self.size:
            raise ValueError(f"offset {self.offset} is past the size {self.size}")
        return self


Open = tuple[Name, Text, Annotated[list[Index], Field(max_length=MAX_ITEMS)], Seconds, Seconds, Seconds, Text, Offset,
             Annotated[list[Text], Field(max_length=MAX_SAMPLES)]]


class SavedSessions(_Strict):
    # source, key, events, first_ts, last_ts, last_seen, first_raw, first_offset, samples
    open: list[Open] = Field(max_length=MAX_ITEMS)
    run_counts: dict[Name, Count] = Field(max_length=MAX_ITEMS)
    evicted: Count


class SavedTemplate(_Strict):
    id: Annotated[str, Field(pattern=r"^[0-9a-z:_-]{1,64}$")]
    template: Text
    tokens: list[Text] = Field(min_length=1, max_length=MAX_ITEMS)
    path: list[Text] = Field(max_length=64)
    count: Count
    structured: bool
    severity: int = Field(default=0, ge=0, le=3)  # the worst level of its records (templates.severity)

    @model_validator(mode="after")
    def _consistent(self) -> SavedTemplate:
        if len(self.path) > len(self.tokens):
            raise ValueError(f"template {self.id}: a routing path longer than its tokens")
        return self


class SavedTemplates(_Strict):
    n_seen: Index
    templates: list[SavedTemplate] = Field(max_length=MAX_ITEMS)
    masked: list[tuple[Text, Index]] = Field(max_length=MAX_ITEMS)


class SavedPipeline(_Strict):
    watermark: Seconds
    counters: dict[Literal[COUNTERS], list[tuple[Annotated[list[Name], Field(min_length=1, max_length=2)], Count]]]
    sessions: SavedSessions
    templates: SavedTemplates


class JournalMark(_Strict):
    offset: Count
    count: Count
    # alerts in the journal before ``offset`` whose session a restart will close again
    pending: list[Annotated[str, Field(max_length=256)]] = Field(default_factory=list, max_length=MAX_ITEMS)


class StreamPosition(_Strict):
    """Where a source that is not a file glob was left (tracewatch/sources/streams.py): the
    journal's cursor, the OTLP spool's file and offset — its own text."""
    source: Name
    position: Text


class Checkpoint(_Strict):
    schema_version: int
    kind: Literal["tracewatch-checkpoint"]
    written: Seconds
    baseline_version: Annotated[str, Field(pattern=r"^v[0-9]{1,9}$")]  # a folder under baselines/
    files: list[FilePosition] = Field(max_length=100_000)
    streams: list[StreamPosition] = Field(default_factory=list, max_length=100_000)
    pipeline: SavedPipeline
    alerts: JournalMark


# -- save and load ------------------------------------------------------------------------------
def capture_chunks(pipeline, files: list[dict], mark: dict, streams: list[dict] | None = None,
                   per_chunk: int = 5000) -> Iterator[bytes]:
    """The checkpoint of a pipeline (whose closed sessions are already scored), file positions,
    the positions of the sources that are not files and the journal mark, serialised as JSON in
    pieces: the open sessions go out a few thousand at a time, so a checkpoint of 100k open
    sessions never sits in memory whole."""
    counters = {}
    for name in COUNTERS:
        counters[name] = [[list(k) if isinstance(k, tuple) else [k], n] for k, n in getattr(pipeline, name).items()]
    sessions = pipeline.sessionizer.to_state(with_open=False)
    dumps = orjson.dumps
    yield (b'{"schema_version":' + dumps(SCHEMA_VERSION) + b',"kind":"tracewatch-checkpoint","written":'
           + dumps(time.time()) + b',"baseline_version":' + dumps(pipeline.baseline.version)
           + b',"files":' + dumps(files) + b',"streams":' + dumps(streams or []) + b',"alerts":' + dumps(mark)
           + b',"pipeline":{"watermark":' + dumps(pipeline.watermark) + b',"counters":' + dumps(counters)
           + b',"templates":' + dumps(pipeline.miner.learned_state())
           + b',"sessions":{"run_counts":' + dumps(sessions["run_counts"]) + b',"evicted":'
           + dumps(sessions["evicted"]) + b',"open":[')
    first = True
    for part in pipeline.sessionizer.open_state(per_chunk):
        yield (b"" if first else b",") + b",".join(map(dumps, part))
        first = False
    yield b"]}}}"


def capture(pipeline, files: list[dict], mark: dict, streams: list[dict] | None = None) -> bytes:
    """:func:`capture_chunks` joined."""
    return b"".join(capture_chunks(pipeline, files, mark, streams))


def save_checkpoint(path: Path, data: bytes | Iterable[bytes]) -> None:
    atomic_write(path, data)


def load_checkpoint(path: Path) -> Checkpoint | None:
    """The saved checkpoint, or None when there is none yet; a damaged one is a StateError."""
    advice = ("; move it away to start afresh (files are then read as on a first start, and alerts "
              "already in alerts.jsonl stay)")
    try:
        if path.stat().st_size > MAX_CHECKPOINT_BYTES:
            raise StateError(f"{path}: the checkpoint is larger than {MAX_CHECKPOINT_BYTES >> 20} MiB, more than "
                             f"tracewatch ever writes{advice}")
        raw = path.read_bytes()
    except FileNotFoundError:
        return None
    except OSError as exc:
        raise StateError(f"{path}: cannot read the checkpoint: {exc.strerror or exc}") from exc
    try:
        ckpt = Checkpoint.model_validate_json(raw)
    except ValidationError as exc:
        raise StateError(f"{path}: the checkpoint is damaged ({first_problem(exc)}){advice}") from exc
    if ckpt.schema_version != SCHEMA_VERSION:
        raise StateError(f"{path}: checkpoint schema {ckpt.schema_version} is not supported by this "
                         f"tracewatch (schema {SCHEMA_VERSION}){advice}")
    return ckpt


def restore(pipeline, ckpt: Checkpoint) -> None:
    """Put a checkpoint's pipeline state back into a fresh pipeline built on the same baseline."""
    saved = ckpt.pipeline
    miner = pipeline.miner
    try:
        miner.restore_learned(saved.templates.model_dump())
    except ValueError as exc:
        raise StateError(f"checkpoint: {exc}") from exc
    n = len(miner.templates)
    for entry in saved.sessions.open:
        if any(not 0 <= e < n for e in entry[2]):
            raise StateError("checkpoint: an open session refers to a template that does not exist")
    pipeline.sessionizer.restore_state(dict(saved.sessions))
    for name in COUNTERS:
        counter = getattr(pipeline, name)
        counter.clear()
        for key, value in saved.counters.get(name, []):
            counter[key[0] if len(key) == 1 else tuple(key)] = value
    pipeline.watermark = saved.watermark


# -- the alert journal -----------------------------------------------------------------------------
def _lines(block: bytes, start: int) -> Iterator[tuple[int, bytes]]:
    """(offset, line) of every complete line of ``block``, which begins at file offset ``start``."""
    pos = 0
    while True:
        end = block.find(b"\n", pos)
        if end < 0:
            return
        yield start + pos, block[pos:end]
        pos = end + 1


class AlertJournal:
    """``alerts.jsonl``: every alert appended once, across restarts (see the module docstring).

    Alerts are numbered from 1 in journal order; :meth:`since` serves the most recent
    ``keep`` of them to ``/api/alerts``. A damaged line (not a JSON object with an
    ``alert_id``: a disk fault, an edit) keeps its number, is left in the file as it is, counted
    in ``damaged`` and logged once; it is no record of its alert, so an alert it held that is
    raised again after a restart is appended again. Nothing else is lost."""

    def __init__(self, path: Path, keep: int = 1000) -> None:
        self.path = path
        self.keep = keep
        self.fd = -1
        self.size = 0
        self.count = 0
        self.replayed = 0  # alerts raised again after a restart and recognised
        self.damaged = 0  # lines found damaged when the journal was opened
        self.recent: deque[tuple[int, dict]] = deque(maxlen=keep)
        self._already: Counter[str] = Counter()
        self._damaged_at: set[int] = set()  # their offsets (a line is read by more than one pass)

    def open(self, mark: JournalMark | None) -> None:
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self.fd = os.open(self.path, os.O_RDWR | os.O_APPEND | os.O_CREAT | os.O_CLOEXEC, 0o600)
        size = os.fstat(self.fd).st_size
        if size:  # cut a torn last line
            start = max(0, size - (1 << 20))
            block = os.pread(self.fd, size - start, start)
            cut = block.rfind(b"\n")
            end = start + cut + 1 if cut >= 0 else (0 if start == 0 else size)
            if end != size:
                log.warning("%s ended with a partial line (%d bytes); cut it off", self.path, size - end)
                os.ftruncate(self.fd, end)
                size = end
        self.size = size
        start = 0
        if mark is not None and mark.offset <= size:
            start, self.count = mark.offset, mark.count
        elif mark is not None:
            log.warning("%s is shorter than when the checkpoint was written; numbering its alerts afresh",
                        self.path)
        if mark is not None and mark.offset <= size:  # written since the checkpoint: a few seconds' worth
            after = self._read(start, size)
            self.count += after.count(b"\n")
            self._already = self._pending(mark)
            self._already.update(a["alert_id"] for a in self._alerts(after, start))
        else:
            self.count += sum(self._read(pos, min(size, pos + (1 << 24))).count(b"\n")
                              for pos in range(start, size, 1 << 24))
        tail_start = max(0, size - TAIL_READ_BYTES)
        lines = list(_lines(self._read(tail_start, size), tail_start))[1 if tail_start else 0:]  # the first may be cut
        lines = lines[-self.keep:]
        first = self.count - len(lines) + 1
        for i, (offset, line) in enumerate(lines):
            alert = self._parse(offset, line)
            if alert is not None:
                self.recent.append((first + i, alert))
        self.damaged = len(self._damaged_at)
        if self.damaged:
            log.error("%s: %d damaged line(s) skipped (the first at byte %d); they stay in the file, and every "
                      "other alert is kept", self.path, self.damaged, min(self._damaged_at))

    def _parse(self, offset: int, line: bytes) -> dict | None:
        """The alert of one line, or None for a damaged line (counted by its offset)."""
        try:
            alert = orjson.loads(line)
        except orjson.JSONDecodeError:
            alert = None
        if isinstance(alert, dict) and isinstance(alert.get("alert_id"), str):
            return alert
        self._damaged_at.add(offset)
        return None

    def _alerts(self, block: bytes, start: int) -> Iterator[dict]:
        """The readable alerts of ``block``, which begins at a line start, file offset ``start``."""
        for offset, line in _lines(block, start):
            alert = self._parse(offset, line)
            if alert is not None:
                yield alert

    def _pending(self, mark: JournalMark) -> Counter[str]:
        """The mark's pending alerts whose line is there, read back from the mark (they were
        written shortly before it); one whose line is damaged will be appended again."""
        want = Counter(mark.pending)
        found: Counter[str] = Counter()
        pos = mark.offset
        while pos > 0 and +(want - found):
            start = max(0, pos - PENDING_READ_BYTES)
            block = self._read(start, pos)
            while start > 0 and block.find(b"\n", 0, len(block) - 1) < 0:  # a line longer than one read
                lower = max(0, start - PENDING_READ_BYTES)
                block, start = self._read(lower, start) + block, lower
            if start > 0:  # begin at a line start: the part before the first newline is read next
                cut = block.find(b"\n", 0, len(block) - 1) + 1
                block, start = block[cut:], start + cut
            found.update(a["alert_id"] for a in self._alerts(block, start) if a["alert_id"] in want)
            pos = start
        missing = want - found
        if missing:
            log.warning("%s: %d alert(s) of the checkpoint are not readable there; they are appended again "
                        "when raised", self.path, sum(missing.values()))
        return want - missing

    def _read(self, start: int, end: int) -> bytes:
        chunks, pos = [], start
        while pos < end:
            data = os.pread(self.fd, min(end - pos, 1 << 24), pos)
            if not data:
                break
            chunks.append(data)
            pos += len(data)
        return b"".join(chunks)

    def append(self, alert: dict) -> bool:
        """Append one alert; False when it is one raised again after a restart and already there."""
        aid = alert["alert_id"]
        if self._already[aid] > 0:
            self._already[aid] -= 1
            self.replayed += 1
            return False
        line = orjson.dumps(alert, option=orjson.OPT_APPEND_NEWLINE | orjson.OPT_SERIALIZE_NUMPY)
        view = memoryview(line)
        while view:
            view = view[os.write(self.fd, view):]
        self.size += len(line)
        self.count += 1
        self.recent.append((self.count, alert))
        return True

    def sync(self) -> dict:
        """Make every appended alert durable; returns the mark a checkpoint saves."""
        os.fsync(self.fd)
        return {"offset": self.size, "count": self.count, "pending": list(self._already.elements())}

    def since(self, seq: int, limit: int) -> dict:
        items = [(n, a) for n, a in self.recent if n > seq][:limit]
        oldest = self.recent[0][0] if self.recent else self.count + 1
        return {"alerts": [a for _, a in items], "next": items[-1][0] if items else max(seq, 0),
                "total": self.count, "missed": max(0, min(oldest, self.count + 1) - seq - 1)}

    def close(self) -> None:
        if self.fd >= 0:
            os.close(self.fd)
            self.fd = -1
