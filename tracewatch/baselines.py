"""Baselines: fit the model on normal sessions; save, load and version the artifact.

A baseline is a directory ``<state_dir>/baselines/vNNNN/`` holding ``manifest.json`` (schema
version, parameters, the fit report, a sha256 of every other file and a content hash),
``templates.json`` (the template miner) and ``model.npz`` (numbers only, loaded with
``allow_pickle=False``). ``<state_dir>/baselines/CURRENT`` names the version in use. Loading
never executes code; a corrupt, foreign or newer-schema artifact is a clear error.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import tempfile
import time
import zipfile
from collections import Counter
from collections.abc import Sequence
from functools import cached_property
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import orjson
from pydantic import BaseModel, ConfigDict, ValidationError

from . import __version__
from .config import Config
from .errors import BaselineError, NoBaselineError, StateError
from .fs import atomic_write
from .features import NgramVectorizer
from .model.calibrate import ConformalThreshold
from .model.score import SessionScorer
from .templates import TemplateTree

if TYPE_CHECKING:
    import scipy.sparse as sp

SCHEMA_VERSION = 3  # 2: templates masked to <var>; 3: the template tree's settings renamed
MIN_SESSIONS = 10
FIT_BLOCK = 50_000  # distinct rows vectorised (and counted per cluster) at a time
POOLED = "*"


class Manifest(BaseModel):
    model_config = ConfigDict(extra="allow")

    schema_version: int
    kind: str
    version: str
    created: str
    content_hash: str
    files: dict[str, str]
    ngram_max: int
    scorer: str
    knn_k: int
    unseen_weight: float
    false_alarm_rate: float
    calibration_sources: list[str]
    sources: list[str]
    report: dict


class Baseline:
    """A fitted baseline: templates, vectoriser, clusters, calibration."""

    def __init__(self, *, miner: TemplateTree, vectorizer: NgramVectorizer, centers: np.ndarray,
                 spreads: np.ndarray, cluster_weights: np.ndarray, cluster_df: np.ndarray,
                 medoids: list[tuple[int, ...]], normal_seqs: list[tuple[int, ...]],
                 normal_labels: np.ndarray, cluster_sources: list[str], normal_sources: list[str], calibration: dict[str, ConformalThreshold], scorer: str,
                 knn_parts: tuple, knn_k: int, unseen_weight: float, report: dict,
                 version: str = "unsaved") -> None:
        self.unseen_weight = unseen_weight
        self.miner = miner
        self.vectorizer = vectorizer
        self.centers = centers
        self.spreads = spreads
        self.cluster_weights = cluster_weights
        self.cluster_df = cluster_df
        self.medoids = medoids
        self.normal_seqs = normal_seqs  # distinct fit sequences, one per row of knn_parts
        self.normal_labels = normal_labels  # their cluster
        self.cluster_sources = cluster_sources  # the source each cluster belongs to
        self.normal_sources = normal_sources  # the source of each distinct fit sequence
        self._by_cluster: dict[int, tuple[np.ndarray, ...]] = {}
        # one split-conformal threshold per source ("*": all sources pooled, for sources that
        # had no calibration sessions): each source keeps its own false-alarm rate
        self.calibration = calibration
        self.scorer_kind = scorer
        self.knn_parts = knn_parts  # (data, indices, indptr, shape): their vectors as CSR parts
        self.knn_k = knn_k
        self.report = report
        self.version = version

    @property
    def false_alarm_rate(self) -> float:
        return self.calibration[POOLED].false_alarm_rate

    def conformal(self, source: str) -> ConformalThreshold:
        """The calibration of ``source`` (or the pooled one when it had too few sessions)."""
        own = self.calibration.get(source)
        return own if own is not None and own.usable_ else self.calibration[POOLED]

    @cached_property
    def knn_rows(self) -> sp.csr_matrix:
        """The distinct fit sessions' vectors, one row each, as a CSR matrix. Built (and scipy
        imported) on first use: scoring against centres never needs it."""
        import scipy.sparse as sp

        data, indices, indptr, shape = self.knn_parts
        return sp.csr_matrix((data, indices, indptr), shape=shape)

    def closest_normal(self, vec, cluster: int) -> tuple[int, ...]:
        """The distinct baseline session of ``cluster`` closest to a session vector."""
        cached = self._by_cluster.get(cluster)
        if cached is None:
            rows = np.flatnonzero(self.normal_labels == cluster)
            data, indices, indptr, _ = self.knn_parts
            sizes = indptr[rows + 1] - indptr[rows]
            # positions of the cluster's rows' entries, and the row (0..len(rows)) of each
            take = np.repeat(indptr[rows] - (np.cumsum(sizes) - sizes), sizes) + np.arange(int(sizes.sum()))
            filled = sizes > 0
            starts = (np.cumsum(sizes) - sizes)[filled]  # of the cluster's rows in data[take]
            cached = self._by_cluster[cluster] = (rows, data[take], indices[take], filled, starts)
        rows, data, indices, filled, starts = cached
        if not filled.any() or len(vec.indices) == 0:
            return self.medoids[cluster]
        dense = np.zeros(self.centers.shape[1])
        dense[vec.indices] = vec.values
        dots = np.zeros(len(rows))
        dots[filled] = np.add.reduceat(data * dense[indices], starts)  # row sums of the products
        return self.normal_seqs[int(rows[int(np.argmax(dots))])]

    def make_scorer(self) -> SessionScorer:
        return SessionScorer(self.vectorizer, self.centers, self.spreads, self.scorer_kind,
                             self.knn_rows if self.scorer_kind == "knn" else None, self.knn_k,
                             self.unseen_weight, cluster_sources=self.cluster_sources,
                             row_sources=self.normal_sources)

    def judge(self, scorer: SessionScorer, sources: Sequence[str], seqs: Sequence[tuple[int, ...]]
              ) -> tuple[list[tuple[float, int, float, float]], np.ndarray, np.ndarray, np.ndarray]:
        """Score non-empty sessions, each source against its own clusters and calibration:
        ``scorer``'s results, the conformal p-values, ``far`` (p ≤ false_alarm_rate) and
        ``unseen`` (holds an event this baseline never saw). A session is flagged when either."""
        rows: dict[str, list[int]] = {}
        for i, source in enumerate(sources):
            rows.setdefault(source, []).append(i)
        results: list = [None] * len(seqs)
        p_values = np.empty(len(seqs))
        for source, idx in rows.items():
            for i, res in zip(idx, scorer.score(source, [seqs[i] for i in idx])):
                results[i] = res
            p_values[idx] = self.conformal(source).p_values([results[i][0] for i in idx])
        n_seen = self.miner.n_seen
        unseen = np.fromiter((max(s) >= n_seen for s in seqs), dtype=bool, count=len(seqs))
        return results, p_values, p_values <= self.false_alarm_rate, unseen


# -- fitting -------------------------------------------------------------------------------
def fit_baseline(sessions: list[tuple[str, tuple[int, ...]]], miner: TemplateTree, cfg: Config) -> Baseline:
    """Fit on normal ``(source, event sequence)`` sessions: split train / calibration,
    vectorise, cluster, then calibrate each source on its own held-out sessions."""
    import scipy.sparse as sp

    from .model.fit import ClusterModel  # scikit-learn loads only when fitting (≈1 s at start-up)

    sequences = [seq for _, seq in sessions]
    n = len(sequences)
    if n < MIN_SESSIONS:
        raise BaselineError(f"only {n} sessions found in the input; a baseline needs at least "
                            f"{MIN_SESSIONS} (check session_key and the input files)")
    mcfg = cfg.model
    rng = np.random.default_rng(mcfg.seed)
    n_cal = max(1, int(round(n * mcfg.calibration_fraction)))
    order = rng.permutation(n)
    cal_idx, train_idx = np.sort(order[:n_cal]), np.sort(order[n_cal:])
    counts = Counter(sessions[i] for i in train_idx)  # distinct (source, sequence) with counts
    row_sources = [src for src, _ in counts]
    distinct = [seq for _, seq in counts]
    weights = np.array(list(counts.values()), dtype=float)

    vectorizer = NgramVectorizer(cfg.features.ngram_max).fit(distinct, weights)
    # in blocks: a block's per-row vectors are garbage before the next is made
    X = sp.vstack([vectorizer.transform(distinct[lo:lo + FIT_BLOCK])[0]
                   for lo in range(0, len(distinct), FIT_BLOCK)], format="csr")
    model = ClusterModel(mcfg.k, mcfg.k_max, mcfg.restarts, mcfg.min_cluster_share, mcfg.seed,
                         streaming=mcfg.streaming, streaming_rows=mcfg.streaming_rows).fit(X, weights)

    labels = model.labels_
    keep_rows = np.flatnonzero(labels >= 0)
    k = len(model.cluster_centers_)
    onehot = sp.csr_matrix((weights[keep_rows], (keep_rows, labels[keep_rows])), shape=(len(distinct), k))
    cluster_df = np.zeros((k, X.shape[1]))  # weighted share of each cluster's sessions holding each n-gram
    for lo in range(0, X.shape[0], FIT_BLOCK):
        block = X[lo:lo + FIT_BLOCK]
        present = sp.csr_matrix((np.ones_like(block.data), block.indices, block.indptr), shape=block.shape)
        cluster_df += (onehot[lo:lo + FIT_BLOCK].T @ present).toarray()
    cluster_df /= model.cluster_weights_[:, None]
    medoids = [distinct[r] for r in model.medoids_]
    # each cluster belongs to the source most of its sessions come from
    by_source = Counter()
    for r in keep_rows:
        by_source[(int(labels[r]), row_sources[r])] += weights[r]
    cluster_sources = [max((w, src) for (c, src), w in by_source.items() if c == cl)[1] for cl in range(k)]
    kept_sources = [row_sources[r] for r in keep_rows]
    X_kept = X if len(keep_rows) == X.shape[0] else X[keep_rows]
    baseline = Baseline(miner=miner, vectorizer=vectorizer, centers=model.cluster_centers_,
                        spreads=model.spreads_, cluster_weights=model.cluster_weights_,
                        cluster_df=cluster_df.astype(np.float32), medoids=medoids,
                        normal_seqs=[distinct[r] for r in keep_rows], normal_labels=labels[keep_rows],
                        cluster_sources=cluster_sources, normal_sources=kept_sources, calibration={},
                        scorer=mcfg.scorer, knn_parts=(X_kept.data, X_kept.indices, X_kept.indptr, X_kept.shape),
                        knn_k=mcfg.knn_k, unseen_weight=mcfg.unseen_weight, report={})

    scorer = baseline.make_scorer()
    cal_by_source: dict[str, list[tuple[int, ...]]] = {}
    for i in cal_idx:
        cal_by_source.setdefault(sessions[i][0], []).append(sequences[i])
    calibration = baseline.calibration
    for source in sorted(cal_by_source):
        scores = [r[0] for r in scorer.score(source, cal_by_source[source])]
        calibration[source] = ConformalThreshold(mcfg.false_alarm_rate).fit(scores)
    calibration[POOLED] = ConformalThreshold(mcfg.false_alarm_rate).fit(
        np.concatenate([c.calibration_scores_ for c in calibration.values()]))

    text = miner.text
    report = baseline.report
    report.update({
        "sessions": n,
        "train_sessions": int(len(train_idx)),
        "calibration_sessions": int(n_cal),
        "distinct_sequences": len(distinct),
        "templates": len(miner.templates),
        "ngrams": len(vectorizer.vocabulary_),
        "k": int(model.k_),
        "k_auto": mcfg.k == "auto",
        "streaming": model.streaming_,
        "knee": int(model.knee_),
        "curve": model.curve_,
        "notes": list(model.notes_),
        "clusters": [
            {"cluster": c, "sessions": int(model.cluster_weights_[c]),
             "spread": round(float(model.spreads_[c]), 4),
             "representative": [text(e) for e in medoids[c]]}
            for c in range(k)
        ],
        "contamination": [
            {"sessions": item["sessions"], "share": round(item["share"], 5),
             "representative": [text(e) for e in distinct[max(item["rows"], key=lambda r: weights[r])]]}
            for item in model.contamination_
        ],
        "thresholds": {src: {"threshold": c.threshold_ if c.usable_ else None,
                             "calibration_sessions": len(c.calibration_scores_)}
                       for src, c in calibration.items()},
        "false_alarm_rate": mcfg.false_alarm_rate,
        "scorer": mcfg.scorer,
        "unseen_weight": mcfg.unseen_weight,
    })
    need = int(np.ceil(1 / mcfg.false_alarm_rate)) - 1
    for src, c in calibration.items():
        if c.usable_:
            continue
        if src == POOLED:
            report["notes"].append(
                f"the calibration set ({n_cal} sessions) is too small for false_alarm_rate="
                f"{mcfg.false_alarm_rate}: at least {need} are needed, so only never-seen events can "
                "raise alerts; fit on more sessions")
        else:
            report["notes"].append(
                f"source {src!r} has {len(c.calibration_scores_)} calibration sessions, fewer than the "
                f"{need} its own threshold needs; it uses the threshold of all sources pooled")
    miner.freeze()
    return baseline


# -- the artifact --------------------------------------------------------------------------
def baselines_dir(state_dir: Path) -> Path:
    return Path(state_dir) / "baselines"


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _rows(arrays: dict, n_cols: int) -> tuple:
    """The distinct fit sessions' CSR parts, checked (the matrix itself is built on first use)."""
    data, indices, indptr = arrays["knn_data"], arrays["knn_indices"], arrays["knn_indptr"]
    shape = tuple(int(x) for x in arrays["knn_shape"])
    if (len(shape) != 2 or shape[1] != n_cols or indptr.ndim != 1 or len(indptr) != shape[0] + 1
            or len(data) != len(indices) or indptr[0] != 0 or indptr[-1] != len(data)
            or (np.diff(indptr) < 0).any() or (len(indices) and not 0 <= indices.min() <= indices.max() < n_cols)):
        raise ValueError("the baseline sessions' vectors are malformed")
    return data, indices, indptr, shape


def _source_index(names: list[str], sources: list[str]) -> np.ndarray:
    """``names`` as indices into ``sources``: the list the manifest keeps and loading maps back."""
    index = {name: i for i, name in enumerate(sources)}
    return np.array([index[n] for n in names], dtype=np.int64)


def _flat(seqs: list[tuple[int, ...]]) -> tuple[np.ndarray, np.ndarray]:
    offsets = np.zeros(len(seqs) + 1, dtype=np.int64)
    np.cumsum([len(s) for s in seqs], out=offsets[1:])
    flat = np.array([e for s in seqs for e in s], dtype=np.int64)
    return flat, offsets


def _unflat(flat: np.ndarray, offsets: np.ndarray) -> list[tuple[int, ...]]:
    items = flat.tolist()
    return [tuple(items[a:b]) for a, b in zip(offsets[:-1].tolist(), offsets[1:].tolist())]


def list_versions(state_dir: Path) -> list[str]:
    root = baselines_dir(state_dir)
    if not root.is_dir():
        return []
    return sorted(p.name for p in root.iterdir() if p.is_dir() and p.name.startswith("v") and p.name[1:].isdigit())


def current_version(state_dir: Path) -> str | None:
    pointer = baselines_dir(state_dir) / "CURRENT"
    try:
        name = pointer.read_text().strip()
    except FileNotFoundError:
        return None
    except OSError as exc:
        raise BaselineError(f"{pointer}: cannot read: {exc.strerror or exc}") from exc
    return name or None


def set_current(state_dir: Path, version: str) -> None:
    if version not in list_versions(state_dir):
        raise BaselineError(f"no baseline version {version!r} in {baselines_dir(state_dir)}")
    atomic_write(baselines_dir(state_dir) / "CURRENT", (version + "\n").encode())


def check_writable(state_dir: Path) -> Path:
    """The baselines folder of ``state_dir``, created if need be, after proving a file can be
    written there: call it before reading and fitting, so a bad state_dir costs no work."""
    root = baselines_dir(state_dir)
    try:
        root.mkdir(parents=True, exist_ok=True)
        fd, probe = tempfile.mkstemp(dir=root, prefix=".write-check.")
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise StateError(f"{root}: cannot write baselines there ({exc.strerror or exc}); "
                         "check state_dir in the config") from exc
    return root


def save_baseline(b: Baseline, state_dir: Path, *, make_current: bool = True) -> Path:
    """Write the baseline as the next version; returns its directory."""
    root = check_writable(state_dir)
    existing = list_versions(state_dir)
    number = int(existing[-1][1:]) + 1 if existing else 1
    version = f"v{number:04d}"
    tmp = Path(tempfile.mkdtemp(dir=root, prefix=f".{version}."))
    try:
        (tmp / "templates.json").write_bytes(orjson.dumps(b.miner.to_dict()))
        medoid_flat, medoid_offsets = _flat(b.medoids)
        normal_flat, normal_offsets = _flat(b.normal_seqs)
        data, indices, indptr, shape = b.knn_parts
        sources = sorted(set(b.cluster_sources) | set(b.normal_sources))
        arrays = {
            **b.vectorizer.to_arrays(),
            "centers": b.centers, "spreads": b.spreads, "cluster_weights": b.cluster_weights,
            "cluster_df": b.cluster_df, "medoid_flat": medoid_flat, "medoid_offsets": medoid_offsets,
            "normal_flat": normal_flat, "normal_offsets": normal_offsets,
            "normal_labels": np.asarray(b.normal_labels, dtype=np.int64),
            "cluster_sources": _source_index(b.cluster_sources, sources),
            "normal_sources": _source_index(b.normal_sources, sources),
            "calibration_scores": np.concatenate([c.calibration_scores_ for c in b.calibration.values()]),
            "calibration_offsets": np.cumsum([0] + [len(c.calibration_scores_) for c in b.calibration.values()]),
            "knn_data": data, "knn_indices": indices.astype(np.int64),
            "knn_indptr": indptr.astype(np.int64), "knn_shape": np.array(shape, dtype=np.int64),
        }
        with open(tmp / "model.npz", "wb") as fh:
            np.savez_compressed(fh, **arrays)
        files = {name: _sha256(tmp / name) for name in ("templates.json", "model.npz")}
        content_hash = hashlib.sha256("".join(f"{k}={v};" for k, v in sorted(files.items())).encode()).hexdigest()
        manifest = {
            "schema_version": SCHEMA_VERSION, "kind": "tracewatch-baseline", "version": version,
            "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "tracewatch": __version__, "content_hash": content_hash, "files": files,
            "ngram_max": b.vectorizer.ngram_max, "scorer": b.scorer_kind, "knn_k": b.knn_k,
            "unseen_weight": b.unseen_weight, "false_alarm_rate": b.false_alarm_rate,
            "calibration_sources": list(b.calibration),
            "sources": sources,
            "report": b.report,
        }
        (tmp / "manifest.json").write_bytes(orjson.dumps(manifest, option=orjson.OPT_INDENT_2
                                                          | orjson.OPT_SERIALIZE_NUMPY))
        for name in ("templates.json", "model.npz", "manifest.json"):
            with open(tmp / name, "rb") as fh:
                os.fsync(fh.fileno())
        final = root / version
        os.rename(tmp, final)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    b.version = version
    if make_current:
        set_current(state_dir, version)
    return final


def load_baseline(state_dir: Path, version: str | None = None) -> Baseline:
    """Load a baseline version (default: the current one), verifying every file."""
    version = version or current_version(state_dir)
    if version is None:
        raise NoBaselineError(f"no baseline in {baselines_dir(state_dir)} yet; fit one first with "
                              "'tracewatch fit --config FILE INPUT...'")
    return load_baseline_dir(baselines_dir(state_dir) / version)


def load_baseline_dir(path: Path) -> Baseline:
    where = str(path)
    try:
        manifest = Manifest.model_validate(orjson.loads((path / "manifest.json").read_bytes()))
    except FileNotFoundError as exc:
        raise BaselineError(f"{where}: not a baseline (no manifest.json)") from exc
    except OSError as exc:
        raise BaselineError(f"{where}: cannot read manifest.json: {exc.strerror or exc}") from exc
    except (orjson.JSONDecodeError, ValidationError) as exc:
        raise BaselineError(f"{where}: manifest.json is corrupt or not a tracewatch baseline "
                            f"({str(exc).splitlines()[0]})") from exc
    if manifest.kind != "tracewatch-baseline":
        raise BaselineError(f"{where}: manifest.json is not a tracewatch baseline")
    if manifest.schema_version != SCHEMA_VERSION:
        raise BaselineError(f"{where}: baseline schema {manifest.schema_version} is not supported "
                            f"by this tracewatch (schema {SCHEMA_VERSION}); fit a new baseline")
    for name in ("templates.json", "model.npz"):
        try:
            digest = _sha256(path / name)
        except OSError as exc:
            raise BaselineError(f"{where}: cannot read {name}: {exc.strerror or exc}") from exc
        if manifest.files.get(name) != digest:
            raise BaselineError(f"{where}: {name} does not match its checksum; the baseline is "
                                "corrupt (refit it, or roll back to another version)")
    try:
        miner = TemplateTree.from_dict(orjson.loads((path / "templates.json").read_bytes()))
        with np.load(path / "model.npz", allow_pickle=False) as z:
            arrays = {key: z[key] for key in z.files}
        vectorizer = NgramVectorizer.from_arrays(manifest.ngram_max, arrays)
        knn = _rows(arrays, len(vectorizer.vocabulary_))
        scores, offsets = arrays["calibration_scores"], arrays["calibration_offsets"].tolist()
        calibration = {src: ConformalThreshold(manifest.false_alarm_rate).fit(scores[a:b])
                       for src, a, b in zip(manifest.calibration_sources, offsets, offsets[1:])}
        if POOLED not in calibration:
            raise KeyError("pooled calibration")
        medoids = _unflat(arrays["medoid_flat"], arrays["medoid_offsets"])
        baseline = Baseline(
            miner=miner, vectorizer=vectorizer, centers=arrays["centers"], spreads=arrays["spreads"],
            cluster_weights=arrays["cluster_weights"], cluster_df=arrays["cluster_df"],
            medoids=medoids, normal_seqs=_unflat(arrays["normal_flat"], arrays["normal_offsets"]),
            normal_labels=arrays["normal_labels"], calibration=calibration,
            cluster_sources=[manifest.sources[i] for i in arrays["cluster_sources"].tolist()],
            normal_sources=[manifest.sources[i] for i in arrays["normal_sources"].tolist()], scorer=manifest.scorer, knn_parts=knn,
            knn_k=manifest.knn_k, unseen_weight=manifest.unseen_weight, report=manifest.report, version=manifest.version)
    except (KeyError, ValueError, TypeError, zipfile.BadZipFile, OSError, orjson.JSONDecodeError) as exc:
        raise BaselineError(f"{where}: the baseline files are unreadable ({exc}); refit it") from exc
    if baseline.centers.shape[1] != len(vectorizer.vocabulary_):
        raise BaselineError(f"{where}: the model does not match its vocabulary; refit it")
    miner.freeze()
    return baseline
