"""Explanations: why a session was flagged, in template text a person can act on.

Stage: scoring → **explain** → alerts. Compares the session with its nearest normal cluster:
n-grams over-represented or never seen at fit, expected n-grams missing (present in most of
the cluster's sessions), events never seen, and a step-by-step difference from the cluster's
representative (medoid) session, with runs of one event compressed ("repeated ×37").
"""

from __future__ import annotations

import difflib
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from ..features import NgramWeights, SessionVector

MAX_ITEMS = 5
MAX_DIFF = 20
EXPECTED_SHARE = 0.9  # an n-gram in ≥ 90% of a cluster's sessions is "expected"


def runs(seq: Sequence[int]) -> list[tuple[int, int]]:
    """Run-length encoding: [(event, times in a row), ...]."""
    out: list[tuple[int, int]] = []
    for e in seq:
        if out and out[-1][0] == e:
            out[-1] = (e, out[-1][1] + 1)
        else:
            out.append((e, 1))
    return out


def step_diff(session: Sequence[int], normal: Sequence[int], text: Callable[[int], str],
              is_seen: Callable[[int], bool]) -> list[str]:
    """Step-by-step difference of ``session`` from the representative ``normal`` session."""
    a, b = runs(normal), runs(session)
    sm = difflib.SequenceMatcher(a=[e for e, _ in a], b=[e for e, _ in b], autojunk=False)
    lines: list[str] = []

    def extra(e: int, n: int) -> None:
        times = f" ×{n}" if n > 1 else ""
        if not is_seen(e):
            lines.append(f"not seen before{times}: {text(e)}")
        elif n > 1:
            lines.append(f"repeated ×{n}: {text(e)}")
        else:
            lines.append(f"extra: {text(e)}")

    for op, i1, i2, j1, j2 in sm.get_opcodes():
        if op == "equal":
            for (e, n_norm), (_, n_sess) in zip(a[i1:i2], b[j1:j2]):
                if n_sess != n_norm:
                    lines.append(f"repeated ×{n_sess} (normally ×{n_norm}): {text(e)}")
            continue
        if op in ("delete", "replace"):
            for e, n in a[i1:i2]:
                lines.append(f"missing: {text(e)}")
        if op in ("insert", "replace"):
            for e, n in b[j1:j2]:
                extra(e, n)
    if len(lines) > MAX_DIFF:
        lines = lines[:MAX_DIFF] + [f"… {len(lines) - MAX_DIFF} more differences"]
    return lines


def explain(seq: Sequence[int], vec: SessionVector, cluster: int, center: np.ndarray,
            cluster_df: np.ndarray, medoid: Sequence[int], closest: Sequence[int],
            vectorizer: NgramWeights,
            text: Callable[[int], str], is_seen: Callable[[int], bool], *, times_seen: int = 0,
            period_sessions: int = 0) -> dict:
    """The explanation fields of an alert: the step difference is taken against ``closest``,
    the cluster's baseline session most like this one, which reads far better than a diff
    against the medoid when normal sessions vary in length. ``times_seen``: how many of the
    ``period_sessions`` sessions of the baseline period had exactly these steps — an alert on
    a known shape says that it is rare there, never an empty difference."""
    grams = vectorizer.grams_

    def label(gram) -> str:
        return vectorizer.gram_text(gram, text)

    # unexpected: n-grams outside the vocabulary first, then those most over-represented
    unexpected = [
        {"ngram": label(g), "weight": round(w, 4), "seen_at_fit": False}
        for g, w in sorted(vec.unseen.items(), key=lambda kv: (len(kv[0]), -kv[1]))[:MAX_ITEMS]
    ]
    if len(unexpected) < MAX_ITEMS and len(vec.indices):
        excess = vec.values - center[vec.indices]
        order = np.argsort(-excess)
        for j in order[: MAX_ITEMS - len(unexpected)]:
            if excess[j] <= 0:
                break
            col = int(vec.indices[j])
            unexpected.append({"ngram": label(grams[col]), "weight": round(float(excess[j]), 4),
                               "seen_at_fit": True, "cluster_share": round(float(cluster_df[col]), 3)})
    # missing: expected n-grams of the cluster that the session lacks; whole steps first
    present = set(vec.indices.tolist())
    expected = np.flatnonzero(cluster_df >= EXPECTED_SHARE)
    missing_cols = [int(c) for c in expected if int(c) not in present]
    missing_cols.sort(key=lambda c: (len(grams[c]), -cluster_df[c], c))
    missing = [{"ngram": label(grams[c]), "cluster_share": round(float(cluster_df[c]), 3)}
               for c in missing_cols[:MAX_ITEMS]]
    diff = step_diff(seq, closest, text, is_seen)
    if times_seen:
        diff.insert(0, f"rare in the baseline: these exact steps were seen in {times_seen} of its "
                       f"{period_sessions} sessions")
    return {
        "unexpected": unexpected,
        "missing": missing,
        "seen_in_baseline": times_seen,
        "diff": diff,
        "closest_normal": [text(e) for e in closest],
        "representative": [text(e) for e in medoid],
    }


__all__ = ["explain", "runs", "step_diff"]
