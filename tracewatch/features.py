"""Features: a session's event sequence becomes a vector of event n-gram weights.

Stage: sessions → **features** → scoring. The sequence is framed by start/end markers,
n-grams for n = 1..``ngram_max`` are counted, weighted by sublinear tf (1 + ln tf) × smooth
idf (ln((1 + n) / (1 + df)) + 1, as scikit-learn's ``TfidfTransformer``) and L2-normalised,
so distances are cosine distances. The vocabulary is frozen at fit; n-grams unseen at fit
keep their weight (with the idf of a never-seen term) in the norm and in a separate
``unseen_mass``, so they push a session away from every centre.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Sequence

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    import scipy.sparse as sp

START, END = -1, -2
NGram = tuple[int, ...]


def ngrams(seq: Sequence[int], n_max: int) -> Counter:
    """Counts of all 1..n_max-grams of ``seq`` framed by the START/END markers (which never
    stand alone as unigrams)."""
    framed = (START, *seq, END)
    counts = Counter(zip(framed[1:-1]))  # 1-tuples; zip of shifted copies counts in C
    for n in range(2, n_max + 1):
        counts.update(zip(*(framed[k:] for k in range(n))))
    return counts


class SessionVector:
    """One session's vector: sparse columns and weights over the vocabulary, plus the part
    that fell outside it."""

    __slots__ = ("indices", "values", "unseen", "unseen_mass")

    def __init__(self, indices: np.ndarray, values: np.ndarray, unseen: dict, unseen_mass: float):
        self.indices = indices
        self.values = values
        self.unseen = unseen  # n-gram -> weight, for n-grams outside the vocabulary
        self.unseen_mass = unseen_mass  # squared norm of that part (≤ 1)


class NgramVectorizer:
    """Event n-gram tf-idf vectoriser in the scikit-learn estimator shape.

    ``fit(sequences, sample_weight)`` learns ``vocabulary_`` (n-gram → column) and ``idf_``;
    a weight counts a sequence that many times, so distinct sequences can stand for many
    identical sessions.
    """

    def __init__(self, ngram_max: int = 3) -> None:
        self.ngram_max = ngram_max

    def fit(self, sequences: Sequence[Sequence[int]], sample_weight: Sequence[float] | None = None
            ) -> "NgramVectorizer":
        weights = np.ones(len(sequences)) if sample_weight is None else np.asarray(sample_weight, float)
        df: Counter = Counter()
        for seq, w in zip(sequences, weights):
            for gram in ngrams(seq, self.ngram_max):
                df[gram] += w
        grams = sorted(df, key=lambda g: (len(g), g))
        self.vocabulary_ = {g: i for i, g in enumerate(grams)}
        n = float(weights.sum())
        dfs = np.array([df[g] for g in grams], dtype=float)
        self.idf_ = np.log((1.0 + n) / (1.0 + dfs)) + 1.0
        self.unseen_idf_ = math.log(1.0 + n) + 1.0
        self.n_sessions_ = n
        return self

    def _check(self) -> None:
        if not hasattr(self, "vocabulary_"):
            raise RuntimeError("NgramVectorizer is not fitted yet; call fit first")

    def vector(self, seq: Sequence[int]) -> SessionVector:
        self._check()
        return self._vector(seq)

    def _vector(self, seq: Sequence[int]) -> SessionVector:
        vocab, idf = self.vocabulary_, self.idf_
        cols: list[int] = []
        tfs: list[float] = []
        unseen: dict = {}
        for gram, count in ngrams(seq, self.ngram_max).items():
            col = vocab.get(gram)
            if col is None:
                unseen[gram] = (1.0 + math.log(count)) * self.unseen_idf_
            else:
                cols.append(col)
                tfs.append(1.0 + math.log(count))
        indices = np.array(cols, dtype=np.int64)
        values = np.array(tfs) * idf[indices] if cols else np.zeros(0)
        unseen_sq = sum(v * v for v in unseen.values())
        norm = math.sqrt(float(values @ values) + unseen_sq) or 1.0
        values /= norm
        for gram in unseen:
            unseen[gram] /= norm
        return SessionVector(indices, values, unseen, unseen_sq / (norm * norm))

    def transform(self, sequences: Sequence[Sequence[int]]) -> tuple[sp.csr_matrix, np.ndarray]:
        """CSR matrix of in-vocabulary weights and the unseen mass of each row."""
        self._check()
        vecs = [self._vector(s) for s in sequences]
        return stack(vecs, len(self.vocabulary_)), np.array([v.unseen_mass for v in vecs])

    @property
    def grams_(self) -> list[NGram]:
        """The vocabulary's n-grams in column order."""
        self._check()
        cached = self.__dict__.get("_grams")
        if cached is None or len(cached) != len(self.vocabulary_):
            cached = self.__dict__["_grams"] = sorted(self.vocabulary_, key=self.vocabulary_.__getitem__)
        return cached

    def gram_text(self, gram: NGram, text_of) -> str:
        parts = ["(start)" if t == START else "(end)" if t == END else text_of(t) for t in gram]
        return " → ".join(parts)

    # persistence: n-grams as a padded int matrix
    def to_arrays(self) -> dict[str, np.ndarray]:
        self._check()
        grams = self.grams_
        mat = np.full((len(grams), self.ngram_max), -3, dtype=np.int64)
        for i, g in enumerate(grams):
            mat[i, : len(g)] = g
        return {"vocab_ngrams": mat, "idf": self.idf_,
                "idf_meta": np.array([self.unseen_idf_, self.n_sessions_])}

    @classmethod
    def from_arrays(cls, ngram_max: int, arrays) -> "NgramVectorizer":
        vec = cls(ngram_max)
        mat = arrays["vocab_ngrams"]
        vec.vocabulary_ = {tuple(int(t) for t in row if t != -3): i for i, row in enumerate(mat.tolist())}
        vec.idf_ = np.asarray(arrays["idf"], dtype=float)
        vec.unseen_idf_, vec.n_sessions_ = (float(x) for x in arrays["idf_meta"])
        return vec


def stack(vecs: Sequence[SessionVector], n_cols: int) -> sp.csr_matrix:
    """Session vectors as the rows of a CSR matrix (fitting and the knn scorer; scipy is
    imported here, so scoring with centres alone never loads it)."""
    import scipy.sparse as sp

    indptr = np.zeros(len(vecs) + 1, dtype=np.int64)
    np.cumsum([len(v.indices) for v in vecs], out=indptr[1:])
    indices = np.concatenate([v.indices for v in vecs]) if vecs else np.zeros(0, np.int64)
    data = np.concatenate([v.values for v in vecs]) if vecs else np.zeros(0)
    return sp.csr_matrix((data, indices, indptr), shape=(len(vecs), n_cols))
