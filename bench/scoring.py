"""Benchmark: scoring cost per session (µs), with and without the exact-sequence cache.

    .venv/bin/python bench/scoring.py [--sessions N] [--repeat R]

A baseline is fitted (``fit_baseline``, the demo's model settings) on a day of parcel-locker
sessions; a second day — normal traffic plus 0.2% of each injected anomaly kind, as in the
``score`` benchmark — is then scored by ``SessionScorer`` (``Baseline.make_scorer()``, what the
pipeline uses), in four ways:

- with the cache: ``score(source, seqs)`` on a fresh scorer, so the cache fills as the day goes
  (sessions whose exact sequence was scored before cost a dict lookup);
- without it: ``score_vectors(source, [vectorizer.vector(seq)])`` on every session — the work the
  cache saves: vectorising (n-grams, tf-idf, norm) and the distances to the centres;

each in batches of the pipeline's ``SCORE_BATCH`` closed sessions (the batch path) and one session
per call (a quiet daemon closing sessions one at a time). Sessions map to templates by step name
(each step's first message mined by a ``TemplateTree``), so no log parsing is in the time.
The fastest of ``--repeat`` runs counts. Nothing here asserts a timing.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from tracewatch.model.baseline import fit_baseline  # noqa: E402
from tracewatch.config import Config  # noqa: E402
from tracewatch.demo.scenario import generate, parcel_lockers  # noqa: E402
from tracewatch.pipeline import SCORE_BATCH  # noqa: E402
from tracewatch.templates import TemplateTree  # noqa: E402

SOURCE = "locker-api"
TARGET_CACHED_US = 50.0  # issue 6
TARGET_UNCACHED_US = 500.0  # issue 6
ANOMALY_SHARE = 0.002  # per anomaly kind, as bench/gen.py


def corpus(n_scored: int, n_baseline: int = 20_000):
    """A fitted baseline and the scored day's event sequences."""
    scenario = parcel_lockers()
    miner = TemplateTree()
    ids: dict[str, int] = {}

    def seqs(sessions):
        out = []
        for s in sessions:
            for step in s.steps:
                if step.name not in ids:
                    ids[step.name] = miner.add(step.message)
            out.append(tuple(ids[step.name] for step in s.steps))
        return out

    base = seqs(generate(scenario, n_baseline, 0, seed=29))
    cfg = Config.model_validate({"sources": [{"name": SOURCE}]})
    baseline = fit_baseline([(SOURCE, s) for s in base], miner, cfg)  # freezes the miner
    per_kind = max(1, round(n_scored * ANOMALY_SHARE))
    scored = seqs(generate(scenario, n_scored - 6 * per_kind, per_kind, seed=30))
    return baseline, scored


def _time(fn, repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def measure(baseline, seqs: list[tuple[int, ...]], repeat: int) -> list[tuple[str, float, str]]:
    """``(case, µs per session, note)`` for the four ways."""
    out = []
    hits = 0
    for batch in (SCORE_BATCH, 1):
        chunks = [seqs[i:i + batch] for i in range(0, len(seqs), batch)]
        how = f"batches of {batch}" if batch > 1 else "one per call"

        def cached():
            nonlocal hits
            scorer = baseline.make_scorer()
            for chunk in chunks:
                scorer.score(SOURCE, chunk)
            hits = scorer.cache_hits

        def uncached():
            scorer = baseline.make_scorer()
            vector = scorer.vectorizer.vector
            for chunk in chunks:
                scorer.score_vectors(SOURCE, [vector(s) for s in chunk])

        s = _time(cached, repeat)
        out.append((f"with cache, {how}", 1e6 * s / len(seqs), f"cache hits {hits / len(seqs):.1%}"))
        s = _time(uncached, repeat)
        out.append((f"without cache, {how}", 1e6 * s / len(seqs), "every session vectorised and scored"))
    return out


def run(ctx) -> None:
    """``bench/run.py`` entry point: one row per way, checks against the issue's targets."""
    baseline, seqs = corpus(min(ctx.lines // 10, 100_000))
    info = (f"{len(baseline.centers)} clusters, {len(baseline.vectorizer.vocabulary_)} n-grams; "
            f"{len(set(seqs)):,} distinct of {len(seqs):,} sessions")
    for case, us, note in measure(baseline, seqs, ctx.repeat):
        ctx.row("scoring per session", case, len(seqs), us * len(seqs) / 1e6, None,
                f"{us:.1f} µs/session; {note}; {info}")
        if case.startswith("with cache, batches"):
            ctx.check(f"scoring: {TARGET_CACHED_US:.0f} µs / cached µs", TARGET_CACHED_US / us, 1.0)
        elif case.startswith("without cache, batches"):
            ctx.check(f"scoring: {TARGET_UNCACHED_US:.0f} µs / uncached µs", TARGET_UNCACHED_US / us, 1.0)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="scoring cost per session, with and without the cache")
    ap.add_argument("--sessions", type=int, default=100_000, help="sessions scored (default 100k)")
    ap.add_argument("--repeat", type=int, default=3)
    a = ap.parse_args(argv)
    baseline, seqs = corpus(a.sessions)
    print(f"{len(seqs):,} sessions ({len(set(seqs)):,} distinct), {len(baseline.centers)} clusters, "
          f"{len(baseline.vectorizer.vocabulary_)} n-grams")
    for case, us, note in measure(baseline, seqs, a.repeat):
        print(f"{case:<36} {us:>8.1f} µs/session  {note}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
