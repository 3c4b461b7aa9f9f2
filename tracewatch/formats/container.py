"""Formats ``cri`` and ``docker-json``: container logs, the application's own lines inside.

Stage: sources → **formats** → templates. A container runtime wraps every line an application
writes to stdout or stderr; these formats unwrap it, join the pieces of a line the runtime
split, and hand the application's line to an *inner* format — the source's ``payload_format``
(``text`` by default, or ``jsonl``, ``syslog``, …) read with the source's own options
(``line_pattern``, ``message_field``, ``session_key``, …), exactly as if the application had
written it to a file. An inner record without a time of its own takes the runtime's.

``cri``: the CRI logging format kubelet reads from ``/var/log/pods`` (kubelet's parser,
kubernetes pkg/kubelet/kuberuntime/logs/logs.go ``parseCRILog``; the runtime's writer,
containerd pkg/cri/io/logger.go ``redirectLogs``)::

    <RFC 3339 time, nanoseconds> <stdout|stderr> <tags> <content>

``tags`` are ``:``-separated; the first is ``P`` (partial: the runtime cut the line, at
``max_container_log_line_size`` = 16 KiB by default, or the stream ended without a newline) or
``F`` (full: this piece ends the line). Anything else than ``P`` counts as full, as in kubelet.

``docker-json``: Docker's json-file logging driver (docs "JSON File logging driver"; moby
daemon/logger/jsonfilelog ``marshalMessage``): one object per line,
``{"log": "...\\n", "stream": "stdout", "time": "<RFC 3339 nanoseconds>"}``; a piece of a line
cut at Docker's 16 KiB buffer has no ``\\n`` at the end of ``log``, the last piece has.

The pieces of one line are joined per stream (stdout and stderr interleave in one file). A
line is handed on in the order of its *first* piece: while a stream's line is incomplete,
complete lines of the other stream that come after it wait, so a checkpoint that resumes at the
first waiting piece (``held_from``) never reads a handed-on line twice. At most
``HOLD_LINES`` lines wait: past that, or at the end of the file, an incomplete line is handed on
as it is (rejected as ``partial_unfinished``, its record kept). A joined line is cut at
``max_line_bytes`` (``joined_too_long``, record kept). A line that is not of the format is
rejected as ``bad_container_line`` and kept as a whole-line record.

Labels: the pod, namespace and container come from the file's name — kubelet's
``/var/log/containers/<pod>_<namespace>_<container>-<container id>.log`` or
``/var/log/pods/<namespace>_<pod>_<pod uid>/<container>/<n>.log``. With
``container_key_prefix`` (the default) each session key becomes
``<namespace>/<pod>/<container>:<key>``, so one container's sessions never mix with another's,
and every alert of such a session carries ``"container": {"namespace", "pod", "container"}``.
They are never metric labels (pods come and go without bound).
"""

from __future__ import annotations

import re
from collections import deque

import orjson

from ..config import SourceConfig
from ..records import Record, Rejection
from ..timestamps import parse_timestamp
from . import Format, Output, format_class, make_format

HOLD_LINES = 1024  # complete lines that may wait behind an incomplete one
BAD_LINE = "bad_container_line"
UNFINISHED = "partial_unfinished"
TOO_LONG = "joined_too_long"
STREAMS = ("stdout", "stderr")

# kubelet's names (DNS labels and subdomains: no "_" and no "/" in any of them)
_CONTAINERS_LINK = re.compile(r"(?:^|/)([a-z0-9][a-z0-9.-]*)_([a-z0-9][a-z0-9-]*)_([a-z0-9][a-z0-9-]*)-[0-9a-f]{64}\.log$")
_PODS_FILE = re.compile(r"(?:^|/)([a-z0-9][a-z0-9-]*)_([a-z0-9][a-z0-9.-]*)_[0-9a-f-]+/([a-z0-9][a-z0-9-]*)/[^/]+$")
_LIVE_SUFFIX = re.compile(r"@\d+:\d+$")  # the follower names a stream path@dev:ino


def container_labels(stream: str) -> dict[str, str] | None:
    """``{"namespace", "pod", "container"}`` from a kubelet log file's path, or None."""
    path = _LIVE_SUFFIX.sub("", stream)
    m = _CONTAINERS_LINK.search(path)
    if m is not None:
        return {"namespace": m.group(2), "pod": m.group(1), "container": m.group(3)}
    m = _PODS_FILE.search(path)
    if m is not None:
        return {"namespace": m.group(1), "pod": m.group(2), "container": m.group(3)}
    return None


class _Piece:
    """A line being joined, or joined and waiting for an earlier one."""

    __slots__ = ("offset", "ts", "parts", "size", "cut", "done", "raw", "bad")

    def __init__(self, offset: int, ts: float | None, raw: str, bad: str | None = None) -> None:
        self.offset = offset
        self.ts = ts
        self.parts: list[str] = []
        self.size = 0
        self.cut = False
        self.done = bad is not None
        self.raw = raw  # its first container line
        self.bad = bad  # why a line not of the format was rejected


def _payload(src: SourceConfig) -> SourceConfig:
    """The source options the payload's format reads the application lines with."""
    return src.model_copy(update={"format": src.payload_format})


class _ContainerFormat(Format):
    """Unwraps one runtime's lines; subclasses say how a line splits (:meth:`_split`)."""

    reasons = ("empty", BAD_LINE, UNFINISHED, TOO_LONG)

    def __init__(self, src: SourceConfig) -> None:
        super().__init__(src)
        self.inner = make_format(_payload(src))
        self.prefix_keys = src.container_key_prefix
        self.max_chars = src.max_line_bytes
        self.prefix: str | None = None
        self._open: dict[str, _Piece] = {}  # stream -> its incomplete line
        self._queue: deque[_Piece] = deque()  # lines in order of their first piece, not yet handed on
        self._times: dict[int, float | None] = {}  # offset -> runtime time, of lines the inner format holds

    @classmethod
    def reject_reasons(cls, src: SourceConfig) -> tuple[str, ...]:
        inner = _payload(src)
        return tuple(dict.fromkeys(cls.reasons + format_class(inner.format).reject_reasons(inner)))

    def dated_by(self, today) -> None:
        self.inner.dated_by(today)

    def open_stream(self, stream: str) -> None:
        self.inner.open_stream(stream)
        labels = container_labels(stream)
        if labels is not None and self.prefix_keys:
            self.prefix = f"{labels['namespace']}/{labels['pod']}/{labels['container']}:"

    @staticmethod
    def alert_fields(src: SourceConfig, key: str | None) -> dict:
        """The container of a session whose key carries the prefix."""
        if not src.container_key_prefix or key is None or key.count("/") < 2:
            return {}
        namespace, pod, rest = key.split("/", 2)
        container, sep, _ = rest.partition(":")
        return {"container": {"namespace": namespace, "pod": pod, "container": container}} if sep else {}

    def _split(self, line: str) -> tuple[float | None, str, bool, str] | None:
        """(time, stream, partial, content) of a line, or None when it is not of the format."""
        raise NotImplementedError

    # -- lines to application lines -------------------------------------------------------------
    def feed(self, line: str, offset: int) -> Output:
        parts = self._split(line)
        if parts is None:  # waits its turn like any finished line
            self._queue.append(_Piece(offset, None, line, "empty" if not line.strip() else BAD_LINE))
            return self._hand_on()
        ts, stream, partial, content = parts
        piece = self._open.get(stream)
        if piece is None:
            piece = _Piece(offset, ts, line)
            self._queue.append(piece)
        room = self.max_chars - piece.size
        if len(content) > room:
            content, piece.cut = content[:max(room, 0)], True
        if content:
            piece.parts.append(content)
            piece.size += len(content)
        if partial:
            self._open[stream] = piece
        else:
            self._open.pop(stream, None)
            piece.done = True
        out = self._hand_on()
        if len(self._queue) > HOLD_LINES:  # an incomplete line has held the others long enough
            out += self._give_up()
        return out

    def _give_up(self) -> Output:
        """Hand on the incomplete line at the head of the queue as it is, then what follows it."""
        piece = self._queue.popleft()
        for stream, open_piece in list(self._open.items()):
            if open_piece is piece:
                del self._open[stream]
        return self._inner(piece, UNFINISHED) + self._hand_on()

    def _hand_on(self) -> Output:
        """Hand the complete lines at the head of the queue to the inner format."""
        out: Output = []
        queue = self._queue
        while queue and queue[0].done:
            out += self._inner(queue.popleft())
        return out

    def _inner(self, piece: _Piece, reason: str | None = None) -> Output:
        if piece.bad is not None:
            keep = Record(self.source, None, None, None, piece.raw, piece.raw, piece.offset)
            return [Rejection(piece.bad, piece.raw, keep if piece.bad == BAD_LINE else None)]
        if len(self._times) >= HOLD_LINES:  # the inner format never gave those records back
            self._times.clear()
        self._times[piece.offset] = piece.ts
        out = self._adopt(self.inner.feed("".join(piece.parts), piece.offset))
        reason = reason or (TOO_LONG if piece.cut else None)
        if reason is not None:
            for i, item in enumerate(out):
                if type(item) is Record:
                    out[i] = Rejection(reason, piece.raw, item)
                    break
            else:  # the inner format gave no record to keep: count the line all the same
                out.append(Rejection(reason, piece.raw))
        return out

    def _adopt(self, out: Output) -> Output:
        """The inner format's records as this source's: the runtime's time where they have
        none, the container's prefix on their keys."""
        prefix, times = self.prefix, self._times
        for item in out:
            rec = item if type(item) is Record else item.record
            if rec is None:
                continue
            if rec.ts is None:
                rec.ts = times.get(rec.offset)
            if prefix is not None and rec.key is not None:
                rec.key = prefix + rec.key
        return out

    @property
    def held_from(self) -> int | None:
        held = [self._queue[0].offset] if self._queue else []
        inner = self.inner.held_from
        return min(held + ([inner] if inner is not None else []), default=None)

    def flush(self) -> Output:
        out: Output = []
        while self._queue:
            out += self._hand_on() if self._queue[0].done else self._give_up()
        return out + self._adopt(self.inner.flush())


class CriFormat(_ContainerFormat):
    name = "cri"
    samples = [
        ({"payload_format": "jsonl", "session_key": "req"}, [
            '2026-11-30T10:00:00.250000000Z stdout F {"time": "2026-11-30T10:00:00.250Z", "level": "INFO",'
            ' "req": "a1", "message": "door 5 opened"}',
            '2026-11-30T10:00:00.251034211Z stderr F {"level": "WARN", "req": "a1", "message": "door 5 slow"}',
            '2026-11-30T10:00:01.5Z stdout P {"level": "INFO", "req": "a1", "mess',
            "2026-11-30T10:00:01.500000100+01:00 stderr F plain words on stderr",
            '2026-11-30T10:00:01.6Z stdout F age": "courier CR1 signed off"}',
            "2026-11-30T10:00:02Z stdout F ",
            "2026-11-30T10:00:02Z stdin F not a stream",
            "not a container line at all"]),
        ({"line_pattern": r"^(?P<level>[A-Z]+) req=(?P<key>\w+) (?P<message>.*)$"}, [
            "2026-11-30T10:00:00.000000001Z stdout F INFO req=a7 compartment reserved",
            "2026-11-30T10:00:00.000000002Z stdout P INFO req=a7 parcel PX1 ",
            "2026-11-30T10:00:00.000000003Z stdout P:x deposited in ",
            "2026-11-30T10:00:00.000000004Z stdout F:x compartment 4",
            "2026-11-30T10:00:01Z stderr P ERROR req=a8 half a line never finished"]),
    ]

    def _split(self, line: str) -> tuple[float | None, str, bool, str] | None:
        # kubelet parseCRILog: time, stream, tags, each followed by one space; then the content
        first = line.find(" ")
        second = line.find(" ", first + 1)
        third = line.find(" ", second + 1)
        if first < 0 or second < 0 or third < 0:
            return None
        stream = line[first + 1:second]
        if stream not in STREAMS:
            return None
        ts = parse_timestamp(line[:first])
        if ts is None:
            return None
        tag = line[second + 1:third].split(":", 1)[0]
        return ts, stream, tag == "P", line[third + 1:]


class DockerJsonFormat(_ContainerFormat):
    name = "docker-json"
    samples = [
        ({"payload_format": "jsonl", "session_key": "req"}, [
            '{"log":"{\\"level\\": \\"INFO\\", \\"req\\": \\"a1\\", \\"message\\": \\"door 5 opened\\"}\\n",'
            '"stream":"stdout","time":"2026-11-30T10:00:00.250000000Z"}',
            '{"log":"{\\"level\\": \\"INFO\\", \\"req\\": \\"a1\\", \\"mess","stream":"stdout",'
            '"time":"2026-11-30T10:00:01.000000000Z"}',
            '{"log":"plain words on stderr\\n","stream":"stderr","time":"2026-11-30T10:00:01.100000000Z"}',
            '{"log":"age\\": \\"courier CR1 signed off\\"}\\n","stream":"stdout","time":"2026-11-30T10:00:01.2Z"}',
            '{"log":"no time\\n","stream":"stdout"}',
            '{"log":3,"stream":"stdout","time":"2026-11-30T10:00:02Z"}',
            "[1, 2]", "{cut"]),
    ]

    def _split(self, line: str) -> tuple[float | None, str, bool, str] | None:
        if not line.startswith("{"):
            return None
        try:
            obj = orjson.loads(line)
        except orjson.JSONDecodeError:
            return None
        if not isinstance(obj, dict):
            return None
        log, stream, time = obj.get("log"), obj.get("stream"), obj.get("time")
        if not isinstance(log, str) or stream not in STREAMS:
            return None
        ts = parse_timestamp(time) if isinstance(time, str) else None
        if log.endswith("\n"):  # jsonfilelog marshalMessage: only the last piece of a line ends with "\n"
            return ts, stream, False, log[:-1]
        return ts, stream, True, log
