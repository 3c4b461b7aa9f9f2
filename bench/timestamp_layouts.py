"""Stamps per second of one source's StampReader for each common layout (100,000 texts, the
layout detected once from the first stamp). Run: .venv/bin/python bench/timestamp_layouts.py"""

from __future__ import annotations

import time

from tracewatch.timestamps import StampReader

N = 100_000
CASES = {
    "iso8601": "2026-12-02T07:40:{:02d}.082Z",
    "postgres": "2026-12-02 07:40:{:02d}.082 UTC",
    "syslog": "Dec  2 07:40:{:02d}",
    "asctime": "[Wed Dec 02 07:40:{:02d} 2026]",
    "yymmdd": "261202 0740{:02d}",
}

if __name__ == "__main__":
    for name, shape in CASES.items():
        texts = [shape.format(i % 60) for i in range(N)]
        reader = StampReader()
        start = time.perf_counter()
        reader.many(texts)
        took = time.perf_counter() - start
        print(f"{name:10} {N / took / 1e3:8.0f}k stamps/s  (layout {reader.layout.name})")
