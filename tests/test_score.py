"""Scoring: the scorer plug-ins by hand and through one protocol test that every scorer in the
registry passes; distances to the centres and the closest normal session, computed with numpy
from the sessions' sparse parts, equal scipy's sparse products (the reference)."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.sparse as sp
from sklearn.base import clone

from tracewatch.baselines import load_baseline, save_baseline
from tracewatch.config import parse_config
from tracewatch.errors import ConfigError
from tracewatch.features import SessionVector, stack
from tracewatch.model.estimators import NgramVectorizer
from tracewatch.model.arrays import check_shapes, check_values, encode_names
from tracewatch.model.baseline import ARRAYS, fit_baseline, storage_table
from tracewatch.model.score import SCORERS, CentroidScorer, KnnScorer, SessionScorer
from tracewatch.templates import TemplateTree


def _fitted(seed: int = 0):
    rng = np.random.default_rng(seed)
    seqs = [tuple(rng.integers(0, 12, size=rng.integers(1, 9)).tolist()) for _ in range(300)]
    vec = NgramVectorizer(3).fit(seqs)
    others = seqs[:40] + [(50, 51), (3, 50, 3)]  # unseen events: some rows have no known n-gram...
    others.append((60,))  # ...and this one has none at all
    return vec, [vec.vector(s) for s in others]


def _unit(x, unseen: float = 0.0) -> SessionVector:
    x = np.asarray(x, dtype=float)
    return SessionVector(np.flatnonzero(x), x[x != 0], {}, unseen)


# -- the two scorers by hand ----------------------------------------------------------------------
def test_centroid_scorer_by_hand():
    # centres (1, 0) and (0, 1) with spreads 0.5 and 0.1; q = (0.8, 0.6) has norm 1:
    # |q − c0| = √0.4 = 0.6325, |q − c1| = √0.8 = 0.8944; in spreads 1.265 and 8.944 → cluster 0
    centers = np.eye(2)
    scorer = CentroidScorer(unseen_weight=5.0).from_arrays({"spreads": np.array([0.5, 0.1])})
    front = SessionScorer(None, centers, scorer, cluster_sources=["a", "b"], row_sources=[])
    (score, cluster, dist, _), = front.score_vectors("z", [_unit([0.8, 0.6])])
    assert cluster == 0 and dist == pytest.approx(math.sqrt(0.4)) and score == pytest.approx(math.sqrt(0.4) / 0.5)
    # unseen mass 0.1 adds unseen_weight × 0.1 = 0.5
    (score_u, *_), = front.score_vectors("z", [_unit([0.8, 0.6], unseen=0.1)])
    assert score_u == pytest.approx(score + 0.5)
    # a session of source "b" is judged against b's cluster only: 0.8944 / 0.1
    (score_b, cluster_b, *_), = front.score_vectors("b", [_unit([0.8, 0.6])])
    assert cluster_b == 1 and score_b == pytest.approx(math.sqrt(0.8) / 0.1)


def test_knn_scorer_by_hand():
    # baseline sessions e1 = (1, 0) of cluster 0, e2 = (0, 1) and e3 = (0.6, 0.8) of cluster 1;
    # q = (0.8, 0.6): dots 0.8, 0.6, 0.96; |q − y| = √(2 − 2 q·y): nearest e3 at √0.08, then e1 at √0.4
    rows = sp.csr_matrix(np.array([[1.0, 0.0], [0.0, 1.0], [0.6, 0.8]]))
    centers = np.array([[1.0, 0.0], [0.3, 0.9]])
    q = [_unit([0.8, 0.6])]
    for k, expected in [(1, math.sqrt(0.08)), (2, math.sqrt(0.4)), (5, math.sqrt(2 - 2 * 0.6))]:
        scorer = KnnScorer(knn_k=k).fit(rows, np.array([0, 1, 1]), clusters=None)
        front = SessionScorer(None, centers, scorer, cluster_sources=["a", "b"], row_sources=["a", "b", "b"])
        (score, cluster, dist, _), = front.score_vectors("z", q)
        assert score == pytest.approx(expected) and cluster == 1  # the cluster of the nearest one, e3
        assert dist == pytest.approx(np.linalg.norm(np.array([0.8, 0.6]) - centers[1]))
    # source "a" has e1 only: its distance, its cluster, whatever k
    (score_a, cluster_a, *_), = front.score_vectors("a", q)
    assert score_a == pytest.approx(math.sqrt(0.4)) and cluster_a == 0


# -- every scorer in the registry -----------------------------------------------------------------
def _baseline(scorer: str, tmp_path):
    rng = np.random.default_rng(5)
    miner = TemplateTree()
    for e in range(12):
        miner.add_event(f"step-{e}")
    flows = [(0, 1, 2, 3), (4, 5, 6), (0, 7, 7, 3)]
    sessions = []
    for source, flow in [("a", 0), ("a", 1), ("b", 2), ("b", 0)]:
        for _ in range(60):
            seq = list(flows[flow])
            if rng.random() < 0.4:
                seq.insert(int(rng.integers(1, len(seq))), int(rng.integers(8, 11)))
            sessions.append((source, tuple(seq)))
    cfg = parse_config({"sources": [{"name": "a"}, {"name": "b"}], "state_dir": str(tmp_path),
                        "model": {"scorer": scorer, "k_max": 5, "false_alarm_rate": 0.05}})
    return fit_baseline(sessions, miner, cfg), sessions


@pytest.mark.parametrize("name", sorted(SCORERS))
def test_every_scorer_keeps_the_protocol(name, tmp_path):
    fitted, sessions = _baseline(name, tmp_path)
    scorer = fitted.scorer
    assert type(scorer) is SCORERS[name] and scorer.name == name
    assert clone(scorer).get_params() == scorer.get_params()  # scikit-learn's clone works
    # its arrays are exactly its rows of the storage table, and pass the table's checks
    own = scorer.to_arrays()
    assert set(own) == {a.name for a in scorer.arrays}
    assert not set(own) & {a.name for a in ARRAYS}
    table = storage_table(scorer)
    arrays, lists = encode_names(fitted.to_arrays(), table)
    dims = check_shapes({k: (v.dtype, v.shape) for k, v in arrays.items()}, table,
                        {"G": 3, "T": len(fitted.miner.templates), "sources": len(lists["sources"])})
    check_values(arrays, table, dims)
    # one sign convention: a session unlike any baseline one scores higher than a normal one
    front = fitted.make_scorer()
    normal, odd = front.score("a", [(0, 1, 2, 3), (3, 7, 2, 11, 11, 11, 6, 0)])
    assert odd[0] > normal[0] >= 0
    # saved and loaded, it judges every session alike
    save_baseline(fitted, tmp_path)
    loaded = load_baseline(tmp_path)
    assert type(loaded.scorer) is SCORERS[name] and loaded.scorer.get_params() == scorer.get_params()
    probes = sessions + [("a", (3, 7, 2, 11)), ("z", (4, 5, 6))]
    a = fitted.judge(fitted.make_scorer(), [s for s, _ in probes], [q for _, q in probes])
    b = loaded.judge(loaded.make_scorer(), [s for s, _ in probes], [q for _, q in probes])
    assert np.allclose([r[0] for r in a.results], [r[0] for r in b.results], rtol=1e-12)
    assert [r[1] for r in a.results] == [r[1] for r in b.results]
    assert np.array_equal(a.p_values, b.p_values) and np.array_equal(a.flagged, b.flagged)


def test_the_config_names_the_registry_scorers():
    for name in SCORERS:
        assert parse_config({"model": {"scorer": name}}).model.scorer == name
    with pytest.raises(ConfigError, match="model.scorer: scorer must be one of centroid, knn"):
        parse_config({"model": {"scorer": "nearest"}})


# -- the shared parts ------------------------------------------------------------------------------
def test_center_distances_equal_the_sparse_product():
    vec, vecs = _fitted()
    centers = np.random.default_rng(1).random((5, len(vec.vocabulary_)))
    scorer = SessionScorer(vec, centers, CentroidScorer(), cluster_sources=[""] * 5, row_sources=[])
    X = stack(vecs, len(vec.vocabulary_))  # scipy CSR: the reference
    dots = X @ centers.T
    expected = np.sqrt(np.maximum(1.0 - 2.0 * dots + (centers * centers).sum(axis=1)[None, :], 0.0))
    assert np.allclose(scorer._center_distances(vecs), expected, rtol=1e-12, atol=1e-12)
    assert len(vecs[-1].indices) == 0  # the empty row took part


def test_closest_normal_is_the_plain_cosine_nearest_neighbour(demo_fit):
    from sklearn.neighbors import NearestNeighbors
    from sklearn.preprocessing import normalize

    b = demo_fit.baseline
    loaded = load_baseline(demo_fit.cfg.state_dir)  # as saved and loaded
    # the reference: scikit-learn's brute-force nearest neighbour in cosine distance, over the
    # distinct baseline sessions of the source, without any cluster spread
    R = normalize(b.vectorizer.transform(b.normal_seqs)[0])  # cosine: unit rows
    nn = NearestNeighbors(n_neighbors=1, metric="cosine", algorithm="brute").fit(R)
    for seq in b.normal_seqs[:30] + [(0, 1, 2, 999), (3, 3, 3, 3, 3, 3, 1)]:
        v = b.vectorizer.vector(seq)
        x = sp.csr_matrix((v.values, v.indices, [0, len(v.indices)]), shape=(1, b.centers.shape[1]))
        dist, idx = nn.kneighbors(x)
        got, cluster = b.closest_normal(v, "api")
        assert loaded.closest_normal(v, "api") == (got, cluster)
        best = 1.0 - (R[b.normal_seqs.index(got)] @ x.T).toarray().item() / max(np.linalg.norm(v.values), 1e-300)
        assert best == pytest.approx(dist.item(), abs=1e-9)  # as near as sklearn's (ties may differ)
        assert cluster == b.normal_labels[b.normal_seqs.index(got)]
    assert b.closest_normal(b.vectorizer.vector(b.normal_seqs[5]), "api")[0] == b.normal_seqs[5]
