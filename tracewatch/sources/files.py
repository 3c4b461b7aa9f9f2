"""Batch source: read files once, line by line, with byte offsets.

Stage: **sources** → formats. The same decoding policy applies to every format: invalid
UTF-8 is decoded with replacement and counted (``invalid_utf8``); lines longer than
``max_line_bytes`` are truncated and counted (``line_too_long``). Nothing is dropped.
"""

from __future__ import annotations

import glob
from collections.abc import Callable, Iterator
from itertools import repeat
from pathlib import Path

import numpy as np

from ..errors import InputError

INVALID_UTF8 = "invalid_utf8"
LINE_TOO_LONG = "line_too_long"


def decode_line(raw: bytes, max_line_bytes: int) -> tuple[str, str | None]:
    """Decode one line (without its newline); returns the text and a repair reason or None."""
    problem = None
    if len(raw) > max_line_bytes:
        raw = raw[:max_line_bytes]
        problem = LINE_TOO_LONG
    try:
        return raw.decode("utf-8"), problem
    except UnicodeDecodeError:
        return raw.decode("utf-8", errors="replace"), problem or INVALID_UTF8


def expand_inputs(patterns: list[str]) -> list[Path]:
    """Paths from arguments or config globs, in a stable order; a missing input is an error."""
    out: list[Path] = []
    for pattern in patterns:
        if any(ch in pattern for ch in "*?["):
            matches = sorted(glob.glob(pattern))
            if not matches:
                raise InputError(f"{pattern}: no file matches this pattern")
            out.extend(Path(m) for m in matches)
        else:
            out.append(Path(pattern))
    for path in out:
        if not path.exists():
            raise InputError(f"{path}: no such file")
        if path.is_dir():
            raise InputError(f"{path}: is a directory, not a file")
    return out


CHUNK = 1 << 20


Block = tuple[list[str], list[int], list[str | None] | None]  # lines, offsets, repairs (None: all clean)


def block_of(block: bytes, offset: int, max_line_bytes: int) -> Block:
    """The lines of a block that ends with a newline, as columns. An ASCII block (the usual
    case) is decoded once and split as text, where character and byte offsets agree; its
    offsets come from one cumulative sum."""
    if block.isascii():
        text = block.decode("ascii")
        lines = text.split("\n")
        lines.pop()  # after the final newline
        sizes = np.fromiter(map(len, lines), dtype=np.int64, count=len(lines)) + 1
        if "\r" not in text and (not lines or sizes.max() <= max_line_bytes + 1):
            return lines, (np.cumsum(sizes) - sizes + offset).tolist(), None
    out_lines: list[str] = []
    offsets: list[int] = []
    repairs: list[str | None] = []
    for raw in block.split(b"\n")[:-1]:
        text, problem = decode_line(raw[:-1] if raw.endswith(b"\r") else raw, max_line_bytes)
        out_lines.append(text)
        offsets.append(offset)
        repairs.append(problem)
        offset += len(raw) + 1
    return out_lines, offsets, repairs if any(repairs) else None


def read_lines(path: Path, max_line_bytes: int) -> Iterator[tuple[str, int, str | None]]:
    """Yield ``(text, offset, repair_reason)`` for every line of ``path``, the last one even
    without a trailing newline."""
    for lines, offsets, repairs in read_blocks(path, max_line_bytes):
        yield from zip(lines, offsets, repairs or repeat(None))


def read_blocks(path: Path, max_line_bytes: int, on_bytes: Callable[[int], object] | None = None
                ) -> Iterator[Block]:
    """Yield the lines of ``path`` in blocks of about ``CHUNK`` bytes, as columns, the last line
    even without a trailing newline; ``on_bytes`` is told how many bytes each read took. Memory
    stays bounded by the chunk size and ``max_line_bytes`` even for a file with no newline at all."""
    try:
        fh = open(path, "rb")
    except OSError as exc:
        raise InputError(f"{path}: cannot read: {exc.strerror or exc}") from exc
    with fh:
        offset = 0
        rest = b""
        skipping = False  # inside an over-long line whose start was already yielded
        try:
            while True:
                chunk = fh.read(CHUNK)
                if not chunk:
                    break
                if on_bytes is not None:
                    on_bytes(len(chunk))
                data = rest + chunk if rest else chunk
                cut = data.rfind(b"\n") + 1
                if skipping:
                    first = data.find(b"\n")
                    if first < 0:
                        offset += len(data)
                        rest = b""
                        continue
                    offset += first + 1
                    data, cut, skipping = data[first + 1:], cut - first - 1, False
                if cut == 0:
                    if len(data) > max_line_bytes:  # an over-long line: yield its start, skip the rest
                        text, _ = decode_line(data[:max_line_bytes], max_line_bytes)
                        yield [text], [offset], [LINE_TOO_LONG]
                        offset += len(data)
                        rest, skipping = b"", True
                    else:
                        rest = data
                    continue
                yield block_of(data[:cut], offset, max_line_bytes)
                offset += cut
                rest = data[cut:]
            if rest:
                text, problem = decode_line(rest[:-1] if rest.endswith(b"\r") else rest, max_line_bytes)
                yield [text], [offset], [problem]
        except OSError as exc:
            raise InputError(f"{path}: read failed at byte {offset}: {exc.strerror or exc}") from exc
