"""Batch source: lines, byte offsets and the decoding policy, against a plain reference reader."""

from __future__ import annotations

import pytest

from tracewatch.sources import files
from tracewatch.sources.files import INVALID_UTF8, LINE_TOO_LONG, read_lines


def reference(data: bytes, max_line_bytes: int):
    """What read_lines must give: split at b"\n", offsets of each line's first byte."""
    out, offset = [], 0
    parts = data.split(b"\n")
    if parts and parts[-1] == b"":
        parts.pop()
    for raw in parts:
        line = raw[:-1] if raw.endswith(b"\r") else raw
        problem = None
        if len(line) > max_line_bytes:
            line, problem = line[:max_line_bytes], LINE_TOO_LONG
        try:
            text = line.decode("utf-8")
        except UnicodeDecodeError:
            text, problem = line.decode("utf-8", "replace"), problem or INVALID_UTF8
        out.append((text, offset, problem))
        offset += len(raw) + 1
    return out


@pytest.mark.parametrize("chunk", [7, 64, 1 << 20], ids=["tiny-chunks", "small-chunks", "default"])
def test_lines_offsets_and_repairs_match_the_reference(tmp_path, monkeypatch, chunk):
    monkeypatch.setattr(files, "CHUNK", chunk)
    data = (b"first line\nsecond\r\n\n" + "caf\u00e9 ünïcode\n".encode() + b"bad \xff\xfe byte\n"
            + b"x" * 100 + b"\nlast without newline")
    path = tmp_path / "in.log"
    path.write_bytes(data)
    got = list(read_lines(path, 80))
    assert got == reference(data, 80)
    assert sum(1 for _, _, p in got if p == INVALID_UTF8) == 1
    assert sum(1 for _, _, p in got if p == LINE_TOO_LONG) == 1


def test_a_file_without_any_newline_stays_bounded(tmp_path, monkeypatch):
    monkeypatch.setattr(files, "CHUNK", 1024)
    path = tmp_path / "one.log"
    path.write_bytes(b"y" * 50_000 + b"\nafter\n")
    got = list(read_lines(path, 100))
    assert got[0] == ("y" * 100, 0, LINE_TOO_LONG)
    assert got[1] == ("after", 50_001, None) and len(got) == 2
