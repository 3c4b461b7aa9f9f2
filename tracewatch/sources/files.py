"""Batch source: read files once, line by line, with byte offsets.

Stage: **sources** → formats. The same decoding policy applies to every format: invalid
UTF-8 is decoded with replacement and counted (``invalid_utf8``); lines longer than
``max_line_bytes`` are truncated and counted (``line_too_long``). Nothing is dropped.
"""

from __future__ import annotations

import glob
from collections.abc import Iterator
from pathlib import Path

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


def read_lines(path: Path, max_line_bytes: int) -> Iterator[tuple[str, int, str | None]]:
    """Yield ``(text, offset, repair_reason)`` for every line of ``path``, the last one even
    without a trailing newline."""
    try:
        fh = open(path, "rb")
    except OSError as exc:
        raise InputError(f"{path}: cannot read: {exc.strerror or exc}") from None
    with fh:
        offset = 0
        try:
            for raw in fh:
                size = len(raw)
                line = raw[:-1] if raw.endswith(b"\n") else raw
                if line.endswith(b"\r"):
                    line = line[:-1]
                if len(line) <= max_line_bytes:
                    try:
                        yield line.decode("utf-8"), offset, None
                    except UnicodeDecodeError:
                        yield line.decode("utf-8", errors="replace"), offset, INVALID_UTF8
                else:
                    text, problem = decode_line(line, max_line_bytes)
                    yield text, offset, problem
                offset += size
        except OSError as exc:
            raise InputError(f"{path}: read failed at byte {offset}: {exc.strerror or exc}") from None
