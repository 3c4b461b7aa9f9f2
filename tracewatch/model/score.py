"""Scoring: nonconformity of a session against the fitted baseline.

Stage: features → **scoring** → alerts. One sign convention everywhere: a higher score is
more anomalous. The scorers are plug-ins behind one protocol (:class:`Scorer`), named in the
config by ``[model] scorer`` through :data:`SCORERS`:

- ``centroid``: distance to the nearest k-means centre in units of that cluster's spread, plus
  ``unseen_weight`` × the share of the session's (squared) weight on n-grams never seen at
  fit — within a varied cluster, a new transition between known steps moves a session less
  than normal variety does, so it is counted on its own;
- ``knn``: distance to the k-th nearest distinct baseline session — for very multi-modal
  normal behaviour, where a centre can sit between modes.

:class:`SessionScorer` is the part every scorer shares: it vectorises sessions, measures their
distance to every centre, keeps each source to its own clusters and baseline sessions, and
answers sessions whose exact event sequence was scored before from a cache keyed by the
sequence itself (identical sessions cost one dict lookup).

Adding a scorer: a class here with ``name``, ``arrays``, ``Params`` and the four methods of
:class:`Scorer`, listed in :data:`SCORERS`, and its test in tests/test_score.py. Its settings
are ``[model]`` keys of the same names.

This module loads numpy only (the config checks scorer names against :data:`SCORERS`; scipy is
imported by the knn scorer when it first needs it).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Annotated, ClassVar, NamedTuple

import numpy as np
from pydantic import AfterValidator, BaseModel, ConfigDict, Field

from .arrays import Array

if TYPE_CHECKING:
    import scipy.sparse as sp

    from ..features import NgramWeights, SessionVector

KNN_BLOCK = 256
SPREAD_FLOOR = 1e-2  # the least spread of a cluster (model/fit.py): distances are divided by it
Result = tuple[float, int, float, float]  # score, cluster, distance to its centre, unseen share


class SourceMask(NamedTuple):
    """The clusters and baseline sessions *not* of one source (None: compare with all of them —
    a source the baseline never saw, or one that owns none)."""

    clusters: np.ndarray | None
    rows: np.ndarray | None


class Scorer:
    """The protocol of a scorer plug-in, in the scikit-learn estimator shape: parameters in
    ``__init__`` (``[model]`` keys of the same names, bounded by ``Params`` when a baseline is
    loaded), ``fit`` → self, learned state ending in ``_``.

    - ``fit(X, y, sample_weight, *, clusters)``: ``X`` the distinct baseline sessions' vectors
      (CSR), ``y`` their cluster, ``sample_weight`` how many sessions each stands for,
      ``clusters`` the fitted :class:`~tracewatch.model.fit.ClusterModel`;
    - ``score_vectors(vecs, distances, unseen, mask)``: for one source's session vectors, their
      distances to every centre and their unseen share: ``(scores, clusters)`` — each session's
      nonconformity and the normal cluster it was judged against (its explanation's reference);
    - ``to_arrays()`` / ``from_arrays(arrays)``: its learned state as the arrays it lists in
      ``arrays`` (its rows of the storage table, tracewatch/model/arrays.py); ``from_arrays``
      is handed every checked array of the baseline, the shared ones included.
    """

    name: ClassVar[str]
    arrays: ClassVar[tuple[Array, ...]] = ()

    class Params(BaseModel):
        model_config = ConfigDict(extra="forbid", strict=True)

    def get_params(self, deep: bool = True) -> dict:
        """Its parameters (scikit-learn's ``clone`` works with this)."""
        return {key: getattr(self, key) for key in self.Params.model_fields}

    def fit(self, X: sp.csr_matrix, y: np.ndarray, sample_weight: np.ndarray | None = None, *,
            clusters) -> "Scorer":
        raise NotImplementedError

    def score_vectors(self, vecs: Sequence[SessionVector], distances: np.ndarray, unseen: np.ndarray,
                      mask: SourceMask) -> tuple[np.ndarray, np.ndarray]:
        raise NotImplementedError

    def to_arrays(self) -> dict[str, np.ndarray]:
        return {a.name: getattr(self, a.name + "_") for a in self.arrays}

    def from_arrays(self, arrays: Mapping[str, np.ndarray]) -> "Scorer":
        for a in self.arrays:
            setattr(self, a.name + "_", arrays[a.name])
        return self


class CentroidScorer(Scorer):
    """Nearest centre in units of its cluster's spread (``spreads_``: the clusters' weighted mean
    member distance, floored), plus ``unseen_weight`` × the unseen share."""

    name = "centroid"
    arrays = (Array("spreads", "<f8", ("K",), low=SPREAD_FLOOR, high=2.0),)  # unit vectors: ≤ √2 apart

    class Params(BaseModel):
        model_config = ConfigDict(extra="forbid", strict=True)
        unseen_weight: float = Field(ge=0, le=1e6, allow_inf_nan=False)

    def __init__(self, unseen_weight: float = 5.0) -> None:
        self.unseen_weight = unseen_weight

    def fit(self, X, y, sample_weight=None, *, clusters) -> "CentroidScorer":
        self.spreads_ = np.asarray(clusters.spreads_, dtype=float)
        return self

    def score_vectors(self, vecs, distances, unseen, mask):
        # nearest in units of each cluster's own spread: a session between a tight cluster and a
        # varied one belongs to the varied one
        scaled = distances / self.spreads_[None, :]
        if mask.clusters is not None:
            scaled[:, mask.clusters] = np.inf
        nearest = np.argmin(scaled, axis=1)
        return scaled[np.arange(len(vecs)), nearest] + self.unseen_weight * unseen, nearest


class KnnScorer(Scorer):
    """Distance to the ``knn_k``-th nearest distinct baseline session of the source; the
    session is judged against the cluster of its nearest one. Keeps those sessions' vectors
    (``data_``, ``indices_``, ``indptr_``: CSR parts, one row per distinct baseline session)."""

    name = "knn"
    arrays = (
        Array("knn_data", "<f8", ("nnz",), low=0.0, high=1.0),  # L2-normalised non-negative weights
        Array("knn_indices", "<i8", ("nnz",), low=0, high="V"),
        Array("knn_indptr", "<i8", ("N+1",), offsets_of="knn_data"),
    )

    class Params(BaseModel):
        model_config = ConfigDict(extra="forbid", strict=True)
        knn_k: int = Field(ge=1, le=1_000_000)

    def __init__(self, knn_k: int = 1) -> None:
        self.knn_k = knn_k

    def fit(self, X, y, sample_weight=None, *, clusters) -> "KnnScorer":
        X = X.tocsr()
        self.knn_data_, self.knn_indices_ = X.data.astype(np.float64), X.indices.astype(np.int64)
        self.knn_indptr_ = X.indptr.astype(np.int64)
        self.labels_ = np.asarray(y, dtype=np.int64)
        self.n_features_ = X.shape[1]
        return self

    def from_arrays(self, arrays):
        super().from_arrays(arrays)
        self.labels_ = arrays["normal_labels"]
        self.n_features_ = len(arrays["idf"])
        return self

    def _rows_t(self) -> sp.csr_matrix:
        """The baseline sessions' vectors, transposed (a copy of every row), built on first use."""
        rows_t = self.__dict__.get("_rows_t_cache")
        if rows_t is None:
            import scipy.sparse as sp

            shape = (len(self.knn_indptr_) - 1, self.n_features_)
            rows = sp.csr_matrix((self.knn_data_, self.knn_indices_, self.knn_indptr_), shape=shape)
            rows_t = self.__dict__["_rows_t_cache"] = rows.T.tocsr()
        return rows_t

    def score_vectors(self, vecs, distances, unseen, mask):
        from ..features import stack

        rows_t = self._rows_t()
        X = stack(vecs, self.n_features_)
        n_rows = rows_t.shape[1] - (0 if mask.rows is None else int(mask.rows.sum()))
        k = max(1, min(self.knn_k, n_rows))
        scores = np.empty(X.shape[0])
        nearest = np.empty(X.shape[0], dtype=np.int64)
        for lo in range(0, X.shape[0], KNN_BLOCK):
            dots = (X[lo:lo + KNN_BLOCK] @ rows_t).toarray()
            if mask.rows is not None:
                dots[:, mask.rows] = -np.inf
            # both sides have norm 1: |x - y|² = 2 - 2 x·y; the k-th nearest has the k-th largest dot
            kth = -np.partition(-dots, k - 1, axis=1)[:, k - 1]
            scores[lo:lo + KNN_BLOCK] = np.sqrt(np.maximum(2.0 - 2.0 * kth, 0.0))
            nearest[lo:lo + KNN_BLOCK] = self.labels_[np.argmax(dots, axis=1)]
        return scores, nearest


SCORERS: dict[str, type[Scorer]] = {cls.name: cls for cls in (CentroidScorer, KnnScorer)}


def _registered(name: str) -> str:
    if name not in SCORERS:
        raise ValueError(f"scorer must be one of {', '.join(SCORERS)}")
    return name


ScorerName = Annotated[str, AfterValidator(_registered)]  # a pydantic field type: [model] scorer, the manifest


def make_scorer(name: str, settings) -> Scorer:
    """The scorer ``name`` with its parameters taken from ``settings`` (``[model]``, or any
    object with attributes of the same names)."""
    cls = SCORERS[name]
    return cls(**{key: getattr(settings, key) for key in cls.Params.model_fields})


class SessionScorer:
    """Scores sessions of one source at a time against that source's clusters (and, for
    ``knn``, that source's baseline sessions): sessions of different sources share no
    events, so comparing them across sources only adds noise."""

    def __init__(self, vectorizer: NgramWeights, centers: np.ndarray, scorer: Scorer, *,
                 cluster_sources: Sequence[str], row_sources: Sequence[str], cache_size: int = 100_000) -> None:
        self.vectorizer = vectorizer
        self.scorer = scorer
        self.centers_t = np.ascontiguousarray(centers.T)
        self.center_sq = np.sum(centers * centers, axis=1)
        self.cluster_sources = np.asarray(cluster_sources, dtype=object)
        self.row_sources = np.asarray(row_sources, dtype=object)
        self._masks: dict[str, SourceMask] = {}
        self.cache: dict[tuple[str, tuple[int, ...]], Result] = {}
        self.cache_size = cache_size
        self.cache_hits = 0

    def _mask(self, source: str) -> SourceMask:
        mask = self._masks.get(source)
        if mask is None:
            other_c = self.cluster_sources != source
            other_r = self.row_sources != source
            mask = self._masks[source] = SourceMask(other_c if not other_c.all() else None,
                                                    other_r if not other_r.all() else None)
        return mask

    def score(self, source: str, seqs: Sequence[tuple[int, ...]]) -> list[Result]:
        """``(score, cluster, distance to its centre, unseen share)`` per sequence of
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
            results = self.score_vectors(source, [self.vectorizer.vector(s) for s in keys])
            if len(cache) + len(keys) > self.cache_size:
                cache.clear()
            for seq, res in zip(keys, results):
                cache[(source, seq)] = res
                for i in todo[seq]:
                    out[i] = res
        return out

    def score_vectors(self, source: str, vecs: Sequence[SessionVector]) -> list[Result]:
        unseen = np.array([v.unseen_mass for v in vecs])
        d = self._center_distances(vecs)
        scores, nearest = self.scorer.score_vectors(vecs, d, unseen, self._mask(source))
        dist = d[np.arange(len(vecs)), nearest]
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
