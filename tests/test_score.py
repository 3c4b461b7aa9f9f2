"""Scoring: distances to the centres and the closest normal session, computed with numpy from
the sessions' sparse parts, equal scipy's sparse products (the reference)."""

from __future__ import annotations

import hashlib

import numpy as np
import orjson
import pytest
import scipy.sparse as sp

from tracewatch.baselines import load_baseline
from tracewatch.errors import BaselineError
from tracewatch.features import NgramVectorizer, stack
from tracewatch.model.score import SessionScorer


def _fitted(seed: int = 0):
    rng = np.random.default_rng(seed)
    seqs = [tuple(rng.integers(0, 12, size=rng.integers(1, 9)).tolist()) for _ in range(300)]
    vec = NgramVectorizer(3).fit(seqs)
    others = seqs[:40] + [(50, 51), (3, 50, 3)]  # unseen events: some rows have no known n-gram...
    others.append((60,))  # ...and this one has none at all
    return vec, [vec.vector(s) for s in others]


def test_center_distances_equal_the_sparse_product():
    vec, vecs = _fitted()
    centers = np.random.default_rng(1).random((5, len(vec.vocabulary_)))
    scorer = SessionScorer(vec, centers, np.ones(5))
    X = stack(vecs, len(vec.vocabulary_))  # scipy CSR: the reference
    dots = X @ centers.T
    expected = np.sqrt(np.maximum(1.0 - 2.0 * dots + (centers * centers).sum(axis=1)[None, :], 0.0))
    assert np.allclose(scorer._center_distances(vecs), expected, rtol=1e-12, atol=1e-12)
    assert len(vecs[-1].indices) == 0  # the empty row took part


def test_closest_normal_equals_the_sparse_argmax(demo_fit):
    b = demo_fit.baseline  # its rows as a scipy CSR matrix: the reference
    loaded = load_baseline(demo_fit.cfg.state_dir)  # as saved and loaded, read with numpy
    for cluster in range(len(b.centers)):
        rows = np.flatnonzero(b.normal_labels == cluster)
        for seq in b.normal_seqs[:30] + [(0, 1, 2, 999)]:
            v = b.vectorizer.vector(seq)
            x = sp.csr_matrix((v.values, v.indices, [0, len(v.indices)]), shape=(1, b.centers.shape[1]))
            ref = b.normal_seqs[int(rows[int(np.argmax((b.knn_rows[rows] @ x.T).toarray().ravel()))])]
            assert loaded.closest_normal(v, cluster) == ref


def test_malformed_session_rows_are_a_clear_error(demo_state):
    version = demo_state / "baselines" / "v0001"
    with np.load(version / "model.npz") as z:
        arrays = dict(z)
    arrays["knn_indices"] = arrays["knn_indices"] + 10_000  # columns beyond the vocabulary
    np.savez(version / "model.npz", **arrays)
    # a matching checksum, so that only the content check can catch it
    manifest = orjson.loads((version / "manifest.json").read_bytes())
    manifest["files"]["model.npz"] = hashlib.sha256((version / "model.npz").read_bytes()).hexdigest()
    (version / "manifest.json").write_bytes(orjson.dumps(manifest))
    with pytest.raises(BaselineError, match="unreadable"):
        load_baseline(demo_state)
