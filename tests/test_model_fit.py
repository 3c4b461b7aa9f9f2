"""Baseline model: Kneedle, weighted silhouette and k-means assignment vs scikit-learn, contamination."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from sklearn.cluster import KMeans
from sklearn.metrics import adjusted_rand_score, silhouette_score

from tracewatch.model.estimators import NgramVectorizer
from tracewatch.model import fit
from tracewatch.model.fit import ClusterModel, kneedle, weighted_silhouette


@pytest.mark.parametrize(
    "curve, knee",
    [
        ([100, 20, 15, 12, 10, 9], 2),  # by hand: normalised chord distance is largest at k=2
        ([100, 80, 60, 15, 12, 10, 9, 8], 4),
        ([10, 10, 10], 1),  # flat: no structure
    ],
    ids=["sharp-at-2", "sharp-at-4", "flat"],
)
def test_kneedle_on_hand_made_curves(curve, knee):
    ks = np.arange(1, len(curve) + 1)
    assert kneedle(ks, np.array(curve, dtype=float)) == knee


def _blobs(seed=0):
    rng = np.random.default_rng(seed)
    centers = rng.normal(size=(3, 5)) * 4
    X = np.vstack([c + rng.normal(size=(40, 5)) for c in centers])
    labels = np.repeat([0, 1, 2], 40)
    return X, labels


def test_silhouette_matches_sklearn_unweighted():
    X, labels = _blobs()
    # reference: sklearn.metrics.silhouette_score (Rousseeuw 1987), euclidean metric
    assert np.isclose(weighted_silhouette(X, labels), silhouette_score(X, labels))


def test_weighted_silhouette_equals_sklearn_on_expanded_data():
    X, labels = _blobs(1)
    X, labels = X[::4], labels[::4]
    w = np.random.default_rng(2).integers(1, 5, size=len(X))
    w[0] = 1  # a row standing for one point
    expanded = np.repeat(X, w, axis=0)
    assert np.isclose(weighted_silhouette(X, labels, w), silhouette_score(expanded, np.repeat(labels, w)))


def test_singleton_cluster_scores_zero_like_sklearn():
    X = np.array([[0.0], [0.1], [5.0]])
    labels = np.array([0, 0, 1])
    assert np.isclose(weighted_silhouette(X, labels), silhouette_score(X, labels))


def _session_matrix():
    rng = np.random.default_rng(4)
    flows = [(1, 2, 3, 4), (5, 6, 7), (1, 8, 9, 9, 4)]
    seqs = []
    for _ in range(300):
        f = list(flows[rng.integers(0, 3)])
        if rng.random() < 0.3:
            f.insert(int(rng.integers(1, len(f))), int(rng.integers(10, 13)))
        seqs.append(tuple(f))
    return NgramVectorizer(3).fit(seqs).transform(seqs)[0]


def test_chunked_assignment_matches_sklearn_kmeans(monkeypatch):
    # The streaming fit's own assignment pass (nearest centre, weighted inertia), run in several
    # blocks, against scikit-learn's KMeans labels_ and inertia_ for the same centres.
    monkeypatch.setattr(fit, "CHUNK_ROWS", 64)
    X = _session_matrix()
    w = np.random.default_rng(5).integers(1, 4, size=X.shape[0]).astype(float)
    km = KMeans(n_clusters=4, n_init=1, random_state=0, algorithm="lloyd").fit(X, sample_weight=w)
    labels, d2, inertia = fit._assign(X, w, km.cluster_centers_)
    assert X.shape[0] > 4 * fit.CHUNK_ROWS
    assert np.array_equal(labels, km.labels_)
    assert np.isclose(inertia, km.inertia_, rtol=1e-9) and np.isclose(np.sum(d2 * w), inertia)


def test_auto_k_finds_the_three_flows_and_reports_the_curve():
    X = _session_matrix()
    model = ClusterModel(k="auto", k_max=8, restarts=3, seed=0).fit(X)
    assert model.k_ == 3
    assert [row["k"] for row in model.curve_] == list(range(1, 9))
    inertia = [row["inertia"] for row in model.curve_]
    assert inertia[0] > inertia[2]
    assert model.curve_[2]["silhouette"] > 0.3


def test_tiny_cluster_is_reported_as_contamination_not_learned():
    base = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    X = sp.csr_matrix(np.vstack([base[0]] * 1 + [base[1]] * 1 + [base[2]]))
    w = np.array([500.0, 499.0, 1.0])  # the third pattern is 0.1% of the sessions
    model = ClusterModel(k=3, min_cluster_share=0.005, seed=0).fit(X, sample_weight=w)
    assert len(model.cluster_centers_) == 2
    assert len(model.contamination_) == 1 and model.contamination_[0]["sessions"] == 1
    assert model.labels_[2] == -1


# -- streaming fit (mini-batches) ----------------------------------------------------------
def _flows_and_matrix(n=600, seed=4):
    """Sessions of three flows with optional extra steps: (flow of each distinct row, X, weights)."""
    rng = np.random.default_rng(seed)
    flows = [(1, 2, 3, 4), (5, 6, 7), (1, 8, 9, 9, 4)]
    counts: dict[tuple[int, ...], int] = {}
    flow_of: dict[tuple[int, ...], int] = {}
    for _ in range(n):
        f = int(rng.integers(0, 3))
        seq = list(flows[f])
        for _ in range(int(rng.integers(0, 3))):
            seq.insert(int(rng.integers(1, len(seq))), int(rng.integers(10, 30)))
        counts[tuple(seq)] = counts.get(tuple(seq), 0) + 1
        flow_of[tuple(seq)] = f
    distinct = list(counts)
    w = np.array([counts[s] for s in distinct], dtype=float)
    X = NgramVectorizer(3).fit(distinct, sample_weight=w).transform(distinct)[0]
    return np.array([flow_of[s] for s in distinct]), X, w


def test_forced_streaming_finds_the_three_flows():
    flows, X, w = _flows_and_matrix()
    model = ClusterModel(k="auto", k_max=8, restarts=3, seed=0, streaming=True).fit(X, sample_weight=w)
    assert model.streaming_ and model.k_ == 3
    # every flow is one cluster: the adjusted Rand index (sklearn.metrics.adjusted_rand_score,
    # Hubert & Arabie 1985) is 1 exactly when the two partitions agree up to renaming
    assert adjusted_rand_score(flows, model.labels_) == 1.0
    assert [row["k"] for row in model.curve_] == list(range(1, 9))


@pytest.mark.parametrize("streaming, rows, expected", [(False, 10, False), ("auto", 10, True),
                                                       ("auto", 10_000, False), (True, 10_000, True)],
                         ids=["off", "auto-above", "auto-below", "forced"])
def test_streaming_switch(streaming, rows, expected):
    _, X, w = _flows_and_matrix(200)
    model = ClusterModel(k=3, seed=0, streaming=streaming, streaming_rows=rows).fit(X, sample_weight=w)
    assert model.streaming_ is expected


def test_streaming_spreads_and_medoids_match_the_definition():
    # spreads_ are the weighted mean distance of members to their centre (before the floor);
    # checked against a direct dense computation
    _, X, w = _flows_and_matrix()
    model = ClusterModel(k=3, seed=0, streaming=True).fit(X, sample_weight=w)
    dense = X.toarray()
    for c, center in enumerate(model.cluster_centers_):
        rows = np.flatnonzero(model.labels_ == c)
        d = np.linalg.norm(dense[rows] - center, axis=1)
        assert np.isclose(max(np.sum(d * w[rows]) / np.sum(w[rows]), model.spreads_.min()), model.spreads_[c])
        assert model.medoids_[c] == rows[np.argmin(d)]


def test_silhouette_sample_is_bounded_and_close_to_the_full_value():
    _, X, _ = _flows_and_matrix(3000, seed=7)
    w = np.random.default_rng(8).pareto(1.5, size=X.shape[0]) + 1  # heavy-tailed repeat counts
    full = ClusterModel(k="auto", k_max=4, restarts=2, seed=0, silhouette_sample=10**6,
                        streaming=True).fit(X, sample_weight=w)
    sampled = ClusterModel(k="auto", k_max=4, restarts=2, seed=0, silhouette_sample=400,
                           streaming=True).fit(X, sample_weight=w)
    assert full.silhouette_rows_ == X.shape[0] > 400
    assert 0 < sampled.silhouette_rows_ <= 400
    # the same fits (same seed), only the silhouette differs: the sample stands for sessions
    # drawn ∝ weight, so its mean silhouette estimates the weighted one of all rows (drawing
    # rows ∝ weight *and* weighting them again overshoots by about 0.015 here)
    assert np.array_equal(sampled.labels_, full.labels_)
    assert abs(sampled.curve_[2]["silhouette"] - full.curve_[2]["silhouette"]) < 0.008


def test_streaming_config_key_is_validated(tmp_path):
    from tracewatch.config import load_config
    from tracewatch.errors import ConfigError

    cfg = tmp_path / "tw.toml"
    cfg.write_text('[[sources]]\nname = "api"\n[model]\nstreaming = "sometimes"\n')
    with pytest.raises(ConfigError, match="streaming"):
        load_config(cfg)
    cfg.write_text('[[sources]]\nname = "api"\n[model]\nstreaming = true\nstreaming_rows = 1000\n')
    assert load_config(cfg).model.streaming is True
