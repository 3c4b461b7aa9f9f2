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
import numbers
from collections import Counter
from collections.abc import Mapping, Sequence

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    import scipy.sparse as sp

START, END = -1, -2
PAD = -3  # fills an n-gram's row of the stored vocabulary beyond its length
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


class NgramWeights:
    """Fitted event n-gram tf-idf weights: what scoring needs, with numpy alone.

    ``count(X, sample_weight)`` on event sequences (``X``: sequences of template indices)
    learns ``vocabulary_`` (n-gram → column), ``idf_``, ``unseen_idf_`` (the idf of an n-gram
    never seen) and ``n_sessions_``; a weight counts a sequence that many times, so distinct
    sequences can stand for many identical sessions. N-grams found in fewer than
    ``min_support`` sessions stay out of the vocabulary: to a new session they are unseen.
    The scikit-learn estimator over it is :class:`tracewatch.model.estimators.NgramVectorizer`
    (fit uses it); a baseline loaded for scoring holds this class, so scoring never imports
    scikit-learn (about 1 s of start-up).
    """

    def __init__(self, ngram_max: int = 3, min_support: float = 1.0) -> None:
        self.ngram_max = ngram_max
        self.min_support = min_support

    def count(self, X: Sequence[Sequence[int]], sample_weight: Sequence[float] | None = None) -> "NgramWeights":
        """Learn the vocabulary and idf of ``X`` (checked: event sequences, one weight each)."""
        if not isinstance(self.ngram_max, numbers.Integral) or self.ngram_max < 1:
            raise ValueError(f"ngram_max must be a whole number of at least 1, not {self.ngram_max!r}")
        _check_sequences(X)
        weights = np.ones(len(X)) if sample_weight is None else np.asarray(sample_weight, float)
        if weights.shape != (len(X),):
            raise ValueError(f"sample_weight has shape {weights.shape}, expected ({len(X)},)")
        df: Counter = Counter()
        for seq, w in zip(X, weights):
            for gram in ngrams(seq, self.ngram_max):
                df[gram] += w
        # an n-gram of fewer than min_support sessions is weak evidence of normality (a few
        # copies of an incident look like that too): it is left out, so it counts as unseen
        least = min(self.min_support, max(df.values()))
        grams = sorted((g for g, d in df.items() if d >= least), key=lambda g: (len(g), g))
        self.vocabulary_ = {g: i for i, g in enumerate(grams)}
        n = float(weights.sum())
        dfs = np.array([df[g] for g in grams], dtype=float)
        self.idf_ = np.log((1.0 + n) / (1.0 + dfs)) + 1.0
        self.unseen_idf_ = math.log(1.0 + n) + 1.0
        self.n_sessions_ = n
        return self

    def vector(self, seq: Sequence[int]) -> SessionVector:
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

    def transform(self, X: Sequence[Sequence[int]]) -> tuple[sp.csr_matrix, np.ndarray]:
        """CSR matrix of in-vocabulary weights and the unseen mass of each row."""
        vecs = [self.vector(s) for s in X]
        return stack(vecs, len(self.vocabulary_)), np.array([v.unseen_mass for v in vecs])

    @property
    def grams_(self) -> list[NGram]:
        """The vocabulary's n-grams in column order."""
        cached = self.__dict__.get("_grams")
        if cached is None or len(cached) != len(self.vocabulary_):
            cached = self.__dict__["_grams"] = sorted(self.vocabulary_, key=self.vocabulary_.__getitem__)
        return cached

    def gram_text(self, gram: NGram, text_of) -> str:
        parts = ["(start)" if t == START else "(end)" if t == END else text_of(t) for t in gram]
        return " → ".join(parts)

    # persistence: the n-grams as rows of an int matrix padded with PAD (tracewatch/model/baseline.py
    # lists these arrays in the storage table)
    def to_arrays(self) -> dict[str, np.ndarray]:
        grams = self.grams_
        mat = np.full((len(grams), self.ngram_max), PAD, dtype=np.int64)
        for i, g in enumerate(grams):
            mat[i, : len(g)] = g
        return {"vocab_ngrams": mat, "idf": self.idf_, "idf_meta": np.array([self.unseen_idf_, self.n_sessions_])}

    @classmethod
    def from_arrays(cls, ngram_max: int, arrays: Mapping[str, np.ndarray]) -> "NgramWeights":
        """The fitted vectoriser :meth:`to_arrays` describes; ValueError when the n-gram rows are
        not n-grams (padding inside, markers in the middle) or repeat one another."""
        vec = cls(ngram_max)
        rows = arrays["vocab_ngrams"].tolist()
        vocab: dict[NGram, int] = {}
        for i, row in enumerate(rows):
            gram = tuple(t for t in row if t != PAD)
            if (not gram or PAD in row[: len(gram)] or START in gram[1:] or END in gram[:-1]
                    or (len(gram) == 1 and gram[0] < 0)):
                raise ValueError(f"vocabulary row {i} is not an n-gram")
            vocab[gram] = i
        if len(vocab) != len(rows):
            raise ValueError("the vocabulary repeats an n-gram")
        vec.vocabulary_ = vocab
        vec.idf_ = np.asarray(arrays["idf"], dtype=float)
        vec.unseen_idf_, vec.n_sessions_ = (float(x) for x in arrays["idf_meta"])
        return vec


def _check_sequences(X) -> None:
    """``X`` must be event sequences: sequences of whole numbers (template indices)."""
    what = "X must be event sequences (sequences of template indices)"
    if isinstance(X, np.ndarray) and X.dtype.kind not in "iuO":
        raise ValueError(f"{what}, not an array of {X.dtype}")
    if hasattr(X, "tocsr") or isinstance(X, (str, bytes, Mapping)) or not hasattr(X, "__len__"):
        raise ValueError(f"{what}, not a {type(X).__name__}")
    if len(X) == 0:
        raise ValueError("no event sequences to fit")
    for seq in X:
        if isinstance(seq, (str, bytes, Mapping)) or not all(isinstance(e, (int, np.integer)) for e in seq):
            raise ValueError(f"{what}; found {type(seq).__name__} {str(seq)[:40]}")


def stack(vecs: Sequence[SessionVector], n_cols: int) -> sp.csr_matrix:
    """Session vectors as the rows of a CSR matrix (fitting and the knn scorer; scipy is
    imported here, so scoring with centres alone never loads it)."""
    import scipy.sparse as sp

    indptr = np.zeros(len(vecs) + 1, dtype=np.int64)
    np.cumsum([len(v.indices) for v in vecs], out=indptr[1:])
    indices = np.concatenate([v.indices for v in vecs]) if vecs else np.zeros(0, np.int64)
    data = np.concatenate([v.values for v in vecs]) if vecs else np.zeros(0)
    return sp.csr_matrix((data, indices, indptr), shape=(len(vecs), n_cols))
