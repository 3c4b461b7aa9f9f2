"""A small PNG reader for the browser test's screenshots (8-bit RGB or RGBA, not interlaced:
what headless Chromium writes), after the PNG specification (W3C, PNG Third Edition, 2025):
chunks, zlib-compressed IDAT data, and the five per-row filters of §7.3 / §9."""

from __future__ import annotations

import struct
import zlib

import numpy as np

SIGNATURE = b"\x89PNG\r\n\x1a\n"


def _paeth(a: int, b: int, c: int) -> int:
    p = a + b - c
    pa, pb, pc = abs(p - a), abs(p - b), abs(p - c)
    return a if pa <= pb and pa <= pc else (b if pb <= pc else c)


def read_png(data: bytes) -> np.ndarray:
    """The image as an array of shape (height, width, channels), dtype uint8."""
    if data[:8] != SIGNATURE:
        raise ValueError("not a PNG file")
    pos, idat, header = 8, [], None
    while pos < len(data):
        (n,) = struct.unpack(">I", data[pos:pos + 4])
        kind, body = data[pos + 4:pos + 8], data[pos + 8:pos + 8 + n]
        pos += 12 + n
        if kind == b"IHDR":
            header = struct.unpack(">IIBBBBB", body)
        elif kind == b"IDAT":
            idat.append(body)
        elif kind == b"IEND":
            break
    width, height, depth, colour, _, _, interlace = header
    if depth != 8 or colour not in (2, 6) or interlace:
        raise ValueError(f"only 8-bit RGB/RGBA without interlace is read here, not {header}")
    ch = 3 if colour == 2 else 4
    stride = width * ch
    raw = zlib.decompress(b"".join(idat))
    out = np.zeros((height, stride), dtype=np.uint8)
    prev = np.zeros(stride, dtype=np.uint8)
    for y in range(height):
        at = y * (stride + 1)
        kind, line = raw[at], np.frombuffer(raw, dtype=np.uint8, count=stride, offset=at + 1)
        if kind == 0:  # None
            cur = line
        elif kind == 1:  # Sub: each byte plus the one a pixel to its left — a running sum per channel
            cur = np.cumsum(line.reshape(width, ch).astype(np.uint32), axis=0).astype(np.uint8).reshape(stride)
        elif kind == 2:  # Up
            cur = line + prev
        else:  # Average (3) and Paeth (4) depend on the byte just decoded: byte by byte
            cur_b, up, filt = bytearray(stride), prev.tobytes(), line.tobytes()
            for x in range(stride):
                left = cur_b[x - ch] if x >= ch else 0
                if kind == 3:
                    cur_b[x] = (filt[x] + ((left + up[x]) >> 1)) & 255
                else:
                    cur_b[x] = (filt[x] + _paeth(left, up[x], up[x - ch] if x >= ch else 0)) & 255
            cur = np.frombuffer(bytes(cur_b), dtype=np.uint8)
        out[y] = cur
        prev = out[y]
    return out.reshape(height, width, ch)
