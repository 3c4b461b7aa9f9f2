"""Alert vectors: what incident grouping and triage compare an alert by.

Stage: alerts → **vectors** → incidents (grouping) and triage (the cosine and RBF kernels).
Each alert becomes a vector of weighted terms, L2-normalised (cosine geometry):

- its explanation — events never seen at fit (weight 2), the n-grams over-represented or never
  seen (their explanation weight), the expected n-grams missing (0.3 × their share in the
  cluster) — which is what tells one fault from another across workflows;
- the n-grams (n = 1..3) of its template-id sequence, sublinear tf, scaled to norm 0.5 — the
  context. Counted here rather than with the baseline's vectoriser so that incidents outlive
  a baseline switch.

Terms are hashed to 12 hex digits, so a vector is a small JSON object in the incident store.
"""

from __future__ import annotations

import hashlib
import math
from collections import Counter
from collections.abc import Iterable
from itertools import repeat
from operator import mul

from ..features import END, START, ngrams

Vector = dict[str, float]

UNSEEN_WEIGHT = 2.0
MISSING_WEIGHT = 0.3
SEQUENCE_NORM = 0.5
NGRAM_MAX = 3
TERM_PATTERN = r"^[0-9a-f]{12}$"  # what _term makes (the store checks vectors read back with it)


def _term(text: str) -> str:
    return hashlib.blake2b(text.encode("utf-8", "replace"), digest_size=6).hexdigest()


_MARKERS = {START: "^", END: "$"}


def sequence_ngrams(seq: Iterable[str], n_max: int = NGRAM_MAX) -> Counter:
    """Counts of the 1..n_max-grams of a template-id sequence framed by start/end markers
    (:func:`tracewatch.features.ngrams`), each n-gram as its ids joined by spaces."""
    return Counter({" ".join([_MARKERS.get(t, t) for t in g]): n for g, n in ngrams(tuple(seq), n_max).items()})


def alert_vector(alert: dict) -> Vector:
    """The alert as an L2-normalised term → weight map (terms hashed to 12 hex digits)."""
    v: Counter = Counter()
    for u in alert.get("unseen_events") or []:
        v[_term("u:" + str(u.get("template_id", u.get("template"))))] += UNSEEN_WEIGHT
    for x in alert.get("unexpected") or []:
        v[_term("x:" + x["ngram"])] += float(x.get("weight", 0.1))
    for m in alert.get("missing") or []:
        v[_term("m:" + m["ngram"])] += MISSING_WEIGHT * float(m.get("cluster_share", 1.0))
    grams = sequence_ngrams(alert.get("sequence") or [])
    tf = {g: 1.0 + math.log(n) for g, n in grams.items()}
    norm = math.sqrt(sum(w * w for w in tf.values())) or 1.0
    for g, w in tf.items():
        v[_term("s:" + g)] += SEQUENCE_NORM * w / norm
    total = math.sqrt(sum(w * w for w in v.values())) or 1.0
    return {k: w / total for k, w in v.items()}


def dot(a: Vector, b: Vector) -> float:
    if len(a) > len(b):
        a, b = b, a
    return sum(map(mul, a.values(), map(b.get, a, repeat(0.0))))  # the loop runs in C


def trim(v: Vector, keep: int) -> Vector:
    """The ``keep`` largest terms of ``v`` once it holds more than twice that many."""
    return dict(sorted(v.items(), key=lambda kv: -abs(kv[1]))[:keep]) if len(v) > 2 * keep else v
