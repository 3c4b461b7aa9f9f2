"""Would a columnar engine read blocks faster? tracewatch's block readers against polars and
pyarrow doing the same work, measured here before choosing (neither is a dependency).

    .venv/bin/pip install polars pyarrow    # only for this measurement
    .venv/bin/python bench/columnar.py [--lines N] [--repeat R]

The work, per block of 1,024 lines of the generated day (``gen.py``), ending in the Python
lists the rest of the pipeline takes (templates and sessions are Python):

- text: the demo's ``line_pattern`` applied to every line, the groups ``ts``, ``level``,
  ``key`` and ``message`` as lists, ``ts`` as epoch seconds;
- jsonl: the same records as JSON lines, the fields ``time`` (epoch seconds), ``level``,
  ``req`` and ``message`` as lists.

Each engine's regex dialect is its own (polars and pyarrow use RE2-like engines without
look-around or backreferences), so a user's ``line_pattern`` would not always mean the same
there: a columnar path would need the present one beside it. Nothing here asserts a timing.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from gen import as_jsonl, log_file  # noqa: E402

from tracewatch.config import SourceConfig  # noqa: E402
from tracewatch.demo.scenario import parcel_lockers  # noqa: E402
from tracewatch.formats import make_format  # noqa: E402

BLOCK = 1024


def ours(fmt):
    def read(lines: list[str]) -> tuple:
        cols = fmt.read_block(lines, list(range(len(lines))))
        return cols.times, cols.levels, cols.keys, cols.messages
    return read


def polars_text(pattern: str):
    import polars as pl

    def read(lines: list[str]) -> tuple:
        groups = pl.Series(lines).str.extract_groups(pattern)
        ts = groups.struct.field("ts").str.to_datetime("%Y-%m-%dT%H:%M:%S%.fZ", time_unit="us")
        return ((ts.dt.epoch("us") / 1e6).to_list(), groups.struct.field("level").to_list(),
                groups.struct.field("key").to_list(), groups.struct.field("message").to_list())
    return read


def pyarrow_text(pattern: str):
    import pyarrow as pa
    import pyarrow.compute as pc

    def read(lines: list[str]) -> tuple:
        groups = pc.extract_regex(pa.array(lines), pattern)
        ts = pc.cast(pc.cast(groups.field("ts"), pa.timestamp("us", tz="UTC")), pa.int64())  # ISO 8601 text
        return (pc.divide(ts, 1e6).to_pylist(), groups.field("level").to_pylist(),
                groups.field("key").to_pylist(), groups.field("message").to_pylist())
    return read


def polars_jsonl():
    import polars as pl

    def read(lines: list[str]) -> tuple:
        df = pl.read_ndjson("\n".join(lines).encode())
        ts = df["time"].str.to_datetime("%Y-%m-%dT%H:%M:%S%.fZ", time_unit="us")
        return (ts.dt.epoch("us") / 1e6).to_list(), df["level"].to_list(), df["req"].to_list(), df["message"].to_list()
    return read


def pyarrow_jsonl():
    import io

    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.json as pj

    def read(lines: list[str]) -> tuple:
        table = pj.read_json(io.BytesIO("\n".join(lines).encode()))
        ts = pc.cast(pc.cast(table["time"], pa.timestamp("us", tz="UTC")), pa.int64())
        return (pc.divide(ts, 1e6).to_pylist(), table["level"].to_pylist(), table["req"].to_pylist(),
                table["message"].to_pylist())
    return read


def measure(read, blocks: list[list[str]], repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        for b in blocks:
            read(b)
        best = min(best, time.perf_counter() - t0)
    return best


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--lines", type=int, default=200_000)
    ap.add_argument("--repeat", type=int, default=5)
    a = ap.parse_args(argv)
    text = log_file("scored", 1_000_000)
    pattern = parcel_lockers().line_pattern
    with open(text.path, encoding="utf-8") as fh:
        text_lines = [next(fh).rstrip("\n") for _ in range(a.lines)]
    with open(as_jsonl(text), encoding="utf-8") as fh:
        json_lines = [next(fh).rstrip("\n") for _ in range(a.lines)]
    cases = {
        "text": (text_lines, {"tracewatch (re, map)": ours(make_format(SourceConfig(name="t", line_pattern=pattern))),
                              "polars": polars_text(pattern), "pyarrow": pyarrow_text(pattern)}),
        "jsonl": (json_lines, {"tracewatch (orjson, map)": ours(make_format(SourceConfig(
                                   name="j", format="jsonl", session_key="req"))),
                               "polars": polars_jsonl(), "pyarrow": pyarrow_jsonl()}),
    }
    print(f"{'input':<6} {'reader':<26} {'µs/line':>8}  (blocks of {BLOCK}, fastest of {a.repeat}, "
          f"{a.lines} lines, readers taking turns)")
    for name, (lines, readers) in cases.items():
        blocks = [lines[i:i + BLOCK] for i in range(0, len(lines), BLOCK)]
        best = {label: float("inf") for label in readers}
        for _ in range(a.repeat):
            for label, read in readers.items():
                best[label] = min(best[label], measure(read, blocks, 1))
        for label, seconds in best.items():
            print(f"{name:<6} {label:<26} {seconds / len(lines) * 1e6:>8.3f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
