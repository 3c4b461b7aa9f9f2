"""Features: event n-grams with markers, sublinear tf-idf, L2 norm — checked against scikit-learn."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from sklearn.feature_extraction.text import TfidfTransformer

from tracewatch.features import END, PAD, START, ngrams
from tracewatch.model.estimators import NgramVectorizer
from tracewatch.model.baseline import ARRAYS


def test_ngrams_by_hand():
    got = ngrams([7, 8, 7], 2)
    assert got == {(7,): 2, (8,): 1, (START, 7): 1, (7, 8): 1, (8, 7): 1, (7, END): 1}


def test_tfidf_matches_sklearn_tfidftransformer():
    rng = np.random.default_rng(0)
    seqs = [tuple(int(x) for x in rng.integers(0, 6, size=rng.integers(1, 12))) for _ in range(60)]
    vec = NgramVectorizer(3).fit(seqs)
    X, unseen = vec.transform(seqs)
    assert np.allclose(unseen, 0.0)
    # the same counts through scikit-learn's TfidfTransformer (sublinear_tf, smooth_idf, l2)
    counts = sp.lil_matrix((len(seqs), len(vec.vocabulary_)))
    for i, s in enumerate(seqs):
        for g, c in ngrams(s, 3).items():
            counts[i, vec.vocabulary_[g]] = c
    ref = TfidfTransformer(norm="l2", use_idf=True, smooth_idf=True, sublinear_tf=True).fit(counts)
    assert np.allclose(vec.idf_, ref.idf_)
    assert np.allclose(X.toarray(), ref.transform(counts).toarray())


def test_weights_equal_repeated_rows():
    seqs = [(1, 2, 3), (1, 3), (2, 2, 2, 4)]
    w = [3, 1, 2]
    a = NgramVectorizer(2).fit(seqs, sample_weight=w)
    b = NgramVectorizer(2).fit([s for s, k in zip(seqs, w) for _ in range(k)])
    assert a.vocabulary_ == b.vocabulary_ and np.allclose(a.idf_, b.idf_)


def test_unseen_ngrams_keep_their_weight_in_the_norm():
    vec = NgramVectorizer(2).fit([(1, 2), (1, 2, 2)])
    v = vec.vector((1, 9))
    assert set(v.unseen) == {(9,), (1, 9), (9, END)}
    assert np.isclose(float(v.values @ v.values) + v.unseen_mass, 1.0)
    assert 0.5 < v.unseen_mass < 1.0
    w = vec.vector((1, 2))
    assert w.unseen_mass == 0.0 and np.isclose(float(w.values @ w.values), 1.0)


def test_persistence_round_trip():
    vec = NgramVectorizer(3).fit([(1, 2, 3), (3, 2, 1, 1)])
    back = NgramVectorizer.from_arrays(3, vec.to_arrays())
    assert back.vocabulary_ == vec.vocabulary_ and np.array_equal(back.idf_, vec.idf_)
    bad = vec.to_arrays()
    bad["vocab_ngrams"][1] = bad["vocab_ngrams"][0]  # a repeated n-gram
    with pytest.raises(ValueError, match="repeats"):
        NgramVectorizer.from_arrays(3, bad)
    bad["vocab_ngrams"][1] = [1, PAD, 2]  # padding inside an n-gram
    with pytest.raises(ValueError, match="not an n-gram"):
        NgramVectorizer.from_arrays(3, bad)


def test_the_storage_table_bounds_the_markers():
    # the stored vocabulary holds template ids ≥ 0 and the three markers, the least of them its bound
    row = next(a for a in ARRAYS if a.name == "vocab_ngrams")
    assert row.low == min(START, END, PAD) and row.high == "T"


def test_ngrams_of_fewer_than_min_support_sessions_are_not_learned():
    # by hand: (1, 2, 3) ten times, (1, 4, 3) twice; with min_support 3 the n-grams only the
    # second sequence has — (4), (1, 4), (4, 3), (START, 1, 4), (1, 4, 3), (4, 3, END) — stay out
    seqs, w = [(1, 2, 3), (1, 4, 3)], [10.0, 2.0]
    vec = NgramVectorizer(3, min_support=3).fit(seqs, sample_weight=w)
    assert not any(4 in gram for gram in vec.vocabulary_)
    assert len(vec.vocabulary_) == len(NgramVectorizer(3).fit(seqs[:1]).vocabulary_)
    rare = vec.vector((1, 4, 3))
    assert set(rare.unseen) == {(4,), (1, 4), (4, 3), (START, 1, 4), (1, 4, 3), (4, 3, END)}
    assert rare.unseen_mass > 0.5
    assert vec.vector((1, 2, 3)).unseen_mass == 0.0
    # every n-gram below the bar: the most supported ones (both sequences hold them) are kept,
    # never an empty vocabulary
    kept = NgramVectorizer(3, min_support=50).fit(seqs, sample_weight=w).vocabulary_
    assert set(kept) == {(1,), (3,), (START, 1), (3, END)}
