"""Alerts: a scored session becomes a JSON-ready verdict that explains itself.

Stage: scoring → **alerts** → incidents. The object's fields are a contract (DESIGN.md):
``alert``, ``alert_id`` (stable for the same session), ``source``, ``session_key``, ``score``
(higher = more anomalous), ``p_value``, ``reasons``, ``cluster``, ``events``,
``unseen_events``, ``unexpected``, ``missing``, ``baseline_version`` — plus the step
difference, the representative session and a few raw sample lines after redaction.
"""

from __future__ import annotations

import hashlib
import math
import re
from collections import Counter

from ..model.explain import explain
from ..sessions import Session

REASON_FAR = "far_from_baseline"
REASON_UNSEEN = "unseen_event"
REDACTED = "«redacted»"
MAX_SEQUENCE = 500  # template ids of the session, for grouping alerts into incidents


class Redactor:
    """Replaces matches of the configured patterns in any raw text tracewatch stores or shows."""

    def __init__(self, patterns: list[str]) -> None:
        self._re = re.compile("|".join(f"(?:{p})" for p in patterns)) if patterns else None

    def __call__(self, text: str) -> str:
        return self._re.sub(REDACTED, text) if self._re is not None else text


def _finite(x: float) -> float | None:
    return x if math.isfinite(x) else None


def alert_id(session: Session) -> str:
    """Stable for the same session: its source, key and first raw line (which, in practice,
    carries a timestamp), independent of file names and offsets."""
    h = hashlib.blake2b(digest_size=8)
    h.update(f"{session.source}\x1f{session.key}\x1f{session.first_raw}".encode("utf-8", "replace"))
    return h.hexdigest()


def build_verdict(session: Session, seq: tuple[int, ...], score: float, cluster: int, distance: float,
                  unseen_share: float, p_value: float, far: bool, novel: bool, baseline, redact: Redactor, *,
                  explain_it: bool) -> dict:
    """``far``: p ≤ false_alarm_rate; ``novel``: its never-seen events raise an alert by
    themselves (:meth:`~tracewatch.model.baseline.Baseline.judge`)."""
    miner = baseline.miner
    unseen = Counter(e for e in seq if not miner.is_seen(e))
    reasons = []
    if far:
        reasons.append(REASON_FAR)
    if novel:
        reasons.append(REASON_UNSEEN)
    verdict = {
        "alert": bool(reasons),
        "alert_id": alert_id(session),
        "source": session.source,
        "session_key": session.key,
        "score": round(score, 6) if math.isfinite(score) else score,
        "p_value": round(p_value, 6),
        "threshold": _finite(baseline.conformal(session.source).threshold_),
        "reasons": reasons,
        "cluster": cluster,
        "distance": round(distance, 6),
        "unseen_ngram_share": round(unseen_share, 4),
        "events": len(seq),
        "sequence": [miner.templates[e].id for e in seq[:MAX_SEQUENCE]],
        "unseen_events": [{"template_id": miner.templates[e].id, "template": miner.text(e), "count": n}
                          for e, n in unseen.items()],
        "unexpected": [],
        "missing": [],
        "baseline_version": baseline.version,
        "start": session.first_ts,
        "end": session.last_ts,
        "closed_by": session.close_reason,
        "first_offset": session.first_offset,
    }
    if explain_it:
        vec = baseline.vectorizer.vector(seq)
        closest, near = baseline.closest_normal(vec, session.source)  # explained against its workflow
        verdict.update(explain(seq, vec, near, baseline.centers[near], baseline.cluster_df[near],
                               baseline.medoids[near], closest,
                               baseline.vectorizer, miner.text, miner.is_seen,
                               times_seen=baseline.times_seen(session.source, seq),
                               period_sessions=baseline.period_sessions))
        verdict["samples"] = [redact(s) for s in session.samples]
    return verdict
