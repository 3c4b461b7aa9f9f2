"""What container runtimes write, for the tests: an application's output bytes as a runtime puts
them in its log file, by the runtimes' own rules.

- :func:`cri_lines`: containerd's CRI logger (containerd pkg/cri/io/logger.go ``redirectLogs``):
  each line of the stream becomes ``<time> <stream> <tag> <content>``; a line longer than
  ``max_len`` (``max_container_log_line_size``, 16384 by default) is cut into pieces of
  ``max_len`` bytes tagged ``P``, its last piece tagged ``F`` (a line of exactly ``max_len``
  bytes is one ``F`` piece); a trailing ``\\r`` is dropped; output that ends without a newline
  is written as a ``P`` piece. Times are Go's ``time.RFC3339Nano`` (trailing zeros of the
  fraction dropped).
- :func:`docker_lines`: Docker's json-file driver (moby daemon/logger/copier.go: a 16 KiB
  buffer, a full buffer without a newline is logged as a partial message;
  daemon/logger/jsonfilelog ``marshalMessage``: only the last piece of a line gets its ``\\n``).
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from datetime import datetime, timezone

CRI_MAX = 16 * 1024
DOCKER_BUF = 16 * 1024


def rfc3339nano(ts: float) -> str:
    """Go's time.RFC3339Nano of a UTC time: nanoseconds without trailing zeros (none at all for
    a whole second)."""
    whole = int(ts)
    nanos = int(round((ts - whole) * 1e9))
    if nanos >= 1_000_000_000:
        whole, nanos = whole + 1, nanos - 1_000_000_000
    base = datetime.fromtimestamp(whole, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%S")
    frac = f"{nanos:09d}".rstrip("0")
    return base + (f".{frac}" if frac else "") + "Z"


def _lines_of(data: bytes) -> Iterator[tuple[bytes, bool]]:
    """(line without its newline, ended by a newline) of a stream's bytes."""
    *whole, rest = data.split(b"\n")
    for line in whole:
        yield line, True
    if rest:
        yield rest, False


def cri_pieces(stream: str, data: bytes, ts: float, max_len: int = CRI_MAX) -> list[str]:
    """The CRI log lines (without newlines) for ``data`` written to ``stream`` at time ``ts``."""
    out = []
    for line, ended in _lines_of(data):
        if ended and line.endswith(b"\r"):
            line = line[:-1]
        chunks = [line[i:i + max_len] for i in range(0, len(line), max_len)] or [b""]
        for i, chunk in enumerate(chunks):
            tag = "F" if ended and i == len(chunks) - 1 else "P"
            out.append(f"{rfc3339nano(ts)} {stream} {tag} {chunk.decode('utf-8', 'replace')}")
    return out


def docker_pieces(stream: str, data: bytes, ts: float, buf: int = DOCKER_BUF) -> list[str]:
    """The json-file lines (without newlines) for ``data`` written to ``stream`` at time ``ts``."""
    out = []
    stamp = rfc3339nano(ts)
    for line, ended in _lines_of(data):
        chunks = [line[i:i + buf] for i in range(0, len(line), buf)]
        if ended and (not chunks or len(chunks[-1]) == buf):  # a full buffer without the newline
            chunks.append(b"")
        for i, chunk in enumerate(chunks):
            last = i == len(chunks) - 1
            log = chunk.decode("utf-8", "replace") + ("\n" if last else "")
            out.append(json.dumps({"log": log, "stream": stream, "time": stamp}, separators=(",", ":")))
    return out


def interleave(a: list[str], b: list[str]) -> list[str]:
    """Pieces of two streams written at once (two writers to one file), one from each in turn."""
    out = []
    for i in range(max(len(a), len(b))):
        out += a[i:i + 1] + b[i:i + 1]
    return out
