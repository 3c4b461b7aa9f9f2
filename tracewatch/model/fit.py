"""Fitting the baseline model: k-means on normal sessions, k chosen by the knee.

Stage: features → **model** → scoring. Rows are *distinct* session vectors weighted by how
many sessions share them, so a day of repetitive traffic costs what its variety costs.

- k-means with k-means++ seeding and restarts (Arthur & Vassilvitskii, SODA 2007), run by
  scikit-learn's ``KMeans`` with ``sample_weight``.
- k = "auto": the knee of the inertia curve (Kneedle: Satopää, Albrecht, Irwin, Raghavan,
  "Finding a 'Kneedle' in a Haystack", ICDCS workshops 2011), cross-checked by the mean
  silhouette (Rousseeuw, J. Comput. Appl. Math. 20, 1987).
- Clusters holding less than ``min_cluster_share`` of the sessions are treated as
  contamination of the baseline: reported, not learned.
"""

from __future__ import annotations

import warnings

import numpy as np
import scipy.sparse as sp
from sklearn.cluster import KMeans
from sklearn.exceptions import ConvergenceWarning
from sklearn.metrics import pairwise_distances

SILHOUETTE_SAMPLE = 3000


def kneedle(ks: np.ndarray, inertia: np.ndarray) -> int:
    """The knee of a decreasing, convex curve: the point farthest below the chord joining
    its ends, in coordinates normalised to [0, 1] (Satopää et al. 2011, offline form)."""
    ks = np.asarray(ks, dtype=float)
    inertia = np.asarray(inertia, dtype=float)
    if len(ks) < 3 or inertia[0] - inertia[-1] <= 1e-12:
        return int(ks[0])
    x = (ks - ks[0]) / (ks[-1] - ks[0])
    y = (inertia - inertia.min()) / (inertia.max() - inertia.min())
    diff = (1.0 - x) - y
    return int(ks[int(np.argmax(diff))])


def weighted_silhouette(X, labels: np.ndarray, weights: np.ndarray | None = None) -> float:
    """Mean silhouette of rows that each stand for ``weights[i]`` identical points.

    Equal to ``sklearn.metrics.silhouette_score`` on the expanded data set (every row
    repeated by its weight): copies of a point sit at distance 0 from it, and a cluster of
    a single point scores 0, as in Rousseeuw (1987).
    """
    labels = np.asarray(labels)
    w = np.ones(len(labels)) if weights is None else np.asarray(weights, dtype=float)
    uniq = np.unique(labels)
    if len(uniq) < 2:
        raise ValueError("the silhouette needs at least 2 clusters")
    dist = pairwise_distances(X, metric="euclidean")
    onehot = (labels[:, None] == uniq[None, :]).astype(float) * w[:, None]  # n × c
    sums = dist @ onehot  # weighted distance sums to each cluster
    sizes = onehot.sum(axis=0)
    own = np.searchsorted(uniq, labels)
    own_size = sizes[own]
    with np.errstate(divide="ignore", invalid="ignore"):
        a = sums[np.arange(len(labels)), own] / (own_size - 1.0)
        means = sums / sizes[None, :]
    means[np.arange(len(labels)), own] = np.inf
    b = means.min(axis=1)
    denom = np.maximum(a, b)
    with np.errstate(divide="ignore", invalid="ignore"):
        s = np.where(denom > 0, (b - a) / denom, 0.0)
    s[own_size <= 1.0] = 0.0
    return float(np.sum(s * w) / np.sum(w))


def _kmeans(X, weights, k: int, restarts: int, seed: int) -> KMeans:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        return KMeans(n_clusters=k, init="k-means++", n_init=restarts, random_state=seed,
                      algorithm="lloyd").fit(X, sample_weight=weights)


class ClusterModel:
    """k-means baseline in the scikit-learn estimator shape.

    After ``fit(X, sample_weight)``: ``cluster_centers_`` (dense, contamination removed),
    ``spreads_`` (weighted mean member distance, floored), ``cluster_weights_``,
    ``medoids_`` (row index of each cluster's representative), ``labels_`` (per row, -1 for
    contamination), ``curve_`` (k, inertia, silhouette), ``k_``, ``contamination_``.
    """

    def __init__(self, k: int | str = "auto", k_max: int = 16, restarts: int = 4,
                 min_cluster_share: float = 0.005, seed: int = 0) -> None:
        self.k = k
        self.k_max = k_max
        self.restarts = restarts
        self.min_cluster_share = min_cluster_share
        self.seed = seed

    def fit(self, X: sp.csr_matrix, sample_weight: np.ndarray | None = None) -> "ClusterModel":
        n = X.shape[0]
        if n == 0:
            raise ValueError("no sessions to fit")
        w = np.ones(n) if sample_weight is None else np.asarray(sample_weight, dtype=float)
        self.notes_: list[str] = []
        fits: dict[int, KMeans] = {}
        if self.k == "auto":
            k_hi = max(1, min(self.k_max, n))
            ks = np.arange(1, k_hi + 1)
            for k in ks:
                fits[int(k)] = _kmeans(X, w, int(k), self.restarts, self.seed)
            inertia = np.array([fits[int(k)].inertia_ for k in ks])
            knee = kneedle(ks, inertia)
            sil = self._silhouettes(X, w, fits)
            chosen = knee
            if sil:
                best = max(sil, key=sil.get)
                if knee >= 2 and sil.get(knee, 0.0) < 0.5 * sil[best]:
                    self.notes_.append(f"knee at k={knee} has a weak silhouette "
                                       f"({sil[knee]:.3f}); k={best} is used (silhouette {sil[best]:.3f})")
                    chosen = best
            self.curve_ = [{"k": int(k), "inertia": float(i), "silhouette": sil.get(int(k))}
                           for k, i in zip(ks, inertia)]
            self.knee_ = knee
        else:
            chosen = int(self.k)
            if chosen > n:
                self.notes_.append(f"k={chosen} asked but only {n} distinct sessions; k={n} used")
                chosen = n
            fits[chosen] = _kmeans(X, w, chosen, self.restarts, self.seed)
            self.curve_ = [{"k": chosen, "inertia": float(fits[chosen].inertia_), "silhouette": None}]
            self.knee_ = chosen
        km = fits[chosen]
        self.k_ = chosen
        self._finish(X, w, km.cluster_centers_, km.labels_)
        return self

    def _silhouettes(self, X, w, fits: dict[int, KMeans]) -> dict[int, float]:
        rows = np.arange(X.shape[0])
        if len(rows) > SILHOUETTE_SAMPLE:
            rng = np.random.default_rng(self.seed)
            rows = np.sort(rng.choice(rows, SILHOUETTE_SAMPLE, replace=False, p=w / w.sum()))
        Xs, ws = X[rows], w[rows]
        out = {}
        for k, km in fits.items():
            labels = km.labels_[rows]
            if k >= 2 and len(np.unique(labels)) >= 2:
                out[k] = weighted_silhouette(Xs, labels, ws)
        return out

    def _finish(self, X, w, centers: np.ndarray, labels: np.ndarray) -> None:
        total = w.sum()
        sizes = np.bincount(labels, weights=w, minlength=len(centers))
        keep = np.flatnonzero(sizes / total >= self.min_cluster_share)
        if len(keep) == 0:
            keep = np.array([int(np.argmax(sizes))])
        dropped = [c for c in range(len(centers)) if c not in set(keep.tolist())]
        self.contamination_ = [
            {"rows": np.flatnonzero(labels == c).tolist(), "sessions": int(sizes[c]),
             "share": float(sizes[c] / total)} for c in dropped]
        remap = -np.ones(len(centers), dtype=int)
        remap[keep] = np.arange(len(keep))
        self.labels_ = remap[labels]
        self.cluster_centers_ = np.asarray(centers[keep], dtype=float)
        self.cluster_weights_ = sizes[keep]
        # distances of every member row to its own centre
        d = self._dist_to(X, np.zeros(X.shape[0]), self.cluster_centers_)
        spreads, medoids = [], []
        for c in range(len(keep)):
            rows = np.flatnonzero(self.labels_ == c)
            dc = d[rows, c]
            spreads.append(float(np.sum(dc * w[rows]) / np.sum(w[rows])))
            medoids.append(int(rows[np.argmin(dc)]))
        spreads = np.array(spreads)
        floor = max(1e-2, 0.25 * float(np.median(spreads)))
        self.spreads_ = np.maximum(spreads, floor)
        self.medoids_ = np.array(medoids, dtype=np.int64)

    @staticmethod
    def _dist_to(X, unseen_mass: np.ndarray, centers: np.ndarray) -> np.ndarray:
        """Euclidean distances between rows (whose full norm is 1, ``unseen_mass`` of it
        outside the vocabulary) and centres."""
        dots = np.asarray(X @ centers.T)
        row_sq = np.asarray(X.multiply(X).sum(axis=1)).ravel() + unseen_mass
        d2 = row_sq[:, None] - 2.0 * dots + np.sum(centers * centers, axis=1)[None, :]
        return np.sqrt(np.maximum(d2, 0.0))

    def distances(self, X, unseen_mass: np.ndarray) -> np.ndarray:
        if not hasattr(self, "cluster_centers_"):
            raise RuntimeError("ClusterModel is not fitted yet; call fit first")
        return self._dist_to(X, unseen_mass, self.cluster_centers_)
