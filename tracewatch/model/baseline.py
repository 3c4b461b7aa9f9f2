"""The baseline model: what normal sessions look like, and the one rule that judges a session.

Stage: features → **model** → alerts. :func:`fit_baseline` splits normal sessions into a fit
part and a held-out calibration part, vectorises the fit part (:class:`~tracewatch.model.estimators.NgramVectorizer`),
clusters it (:class:`~tracewatch.model.fit.ClusterModel`), fits the configured scorer plug-in
(tracewatch/model/score.py) and calibrates every source on its own held-out sessions
(:class:`~tracewatch.model.estimators.ConformalThreshold`). The fitted :class:`Baseline` holds
those parts; :meth:`Baseline.judge` is the one rule that flags a session, used by ``score``,
the daemon and the refit gates alike. It hands on verdicts to tracewatch/alerts/alert.py and
its arrays, through :data:`ARRAYS`, to the storage in tracewatch/baselines.py.
"""

from __future__ import annotations

import hashlib
from collections import Counter
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, NamedTuple

import numpy as np

from ..errors import BaselineError
from .arrays import Array
from .score import Result, Scorer, SessionScorer, make_scorer

if TYPE_CHECKING:
    from ..config import Config
    from ..features import NgramWeights, SessionVector
    from ..templates import TemplateTree
    from .calibrate import Calibration

# The estimators (and scikit-learn with them) are imported where a baseline is built or fitted,
# not with this module; a loaded baseline holds their plain fitted states (NgramWeights,
# Calibration), so scoring never imports scikit-learn.

MIN_SESSIONS = 10
FIT_BLOCK = 50_000  # distinct rows vectorised (and counted per cluster) at a time
POOLED = "*"  # the calibration of all sources pooled, for sources with too few sessions of their own
Seq = tuple[int, ...]

# The arrays every baseline keeps (the scorer adds its own: Scorer.arrays). Dimensions: V the
# vocabulary, G = ngram_max, K clusters, N distinct baseline sessions, T templates, S calibrated
# sources, H distinct session shapes of the baseline period; the others are lengths of flat arrays.
ARRAYS: tuple[Array, ...] = (
    Array("vocab_ngrams", "<i8", ("V", "G"), low=-3, high="T"),  # template ids; START, END, PAD: -1, -2, -3
    Array("idf", "<f8", ("V",), low=1.0, high=1e6),  # smooth idf ≥ 1
    Array("idf_meta", "<f8", ("2",), low=1.0, high=1e15),  # the unseen idf, the sessions fitted
    Array("centers", "<f8", ("K", "V"), low=0.0, high=1.0),  # means of non-negative unit vectors
    Array("cluster_weights", "<f8", ("K",), low=1e-12, high=1e15),
    Array("cluster_df", "<f4", ("K", "V"), low=0.0, high=1.0),
    Array("cluster_sources", "<i8", ("K",), names="sources"),
    Array("medoid_events", "<i8", ("Em",), low=0, high="T"),
    Array("medoid_offsets", "<i8", ("K+1",), offsets_of="medoid_events"),
    Array("normal_events", "<i8", ("En",), low=0, high="T"),
    Array("normal_offsets", "<i8", ("N+1",), offsets_of="normal_events"),
    Array("normal_labels", "<i8", ("N",), low=0, high="K"),
    Array("normal_sources", "<i8", ("N",), names="sources"),
    # every distinct (source, sequence) of the baseline period, as a 64-bit hash (shape_hash),
    # sorted, and how many of its sessions had it — calibration and set-aside ones included
    Array("shape_hashes", "<i8", ("H",)),
    Array("shape_counts", "<f8", ("H",), low=1.0, high=1e15),
    Array("calibration_sources", "<i8", ("S",), names="sources"),
    Array("calibration_scores", "<f8", ("C",), low=0.0, high=1e12),
    Array("calibration_offsets", "<i8", ("S+1",), offsets_of="calibration_scores"),
    Array("calibration_novelty", "<f8", ("S",), low=0.0, high=1.0),  # share holding a template new to the fit part
)


def storage_table(scorer: Scorer) -> tuple[Array, ...]:
    """The storage table of a baseline with this scorer: :data:`ARRAYS`, then the scorer's own."""
    return ARRAYS + scorer.arrays


class Judgement(NamedTuple):
    """What :meth:`Baseline.judge` says of each session."""

    results: list[Result]  # (score, cluster, distance to its centre, unseen share)
    p_values: np.ndarray  # conformal p-values against the session's source
    far: np.ndarray  # p ≤ false_alarm_rate
    unseen: np.ndarray  # holds a never-seen event that raises an alert by itself (Baseline.judge)

    @property
    def flagged(self) -> np.ndarray:
        return self.far | self.unseen


class Baseline:
    """A fitted baseline: the template miner, the vectoriser, the clusters (centres, weights,
    each n-gram's share of a cluster's sessions, the source each belongs to, representative
    sessions), the distinct baseline sessions (their cluster and source), the scorer plug-in and
    one conformal threshold per source. Made by :func:`fit_baseline` or by loading
    (tracewatch/baselines.py); ``version`` is set when it is saved or loaded."""

    def __init__(self, *, miner: TemplateTree, vectorizer: NgramWeights, centers: np.ndarray,
                 cluster_weights: np.ndarray, cluster_df: np.ndarray, cluster_sources: list[str],
                 medoids: list[Seq], normal_seqs: list[Seq], normal_labels: np.ndarray,
                 normal_sources: list[str], scorer: Scorer, calibration: dict[str, Calibration],
                 report: dict, version: str = "unsaved", novelty: dict[str, float] | None = None,
                 shapes: tuple[np.ndarray, np.ndarray] | None = None) -> None:
        self.miner = miner
        self.vectorizer = vectorizer
        self.centers = centers
        self.cluster_weights = cluster_weights
        self.cluster_df = cluster_df
        self.cluster_sources = cluster_sources  # the source each cluster belongs to
        self.medoids = medoids
        self.normal_seqs = normal_seqs  # distinct fit sequences
        self.normal_labels = normal_labels  # their cluster
        self.normal_sources = normal_sources  # their source
        # every shape of the baseline period: sorted hashes and their session counts
        self.shapes = shapes if shapes is not None else (np.zeros(0, np.int64), np.zeros(0))
        self.scorer = scorer
        # one split-conformal threshold per source (POOLED: all sources, for sources that had too
        # few calibration sessions): each source keeps its own false-alarm rate
        self.calibration = calibration
        # per calibration source: the share of its held-out sessions holding a template no fit
        # session had — how often normal traffic brings new templates
        self.novelty = novelty if novelty is not None else {}
        self.report = report
        self.version = version
        self._normal_matrix = None  # the distinct baseline sessions' vectors (closest_normal)
        self._rows_of: dict[str, np.ndarray] = {}

    @property
    def false_alarm_rate(self) -> float:
        return self.calibration[POOLED].false_alarm_rate

    def settings_drift(self, cfg: Config) -> list[tuple[str, object, object]]:
        """``(key, fitted with, config now)`` for each [features] / [model] setting of ``cfg``
        that differs from what this baseline was fitted with (the fit report's ``settings``;
        for a baseline saved without them, what the baseline itself holds)."""
        fitted = {"features.ngram_max": self.vectorizer.ngram_max, "model.false_alarm_rate": self.false_alarm_rate,
                  "model.scorer": self.scorer.name, **{f"model.{k}": v for k, v in self.scorer.get_params().items()},
                  **self.report.get("settings", {})}
        now = fit_settings(cfg)
        return [(key, fitted[key], now[key]) for key in now if key in fitted and fitted[key] != now[key]]

    def conformal(self, source: str) -> Calibration:
        """The calibration of ``source`` (or the pooled one when it had too few sessions)."""
        own = self.calibration.get(source)
        return own if own is not None and own.usable_ else self.calibration[POOLED]

    def novelty_rate(self, source: str) -> float:
        """How often normal sessions of ``source`` bring a new template (the pooled rate where
        the source had too few calibration sessions of its own, as :meth:`conformal`)."""
        own = self.calibration.get(source)
        return self.novelty.get(source if own is not None and own.usable_ else POOLED, 0.0)

    def make_scorer(self) -> SessionScorer:
        """A scorer with its own cache (one per pipeline)."""
        return SessionScorer(self.vectorizer, self.centers, self.scorer, cluster_sources=self.cluster_sources,
                             row_sources=self.normal_sources)

    def judge(self, scorer: SessionScorer, sources: Sequence[str], seqs: Sequence[Seq]) -> Judgement:
        """Score non-empty sessions, each source against its own clusters and calibration. A
        session is flagged when it is far from the baseline (p ≤ false_alarm_rate) or holds an
        event the baseline never saw, weighed by its severity: a never-seen template logged at
        error level or worse always raises an alert; a milder one (or one without a level)
        raises one by itself only where normal traffic brings new templates at most as often
        as the false-alarm rate — on a drifting source (the calibration part held templates
        the fit part never had, in more than that share of its sessions) such a session is
        judged by its p-value alone, where the unseen n-grams already count, so the asked rate
        holds."""
        rows: dict[str, list[int]] = {}
        for i, source in enumerate(sources):
            rows.setdefault(source, []).append(i)
        results: list = [None] * len(seqs)
        p_values = np.empty(len(seqs))
        for source, idx in rows.items():
            for i, res in zip(idx, scorer.score(source, [seqs[i] for i in idx])):
                results[i] = res
            p_values[idx] = self.conformal(source).p_values([results[i][0] for i in idx])
        return Judgement(results, p_values, p_values <= self.false_alarm_rate, self._novel(sources, seqs))

    def _novel(self, sources: Sequence[str], seqs: Sequence[Seq]) -> np.ndarray:
        """Which sessions' never-seen events raise an alert by themselves (see :meth:`judge`)."""
        from ..templates import SEVERE

        templates, n_seen, rate = self.miner.templates, self.miner.n_seen, self.false_alarm_rate
        out = np.zeros(len(seqs), dtype=bool)
        for i, seq in enumerate(seqs):
            if max(seq) < n_seen:
                continue
            # an index past the miner's templates (a refit gate's template id this baseline
            # does not know) has no level: it counts as severe, as every unseen event used to
            out[i] = self.novelty_rate(sources[i]) <= rate or any(
                e >= len(templates) or templates[e].severity >= SEVERE for e in seq if e >= n_seen)
        return out

    def closest_normal(self, vec: SessionVector, source: str) -> tuple[Seq, int]:
        """The distinct baseline session of ``source`` (of any source when it has none) nearest a
        session vector in plain cosine distance, and its cluster: the workflow an alert is
        explained against. Plain distance, not distance over a cluster's spread, which would send
        a session far from everything to the widest cluster. The baseline sessions are
        vectorised on first use: only alerts ask."""
        import scipy.sparse as sp

        if self._normal_matrix is None:  # unit rows: a session's n-grams too rare to learn left out
            m = sp.vstack([self.vectorizer.transform(self.normal_seqs[lo:lo + FIT_BLOCK])[0]
                           for lo in range(0, len(self.normal_seqs), FIT_BLOCK)], format="csr")
            norms = np.sqrt(np.asarray(m.multiply(m).sum(axis=1)).ravel())
            self._normal_matrix = (sp.diags(1.0 / np.where(norms > 0, norms, 1.0)) @ m).tocsr()
        rows = self._rows_of.get(source)
        if rows is None:
            own = np.flatnonzero(np.asarray(self.normal_sources, dtype=object) == source)
            rows = self._rows_of[source] = own if len(own) else np.arange(len(self.normal_seqs))
        if len(vec.indices) == 0:  # nothing in common with any baseline session
            r = int(rows[0])
        else:
            dense = np.zeros(self.centers.shape[1])
            dense[vec.indices] = vec.values
            r = int(rows[int(np.argmax(self._normal_matrix[rows] @ dense))])
        return self.normal_seqs[r], int(self.normal_labels[r])

    def times_seen(self, source: str, seq: Seq) -> int:
        """How many sessions of the baseline period (of ``source``) had exactly these steps."""
        hashes, counts = self.shapes
        h = shape_hash(source, seq)
        i = int(np.searchsorted(hashes, h))
        return int(counts[i]) if i < len(hashes) and hashes[i] == h else 0

    @property
    def period_sessions(self) -> int:
        """The sessions of the baseline period."""
        return int(self.shapes[1].sum())

    # -- the arrays of storage_table(self.scorer) -------------------------------------------
    def to_arrays(self) -> dict[str, object]:
        """Every array of :func:`storage_table` (names columns as lists of names)."""
        medoid_events, medoid_offsets = _flat(self.medoids)
        normal_events, normal_offsets = _flat(self.normal_seqs)
        cal = list(self.calibration.items())
        return {
            **self.vectorizer.to_arrays(),
            "centers": np.asarray(self.centers, dtype=np.float64),
            "cluster_weights": np.asarray(self.cluster_weights, dtype=np.float64),
            "cluster_df": np.asarray(self.cluster_df, dtype=np.float32),
            "cluster_sources": self.cluster_sources,
            "medoid_events": medoid_events, "medoid_offsets": medoid_offsets,
            "normal_events": normal_events, "normal_offsets": normal_offsets,
            "normal_labels": np.asarray(self.normal_labels, dtype=np.int64),
            "normal_sources": self.normal_sources,
            "shape_hashes": np.asarray(self.shapes[0], dtype=np.int64),
            "shape_counts": np.asarray(self.shapes[1], dtype=np.float64),
            "calibration_sources": [src for src, _ in cal],
            "calibration_scores": np.concatenate([c.calibration_scores_ for _, c in cal]).astype(np.float64),
            "calibration_offsets": np.cumsum([0] + [len(c.calibration_scores_) for _, c in cal]).astype(np.int64),
            "calibration_novelty": np.array([self.novelty.get(src, 0.0) for src, _ in cal], dtype=np.float64),
            **self.scorer.to_arrays(),
        }

    @classmethod
    def from_arrays(cls, arrays: Mapping[str, object], *, miner: TemplateTree, scorer: Scorer, ngram_max: int,
                    false_alarm_rate: float, report: dict, version: str) -> "Baseline":
        """The baseline :meth:`to_arrays` describes, from arrays already checked against the
        table (shapes, ranges, offsets); ValueError for what the table cannot say."""
        from ..features import NgramWeights
        from .calibrate import Calibration

        if not len(arrays["centers"]) or not len(arrays["normal_labels"]):
            raise ValueError("a baseline needs a cluster and a baseline session")
        cal_sources, scores = arrays["calibration_sources"], arrays["calibration_scores"]
        offsets = arrays["calibration_offsets"].tolist()
        if len(set(cal_sources)) != len(cal_sources) or POOLED not in cal_sources:
            raise ValueError("the calibration must name each source once and the pooled one")
        hashes = arrays["shape_hashes"]
        if np.any(hashes[1:] <= hashes[:-1]):  # compared, not subtracted: a difference of two int64 overflows
            raise ValueError("the session shapes must be sorted, each once")
        calibration = {src: Calibration(false_alarm_rate).calibrate(scores[a:b])
                       for src, a, b in zip(cal_sources, offsets, offsets[1:])}
        return cls(miner=miner, vectorizer=NgramWeights.from_arrays(ngram_max, arrays),
                   centers=arrays["centers"], cluster_weights=arrays["cluster_weights"],
                   cluster_df=arrays["cluster_df"], cluster_sources=arrays["cluster_sources"],
                   medoids=_unflat(arrays["medoid_events"], arrays["medoid_offsets"]),
                   normal_seqs=_unflat(arrays["normal_events"], arrays["normal_offsets"]),
                   normal_labels=arrays["normal_labels"], normal_sources=arrays["normal_sources"],
                   shapes=(arrays["shape_hashes"], arrays["shape_counts"]),
                   scorer=scorer.from_arrays(arrays), calibration=calibration, report=report, version=version,
                   novelty=dict(zip(cal_sources, arrays["calibration_novelty"].tolist())))


def shape_hash(source: str, seq: Seq) -> int:
    """A session shape (its source and event sequence) as a signed 64-bit hash."""
    h = hashlib.blake2b(source.encode("utf-8", "replace") + b"\x1f", digest_size=8)
    h.update(np.asarray(seq, dtype="<i8").tobytes())
    return int.from_bytes(h.digest(), "little", signed=True)


def _shapes(sessions: list[tuple[str, Seq]]) -> tuple[np.ndarray, np.ndarray]:
    """Every distinct shape of ``sessions`` as sorted hashes, and how many sessions had it."""
    counts = Counter({shape_hash(src, seq): n for (src, seq), n in Counter(sessions).items()})
    hashes = np.array(sorted(counts), dtype=np.int64)
    return hashes, np.array([counts[h] for h in hashes.tolist()], dtype=np.float64)


def _flat(seqs: list[Seq]) -> tuple[np.ndarray, np.ndarray]:
    offsets = np.zeros(len(seqs) + 1, dtype=np.int64)
    np.cumsum([len(s) for s in seqs], out=offsets[1:])
    flat = np.array([e for s in seqs for e in s], dtype=np.int64)
    return flat, offsets


def _unflat(flat: np.ndarray, offsets: np.ndarray) -> list[Seq]:
    items = flat.tolist()
    return [tuple(items[a:b]) for a, b in zip(offsets[:-1].tolist(), offsets[1:].tolist())]


# -- fitting -------------------------------------------------------------------------------
def fit_baseline(sessions: list[tuple[str, Seq]], miner: TemplateTree, cfg: Config,
                 keys: Sequence[str] | None = None) -> Baseline:
    """Fit on normal ``(source, event sequence)`` sessions (``keys``: their session keys, for the
    report): set aside probable incidents (:func:`_cross_fit`), split train / calibration,
    vectorise, cluster, fit the scorer, then calibrate each source on its own held-out
    sessions. Freezes ``miner``: templates made after this are unseen."""
    n = len(sessions)
    if n < MIN_SESSIONS:
        raise BaselineError(f"only {n} sessions found in the input; a baseline needs at least "
                            f"{MIN_SESSIONS} (check session_key and the input files)")
    mcfg = cfg.model
    rng = np.random.default_rng(mcfg.seed)
    suspects = _cross_fit(sessions, miner, cfg)
    order = np.array([i for i in rng.permutation(n) if i not in suspects], dtype=np.int64)
    n_cal = max(1, int(round(len(order) * mcfg.calibration_fraction)))
    cal_idx, train_idx = np.sort(order[:n_cal]), np.sort(order[n_cal:])
    baseline, model, distinct, weights = _build(sessions, train_idx, cal_idx, miner, cfg)
    baseline.shapes = _shapes(sessions)
    baseline.report = _report(baseline, model, cfg, n=n, n_train=len(train_idx), n_cal=n_cal,
                              distinct=distinct, weights=weights)
    baseline.report["probable_incidents"] = [
        {"session_key": keys[i] if keys is not None else f"#{i}", "source": sessions[i][0],
         "reason": reason} for i, reason in sorted(suspects.items())]
    miner.freeze()
    return baseline


CROSS_FOLDS = 5
CROSS_ROUNDS = 2  # a second pass, on what the first kept, finds incidents the first one's hid


def _cross_fit(sessions: list[tuple[str, Seq]], miner: TemplateTree, cfg: Config) -> dict[int, str]:
    """The baseline sessions that are probably incidents, each with a short reason.

    Cross-fitting (sample splitting): Chernozhukov et al., "Double/debiased machine learning
    for treatment and structural parameters", Econometrics Journal 2018; for conformal scores,
    Lei, G'Sell, Rinaldo, Tibshirani, Wasserman, "Distribution-free predictive inference for
    regression", JASA 2018. The sessions are dealt into :data:`CROSS_FOLDS` seeded folds; a
    model fitted on the other folds scores each fold, so no session is judged by a model that
    learnt it (an incident's own steps never count as seen). A held-out session's p-value is
    taken against the other folds' calibration scores with their top ``expected_bad_share``
    dropped (that share of the reference is presumed bad: left in, a 2% contamination alone
    would put every incident's p-value near 0.02). A session is set aside when its p-value is
    at most ``expected_bad_share / 10`` (on exchangeable normal sessions, about a tenth as many
    false exclusions as the expected incidents), and never below the smallest p-value the
    reference can give. A second pass on the sessions the first kept finds incidents that
    resembled others in the first pass's fitting folds. ``expected_bad_share = 0`` turns this off."""
    share = cfg.model.expected_bad_share
    found: dict[int, str] = {}
    if share <= 0 or len(sessions) < CROSS_FOLDS * 2 * MIN_SESSIONS:
        return found
    for rnd in range(CROSS_ROUNDS):
        new = _cross_fit_round(sessions, miner, cfg, found, rnd)
        if not new:
            break
        found.update(new)
    return found


def _cross_fit_round(sessions: list[tuple[str, Seq]], miner: TemplateTree, cfg: Config, skip: dict[int, str],
                     rnd: int) -> dict[int, str]:
    """One pass of :func:`_cross_fit` over the sessions not in ``skip``."""
    share = cfg.model.expected_bad_share
    rng = np.random.default_rng([cfg.model.seed, 1, rnd])
    folds = np.array_split(rng.permutation([i for i in range(len(sessions)) if i not in skip]), CROSS_FOLDS)
    found: dict[int, str] = {}
    fold_cfg = cfg.model_copy(update={"features": cfg.features.model_copy(update={"min_support": 1})})
    for f, held in enumerate(folds):
        rest = rng.permutation(np.concatenate([folds[g] for g in range(CROSS_FOLDS) if g != f]))
        n_cal = max(1, int(round(len(rest) * cfg.model.calibration_fraction)))
        model, *_ = _build(sessions, np.sort(rest[n_cal:]), np.sort(rest[:n_cal]), miner, fold_cfg)
        scorer = model.make_scorer()
        by_source: dict[str, list[int]] = {}
        for i in held.tolist():
            by_source.setdefault(sessions[i][0], []).append(i)
        for source, idx in by_source.items():
            ref = model.conformal(source).calibration_scores_
            ref = ref[:len(ref) - int(np.ceil(share * len(ref)))]  # sorted: the presumed bad top dropped
            cut = max(share / 10, 1 / (len(ref) + 1))
            scores = np.array([r[0] for r in scorer.score(source, [sessions[i][1] for i in idx])])
            p = (1.0 + len(ref) - np.searchsorted(ref, scores, side="left")) / (len(ref) + 1.0)
            top = float(ref[-1]) if len(ref) else 0.0
            for i, s, pv in zip(idx, scores.tolist(), p.tolist()):
                if pv <= cut:
                    found[i] = f"score {s:.3g} above every normal one of the other folds (max {top:.3g})"
    return found


def min_support(cfg: Config, n_sessions: float) -> float:
    """The fewest fit sessions an n-gram must be seen in to be learned, where the baseline is
    expected to hold incidents (``expected_bad_share`` > 0): ``[features] min_support``, but
    never more than the incidents expected among ``n_sessions`` nor than the smallest cluster
    the baseline learns (``min_cluster_share`` of them). A trusted baseline (share 0) learns
    every n-gram: measured on an 800-session baseline, leaving out those of fewer than 3
    sessions raised the threshold from 2.39 to 5.73 and missed every dropped step."""
    mcfg = cfg.model
    cap = min(mcfg.expected_bad_share, mcfg.min_cluster_share) * n_sessions
    return max(1.0, min(float(cfg.features.min_support), cap))


def _build(sessions: list[tuple[str, Seq]], train_idx: np.ndarray, cal_idx: np.ndarray, miner: TemplateTree,
           cfg: Config) -> tuple[Baseline, object, list[Seq], np.ndarray]:
    """Vectorise and cluster ``train_idx``, fit the scorer, calibrate on ``cal_idx``."""
    import scipy.sparse as sp

    from .estimators import NgramVectorizer
    from .fit import ClusterModel  # scikit-learn's clustering loads only when fitting

    mcfg = cfg.model
    counts = Counter(sessions[i] for i in train_idx)  # distinct (source, sequence) with counts
    row_sources = [src for src, _ in counts]
    distinct = [seq for _, seq in counts]
    weights = np.array(list(counts.values()), dtype=float)

    vectorizer = NgramVectorizer(cfg.features.ngram_max, min_support(cfg, float(weights.sum()))).fit(
        distinct, sample_weight=weights)
    # in blocks: a block's per-row vectors are garbage before the next is made
    X = sp.vstack([vectorizer.transform(distinct[lo:lo + FIT_BLOCK])[0]
                   for lo in range(0, len(distinct), FIT_BLOCK)], format="csr")
    model = ClusterModel(mcfg.k, mcfg.k_max, mcfg.restarts, mcfg.min_cluster_share, mcfg.seed,
                         streaming=mcfg.streaming, streaming_rows=mcfg.streaming_rows).fit(X, sample_weight=weights)
    labels = model.labels_
    keep = np.flatnonzero(labels >= 0)
    X_kept = X if len(keep) == X.shape[0] else X[keep]
    scorer = make_scorer(mcfg.scorer, mcfg).fit(X_kept, labels[keep], weights[keep], clusters=model)
    baseline = Baseline(
        miner=miner, vectorizer=vectorizer, centers=model.cluster_centers_, cluster_weights=model.cluster_weights_,
        cluster_df=_cluster_df(X, labels, weights, model), cluster_sources=_owners(labels, weights, row_sources, model),
        medoids=[distinct[r] for r in model.medoids_], normal_seqs=[distinct[r] for r in keep],
        normal_labels=labels[keep], normal_sources=[row_sources[r] for r in keep], scorer=scorer,
        calibration={}, report={})
    _calibrate(baseline, [sessions[i] for i in cal_idx], mcfg.false_alarm_rate, {e for seq in distinct for e in seq})
    return baseline, model, distinct, weights


def _cluster_df(X, labels: np.ndarray, weights: np.ndarray, model) -> np.ndarray:
    """The weighted share of each cluster's sessions holding each n-gram (float32, K × V)."""
    import scipy.sparse as sp

    keep = np.flatnonzero(labels >= 0)
    k = len(model.cluster_centers_)
    onehot = sp.csr_matrix((weights[keep], (keep, labels[keep])), shape=(X.shape[0], k))
    df = np.zeros((k, X.shape[1]))
    for lo in range(0, X.shape[0], FIT_BLOCK):
        block = X[lo:lo + FIT_BLOCK]
        present = sp.csr_matrix((np.ones_like(block.data), block.indices, block.indptr), shape=block.shape)
        df += (onehot[lo:lo + FIT_BLOCK].T @ present).toarray()
    return (df / model.cluster_weights_[:, None]).astype(np.float32)


def _owners(labels: np.ndarray, weights: np.ndarray, row_sources: list[str], model) -> list[str]:
    """The source each cluster belongs to: the one most of its sessions come from."""
    by_source: Counter = Counter()
    for r in np.flatnonzero(labels >= 0):
        by_source[(int(labels[r]), row_sources[r])] += weights[r]
    return [max((w, src) for (c, src), w in by_source.items() if c == cl)[1]
            for cl in range(len(model.cluster_centers_))]


def _calibrate(baseline: Baseline, held_out: list[tuple[str, Seq]], rate: float, fitted: set[int]) -> None:
    """One threshold per source from its own held-out sessions, and the pooled one; and how
    often those sessions hold a template none of the ``fitted`` sessions had (the novelty rate)."""
    from .estimators import ConformalThreshold

    scorer = baseline.make_scorer()
    by_source: dict[str, list[Seq]] = {}
    for source, seq in held_out:
        by_source.setdefault(source, []).append(seq)
    calibration = baseline.calibration
    for source in sorted(by_source):
        scores = [r[0] for r in scorer.score(source, by_source[source])]
        calibration[source] = ConformalThreshold(rate).fit(scores)
    calibration[POOLED] = ConformalThreshold(rate).fit(
        np.concatenate([c.calibration_scores_ for c in calibration.values()]))
    novel = {source: [not fitted.issuperset(seq) for seq in seqs] for source, seqs in by_source.items()}
    baseline.novelty = {source: float(np.mean(flags)) for source, flags in novel.items()}
    baseline.novelty[POOLED] = float(np.mean([f for flags in novel.values() for f in flags]))


def fit_settings(cfg: Config) -> dict:
    """The config settings a fit depends on, as dotted keys: every [features] and [model] key."""
    return {**{f"features.{k}": v for k, v in cfg.features.model_dump().items()},
            **{f"model.{k}": v for k, v in cfg.model.model_dump().items()}}


def drift_warning(baseline: Baseline, cfg: Config) -> str | None:
    """One line naming the settings that differ between the config and the baseline, or None."""
    drift = baseline.settings_drift(cfg)
    if not drift:
        return None
    keys = ", ".join(f"{key} {fitted!r} (config: {now!r})" for key, fitted, now in drift)
    return (f"warning: baseline {baseline.version} was fitted with other settings than the config's: {keys}; "
            "it scores with its own — fit again to apply the config's")


def _report(b: Baseline, model, cfg: Config, *, n: int, n_train: int, n_cal: int, distinct: list[Seq],
            weights: np.ndarray) -> dict:
    """The fit report (kept in the manifest; `tracewatch fit` and `baselines show` print it)."""
    mcfg, text = cfg.model, b.miner.text
    k = len(model.cluster_centers_)
    report = {
        "sessions": n,
        "train_sessions": int(n_train),
        "calibration_sessions": int(n_cal),
        "distinct_sequences": len(distinct),
        "templates": len(b.miner.templates),
        "ngrams": len(b.vectorizer.vocabulary_),
        "k": int(model.k_),
        "k_auto": mcfg.k == "auto",
        "streaming": model.streaming_,
        "knee": int(model.knee_),
        "curve": model.curve_,
        "notes": list(model.notes_),
        "clusters": [
            {"cluster": c, "sessions": int(model.cluster_weights_[c]),
             "spread": round(float(model.spreads_[c]), 4),
             "representative": [text(e) for e in b.medoids[c]]}
            for c in range(k)
        ],
        "contamination": [
            {"sessions": item["sessions"], "share": round(item["share"], 5),
             "representative": [text(e) for e in distinct[max(item["rows"], key=lambda r: weights[r])]]}
            for item in model.contamination_
        ],
        "thresholds": {src: {"threshold": c.threshold_ if c.usable_ else None,
                             "calibration_sessions": len(c.calibration_scores_),
                             "new_template_share": round(b.novelty.get(src, 0.0), 5)}
                       for src, c in b.calibration.items()},
        "false_alarm_rate": mcfg.false_alarm_rate,
        "scorer": mcfg.scorer,
        "unseen_weight": mcfg.unseen_weight,
        "settings": fit_settings(cfg),
    }
    need = int(np.ceil(1 / mcfg.false_alarm_rate)) - 1
    # a conformal p-value is at least 1/(n+1): no rate below that can come from distance alone
    report["lowest_false_alarm_rate"] = round(1 / (n_cal + 1), 6)
    if mcfg.false_alarm_rate * (n_cal + 1) < 1 - 1e-9:  # the test ConformalThreshold.fit makes
        report["notes"].append(
            f"false_alarm_rate={mcfg.false_alarm_rate} is below the lowest rate {n_cal} calibration sessions "
            f"can give (1/{n_cal + 1} = {1 / (n_cal + 1):.4g}), so only never-seen events raise alerts: "
            f"fit on at least {need} calibration sessions (more baseline sessions, or a higher "
            f"calibration_fraction than {mcfg.calibration_fraction})")
    for src, share in b.novelty.items():
        if src != POOLED and share > mcfg.false_alarm_rate:
            report["notes"].append(
                f"source {src!r} brings new templates in {share:.2%} of its normal sessions, more often than "
                f"false_alarm_rate={mcfg.false_alarm_rate}: a new template there alerts by itself only when "
                f"logged at error level or worse; others are judged by their score")
    for src, c in b.calibration.items():
        if c.usable_:
            continue
        if src != POOLED:  # the pooled one: the note on the lowest rate above
            report["notes"].append(
                f"source {src!r} has {len(c.calibration_scores_)} calibration sessions, fewer than the "
                f"{need} its own threshold needs; it uses the threshold of all sources pooled")
    return report
