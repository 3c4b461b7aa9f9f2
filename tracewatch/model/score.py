"""Scoring: nonconformity of a session against the fitted baseline.

Stage: features → **scoring** → alerts. One sign convention everywhere: a higher score is
more anomalous. Two scorers:

- ``centroid``: distance to the nearest k-means centre divided by that cluster's spread, plus
  ``unseen_weight`` × the share of the session's (squared) weight on n-grams never seen at
  fit — within a varied cluster, a new transition between known steps moves a session less
  than normal variety does, so it is counted on its own;
- ``knn``: distance to the k-th nearest distinct baseline session — for very multi-modal
  normal behaviour, where a centre can sit between modes.

Sessions whose exact event sequence was scored before are answered from a cache keyed by
the sequence itself (identical sessions cost one dict lookup).
"""

from __future__ import annotations

from collections.abc import Sequence

from typing import TYPE_CHECKING

import numpy as np

from ..features import NgramVectorizer, SessionVector, stack

if TYPE_CHECKING:
    import scipy.sparse as sp

KNN_BLOCK = 256


class SessionScorer:
    """Scores sessions of one source at a time against that source's clusters (and, for
    ``knn``, that source's baseline sessions): sessions of different sources share no
    events, so comparing them across sources only adds noise."""

    def __init__(self, vectorizer: NgramVectorizer, centers: np.ndarray, spreads: np.ndarray,
                 scorer: str = "centroid", knn_rows: sp.csr_matrix | None = None, knn_k: int = 1,
                 unseen_weight: float = 5.0, *, cluster_sources: Sequence[str] | None = None,
                 row_sources: Sequence[str] | None = None, cache_size: int = 100_000) -> None:
        self.unseen_weight = unseen_weight
        self.vectorizer = vectorizer
        self.centers_t = np.ascontiguousarray(centers.T)
        self.center_sq = np.sum(centers * centers, axis=1)
        self.spreads = spreads
        self.kind = scorer
        self.knn_k = knn_k
        # the transposed baseline rows are only needed by the knn scorer (a copy of every row)
        self.knn_rows_t = knn_rows.T.tocsr() if knn_rows is not None and scorer == "knn" else None
        self.cluster_sources = np.asarray(cluster_sources if cluster_sources is not None
                                          else [""] * len(centers), dtype=object)
        self.row_sources = np.asarray(row_sources if row_sources is not None
                                      else [""] * (0 if knn_rows is None else knn_rows.shape[0]), dtype=object)
        self._masks: dict[str, tuple[np.ndarray | None, np.ndarray | None]] = {}
        self.cache: dict[tuple[str, tuple[int, ...]], tuple[float, int, float, float]] = {}
        self.cache_size = cache_size
        self.cache_hits = 0

    def _mask(self, source: str) -> tuple[np.ndarray | None, np.ndarray | None]:
        """Clusters and baseline rows *not* of ``source`` (None: use all — a source the
        baseline never saw is compared with everything)."""
        masks = self._masks.get(source)
        if masks is None:
            other_c = self.cluster_sources != source
            other_r = self.row_sources != source
            masks = self._masks[source] = (other_c if not other_c.all() else None,
                                           other_r if not other_r.all() else None)
        return masks

    def score(self, source: str, seqs: Sequence[tuple[int, ...]]) -> list[tuple[float, int, float, float]]:
        """``(score, nearest cluster, distance to its centre, unseen share)`` per sequence of
        ``source``; sequences scored before are answered from the cache."""
        out: list = [None] * len(seqs)
        todo: dict[tuple[int, ...], list[int]] = {}
        cache = self.cache
        for i, seq in enumerate(seqs):
            hit = cache.get((source, seq))
            if hit is not None:
                out[i] = hit
                self.cache_hits += 1
            else:
                todo.setdefault(seq, []).append(i)
        if todo:
            keys = list(todo)
            results = self.score_vectors(source, [self.vectorizer._vector(s) for s in keys])
            if len(cache) + len(keys) > self.cache_size:
                cache.clear()
            for seq, res in zip(keys, results):
                cache[(source, seq)] = res
                for i in todo[seq]:
                    out[i] = res
        return out

    def score_vectors(self, source: str, vecs: Sequence[SessionVector]) -> list[tuple[float, int, float, float]]:
        unseen = np.array([v.unseen_mass for v in vecs])
        other_clusters, other_rows = self._mask(source)
        d = self._center_distances(vecs)
        # nearest in units of each cluster's own spread: a session between a tight cluster and a
        # varied one belongs to the varied one
        scaled = d / self.spreads[None, :]
        if other_clusters is not None:
            scaled[:, other_clusters] = np.inf
        nearest = np.argmin(scaled, axis=1)
        dist = d[np.arange(len(vecs)), nearest]
        if self.kind == "knn" and self.knn_rows_t is not None:
            scores = self._knn(stack(vecs, len(self.vectorizer.vocabulary_)), other_rows)
        else:
            scores = dist / self.spreads[nearest] + self.unseen_weight * unseen
        return [(float(s), int(c), float(x), float(u)) for s, c, x, u in zip(scores, nearest, dist, unseen)]

    def _center_distances(self, vecs: Sequence[SessionVector]) -> np.ndarray:
        # every session vector has norm 1 (unseen n-grams included), so
        # |x - c|² = 1 - 2 x·c + |c|²
        d2 = 1.0 - 2.0 * self._center_dots(vecs) + self.center_sq[None, :]
        return np.sqrt(np.maximum(d2, 0.0))

    def _center_dots(self, vecs: Sequence[SessionVector]) -> np.ndarray:
        """x·c for every session and centre, straight from the sessions' sparse parts: each
        session sums its columns' rows of the centres (numpy only; no sparse matrix)."""
        sizes = np.fromiter(map(len, (v.indices for v in vecs)), dtype=np.int64, count=len(vecs))
        dots = np.zeros((len(vecs), self.centers_t.shape[1]))
        filled = sizes > 0
        if filled.any():
            cols = np.concatenate([v.indices for v in vecs])
            weights = np.concatenate([v.values for v in vecs])
            starts = (np.cumsum(sizes) - sizes)[filled]
            dots[filled] = np.add.reduceat(self.centers_t[cols] * weights[:, None], starts, axis=0)
        return dots

    def _knn(self, X: sp.csr_matrix, other_rows: np.ndarray | None) -> np.ndarray:
        n_rows = self.knn_rows_t.shape[1] - (0 if other_rows is None else int(other_rows.sum()))
        k = max(1, min(self.knn_k, n_rows))
        out = np.empty(X.shape[0])
        for lo in range(0, X.shape[0], KNN_BLOCK):
            dots = (X[lo:lo + KNN_BLOCK] @ self.knn_rows_t).toarray()
            if other_rows is not None:
                dots[:, other_rows] = -np.inf
            # both sides have norm 1: |x - y|² = 2 - 2 x·y; the k-th nearest has the k-th largest dot
            kth = -np.partition(-dots, k - 1, axis=1)[:, k - 1]
            out[lo:lo + KNN_BLOCK] = np.sqrt(np.maximum(2.0 - 2.0 * kth, 0.0))
        return out
