"""Scoring: nonconformity of a session against the fitted baseline.

Stage: features → **scoring** → alerts. One sign convention everywhere: a higher score is
more anomalous. Two scorers:

- ``centroid``: distance to the nearest k-means centre divided by that cluster's spread;
- ``knn``: distance to the k-th nearest distinct baseline session — for very multi-modal
  normal behaviour, where a centre can sit between modes.

Sessions whose exact event sequence was scored before are answered from a cache keyed by
the sequence itself (identical sessions cost one dict lookup).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import scipy.sparse as sp

from ..features import NgramVectorizer, SessionVector, stack

KNN_BLOCK = 256


class SessionScorer:
    def __init__(self, vectorizer: NgramVectorizer, centers: np.ndarray, spreads: np.ndarray,
                 scorer: str = "centroid", knn_rows: sp.csr_matrix | None = None, knn_k: int = 1,
                 cache_size: int = 100_000) -> None:
        self.vectorizer = vectorizer
        self.centers = np.ascontiguousarray(centers)
        self.centers_t = np.ascontiguousarray(centers.T)
        self.center_sq = np.sum(centers * centers, axis=1)
        self.spreads = spreads
        self.kind = scorer
        self.knn_k = knn_k
        self.knn_rows_t = knn_rows.T.tocsr() if knn_rows is not None else None
        self.cache: dict[tuple[int, ...], tuple[float, int, float]] = {}
        self.cache_size = cache_size
        self.cache_hits = 0

    def score(self, seqs: Sequence[tuple[int, ...]]) -> list[tuple[float, int, float]]:
        """``(score, nearest cluster, distance to its centre)`` per sequence."""
        out: list = [None] * len(seqs)
        todo: dict[tuple[int, ...], list[int]] = {}
        cache = self.cache
        for i, seq in enumerate(seqs):
            hit = cache.get(seq)
            if hit is not None:
                out[i] = hit
                self.cache_hits += 1
            else:
                todo.setdefault(seq, []).append(i)
        if todo:
            keys = list(todo)
            vecs = [self.vectorizer._vector(s) for s in keys]
            results = self.score_vectors(vecs)
            if len(cache) + len(keys) > self.cache_size:
                cache.clear()
            for seq, res in zip(keys, results):
                cache[seq] = res
                for i in todo[seq]:
                    out[i] = res
        return out

    def score_vectors(self, vecs: Sequence[SessionVector]) -> list[tuple[float, int, float]]:
        X = stack(vecs, len(self.vectorizer.vocabulary_))
        unseen = np.array([v.unseen_mass for v in vecs])
        d = self._center_distances(X, unseen)
        nearest = np.argmin(d, axis=1)
        dist = d[np.arange(len(vecs)), nearest]
        if self.kind == "knn" and self.knn_rows_t is not None:
            scores = self._knn(X)
        else:
            scores = dist / self.spreads[nearest]
        return [(float(s), int(c), float(x)) for s, c, x in zip(scores, nearest, dist)]

    def _center_distances(self, X: sp.csr_matrix, unseen: np.ndarray) -> np.ndarray:
        # every session vector has norm 1 (unseen n-grams included), so
        # |x - c|² = 1 - 2 x·c + |c|²
        dots = X @ self.centers_t
        d2 = 1.0 - 2.0 * dots + self.center_sq[None, :]
        return np.sqrt(np.maximum(d2, 0.0))

    def _knn(self, X: sp.csr_matrix) -> np.ndarray:
        k = min(self.knn_k, self.knn_rows_t.shape[1])
        out = np.empty(X.shape[0])
        for lo in range(0, X.shape[0], KNN_BLOCK):
            dots = (X[lo:lo + KNN_BLOCK] @ self.knn_rows_t).toarray()
            # both sides have norm 1: |x - y|² = 2 - 2 x·y; the k-th nearest has the k-th largest dot
            kth = -np.partition(-dots, k - 1, axis=1)[:, k - 1]
            out[lo:lo + KNN_BLOCK] = np.sqrt(np.maximum(2.0 - 2.0 * kth, 0.0))
        return out
