"""Benchmark: ``fit`` time and peak memory at scale, and what the streaming fit changes.

    .venv/bin/python bench/fit_scale.py [--sessions N ...] [--corpus realistic varied] [--streaming auto true false]

Each case runs ``tracewatch.model.baseline.fit_baseline`` (the fit behind ``tracewatch fit``: dedup
into distinct (source, sequence) rows, vectorise, k search, calibration) in a child process of
its own, so its peak RSS is its own. Reading and mining the log lines is *not* in it (that is
the per-line path, timed by the ``score`` benchmark); the child builds the sessions directly:

- ``realistic``: sessions of the parcel-locker scenario (``tracewatch.demo.scenario``'s
  workflows, the traffic mix of ``parcel_lockers()``), each step mapped to the template a
  ``TemplateTree`` gives its message — a day of repetitive traffic, few distinct rows;
- ``varied``: sessions of 10 made-up flows over 20 event types each, steps swapped and
  inserted at random, so almost every session is a distinct row (the worst case for the fit).

``make bench`` runs 100k sessions of each; ``TRACEWATCH_BENCH_FIT_SESSIONS=100000,1000000``
(or ``--sessions`` here) adds larger ones. Nothing here asserts a timing.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

DEFAULT_SESSIONS = (100_000,)
CORPORA = ("realistic", "varied")
SOURCE = "locker-api"


def realistic(n: int, seed: int = 3):
    """``n`` normal parcel-locker sessions as template-id sequences, and the miner."""
    from tracewatch.demo.scenario import parcel_lockers
    from tracewatch.templates import TemplateTree

    scenario = parcel_lockers()
    names = list(scenario.workflows)
    shares = [scenario.workflows[w][0] for w in names]
    miner = TemplateTree()
    ids: dict[str, int] = {}  # step name -> template of its message (variable fields masked)
    rng = random.Random(seed)
    out = []
    for name in rng.choices(names, weights=shares, k=n):
        seq = []
        for step in scenario.workflows[name][1](rng):
            tid = ids.get(step.name)
            if tid is None:
                tid = ids[step.name] = miner.add(step.message)
            seq.append(tid)
        out.append((SOURCE, tuple(seq)))
    return out, miner


def varied(n: int, seed: int = 3, flows: int = 10, pool: int = 20):
    """``n`` sessions of which nearly all differ: each of ``flows`` flows is 6–12 steps drawn
    from its own ``pool`` event types; every step is swapped for another of the pool with
    probability 0.3 and up to 3 extra steps are inserted."""
    import numpy as np

    from tracewatch.templates import TemplateTree

    miner = TemplateTree()
    events = [miner.add_event(f"flow{f}.step{e}") for f in range(flows) for e in range(pool)]
    rng = np.random.default_rng(seed)
    bases = [rng.integers(0, pool, size=int(rng.integers(6, 13))) for _ in range(flows)]
    out = []
    which = rng.integers(0, flows, size=n)
    for f in which.tolist():
        seq = bases[f].copy()
        swap = rng.random(len(seq)) < 0.3
        seq[swap] = rng.integers(0, pool, size=int(swap.sum()))
        steps = seq.tolist()
        for _ in range(int(rng.integers(0, 4))):
            steps.insert(int(rng.integers(1, len(steps))), int(rng.integers(0, pool)))
        out.append((SOURCE, tuple(events[f * pool + e] for e in steps)))
    return out, miner


def _rss_mb(field: str) -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1]) / 1024
    return float("nan")


def child(n: int, corpus: str, streaming: str) -> dict:
    """Build the corpus, fit once; what happened, as a dict (printed as JSON)."""
    from tracewatch.model.baseline import fit_baseline
    from tracewatch.config import Config

    t0 = time.perf_counter()
    sessions, miner = (realistic if corpus == "realistic" else varied)(n)
    gen_s = time.perf_counter() - t0
    rss_before = _rss_mb("VmRSS")
    mode = {"true": True, "false": False}.get(streaming, streaming)
    cfg = Config.model_validate({"sources": [{"name": SOURCE}], "model": {"streaming": mode}})
    t0 = time.perf_counter()
    baseline = fit_baseline(sessions, miner, cfg)
    fit_s = time.perf_counter() - t0
    r = baseline.report
    return {"sessions": n, "corpus": corpus, "streaming_asked": streaming, "streaming": r["streaming"],
            "generate_s": gen_s, "fit_s": fit_s, "rss_before_fit_mb": rss_before,
            "peak_rss_mb": _rss_mb("VmHWM"), "distinct": r["distinct_sequences"], "ngrams": r["ngrams"],
            "k": r["k"], "train_sessions": r["train_sessions"]}


def run_cases(ctx, sizes, corpora=CORPORA, modes=("auto",)) -> list[dict]:
    """One child per (size, corpus, streaming mode); a row each."""
    results = []
    for n in sizes:
        for corpus in corpora:
            for mode in modes:
                out = ctx.out / "fit_scale" / f"{corpus}-{n}-{mode}.json"
                proc = ctx.process([sys.executable, str(Path(__file__).resolve()), "--child", str(n), corpus, mode],
                                   stdout=out)
                res = json.loads(proc.stdout_text())
                res["process_peak_rss_mb"] = proc.rss_mb
                results.append(res)
                how = "MiniBatchKMeans" if res["streaming"] else "KMeans"
                ctx.row("fit at scale", f"{corpus} {n // 1000}k, {how}", n, res["fit_s"], proc.rss_mb,
                        f"sessions/s; {res['distinct']:,} distinct rows, {res['ngrams']:,} n-grams, k={res['k']}; "
                        f"RSS {res['rss_before_fit_mb']:.0f} MB before the fit (corpus), "
                        f"corpus built in {res['generate_s']:.1f} s (not in the time)")
    return results


def run(ctx) -> None:
    """``bench/run.py`` entry point: 100k sessions of each corpus (more with the env variable)."""
    sizes = [int(x) for x in os.environ.get("TRACEWATCH_BENCH_FIT_SESSIONS", "").split(",") if x.strip()]
    run_cases(ctx, sizes or DEFAULT_SESSIONS)


def main(argv: list[str] | None = None) -> int:
    if argv is None and len(sys.argv) > 1 and sys.argv[1] == "--child":
        n, corpus, mode = sys.argv[2:5]
        print(json.dumps(child(int(n), corpus, mode)))
        return 0
    from run import Context, table

    ap = argparse.ArgumentParser(description="fit time and peak memory at scale")
    ap.add_argument("--sessions", type=int, nargs="+", default=list(DEFAULT_SESSIONS))
    ap.add_argument("--corpus", nargs="+", choices=CORPORA, default=list(CORPORA))
    ap.add_argument("--streaming", nargs="+", choices=("auto", "true", "false"), default=["auto"])
    a = ap.parse_args(argv)
    ctx = Context(0, 0)
    results = run_cases(ctx, a.sessions, a.corpus, a.streaming)
    print(table(ctx))
    ctx.out.mkdir(parents=True, exist_ok=True)
    (ctx.out / "fit_scale.json").write_text(json.dumps(results, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
