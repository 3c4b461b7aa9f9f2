"""Benchmark ``templates``: grouping accuracy and mining speed per real-world log shape.

Mines each shape of ``tests/log_shapes.py`` with a fresh :class:`TemplateTree` (blocks of 1024
messages through ``add_many``, as the pipeline calls it) and prints the grouping accuracy and
lines/s per shape (runs on its own too: ``python bench/templates.py [--lines N]``).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from tests.log_shapes import SHAPES, corpus, grouping_accuracy
from tracewatch.templates import TemplateTree

BLOCK = 1024


def measure(shape: str, n: int, repeat: int = 3) -> tuple[float, float, int]:
    """(grouping accuracy, lines/s of the fastest run, templates mined) for one shape."""
    truth, messages = corpus(shape, n)
    best, groups, miner = float("inf"), [], None
    for _ in range(repeat):
        miner = TemplateTree()
        t0 = time.perf_counter()
        groups = [i for lo in range(0, n, BLOCK) for i in miner.add_many(messages[lo:lo + BLOCK])]
        best = min(best, time.perf_counter() - t0)
    return grouping_accuracy(truth, groups), n / best, len(miner.templates)


def report(n: int, repeat: int = 3) -> list[tuple[str, float, float, int]]:
    rows = [(shape, *measure(shape, n, repeat)) for shape in SHAPES]
    print(f"{'shape':<12} {'accuracy':>8} {'lines/s':>9} {'templates':>9}")
    for shape, acc, rate, k in rows:
        print(f"{shape:<12} {acc:>8.3f} {rate:>9.0f} {k:>9}")
    print(f"{'mean':<12} {sum(r[1] for r in rows) / len(rows):>8.3f}")
    return rows


def run(ctx) -> None:
    n = min(ctx.lines, 50_000)
    for shape, acc, rate, k in report(n, ctx.repeat):
        ctx.row("templates", shape, n, n / rate, None, f"grouping accuracy {acc:.3f}, {k} templates")
        ctx.check(f"templates {shape} accuracy", acc / 0.95, 1.0)


if __name__ == "__main__":
    ap = argparse.ArgumentParser(description="grouping accuracy and mining speed per log shape")
    ap.add_argument("--lines", type=int, default=20_000, help="messages per shape (default 20000)")
    ap.add_argument("--repeat", type=int, default=3)
    a = ap.parse_args()
    report(a.lines, a.repeat)
