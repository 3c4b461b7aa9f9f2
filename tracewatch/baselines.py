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
from pathlib import Path

import numpy as np
import orjson
import scipy.sparse as sp
from pydantic import BaseModel, ConfigDict, ValidationError

from . import __version__
from .config import Config
from .errors import BaselineError, NoBaselineError
from .features import NgramVectorizer
from .model.calibrate import ConformalThreshold
from .model.fit import ClusterModel
from .model.score import SessionScorer
from .templates import TemplateMiner

SCHEMA_VERSION = 1
MIN_SESSIONS = 10


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
    false_alarm_rate: float
    threshold: float
    report: dict


class Baseline:
    """A fitted baseline: templates, vectoriser, clusters, calibration."""

    def __init__(self, *, miner: TemplateMiner, vectorizer: NgramVectorizer, centers: np.ndarray,
                 spreads: np.ndarray, cluster_weights: np.ndarray, cluster_df: np.ndarray,
                 medoids: list[tuple[int, ...]], conformal: ConformalThreshold, scorer: str,
                 knn_rows: sp.csr_matrix, knn_k: int, report: dict, version: str = "unsaved") -> None:
        self.miner = miner
        self.vectorizer = vectorizer
        self.centers = centers
        self.spreads = spreads
        self.cluster_weights = cluster_weights
        self.cluster_df = cluster_df
        self.medoids = medoids
        self.conformal = conformal
        self.scorer_kind = scorer
        self.knn_rows = knn_rows
        self.knn_k = knn_k
        self.report = report
        self.version = version

    @property
    def false_alarm_rate(self) -> float:
        return self.conformal.false_alarm_rate

    def make_scorer(self) -> SessionScorer:
        return SessionScorer(self.vectorizer, self.centers, self.spreads, self.scorer_kind,
                             self.knn_rows, self.knn_k)


# -- fitting -------------------------------------------------------------------------------
def fit_baseline(sequences: list[tuple[int, ...]], miner: TemplateMiner, cfg: Config) -> Baseline:
    """Fit on normal sessions: split train / calibration, vectorise, cluster, calibrate."""
    n = len(sequences)
    if n < MIN_SESSIONS:
        raise BaselineError(f"only {n} sessions found in the input; a baseline needs at least "
                            f"{MIN_SESSIONS} (check session_key and the input files)")
    mcfg = cfg.model
    rng = np.random.default_rng(mcfg.seed)
    n_cal = max(1, int(round(n * mcfg.calibration_fraction)))
    order = rng.permutation(n)
    cal_idx, train_idx = np.sort(order[:n_cal]), np.sort(order[n_cal:])
    counts = Counter(sequences[i] for i in train_idx)
    distinct = list(counts)
    weights = np.array([counts[s] for s in distinct], dtype=float)

    vectorizer = NgramVectorizer(cfg.features.ngram_max).fit(distinct, weights)
    X, _ = vectorizer.transform(distinct)
    model = ClusterModel(mcfg.k, mcfg.k_max, mcfg.restarts, mcfg.min_cluster_share, mcfg.seed).fit(X, weights)

    labels = model.labels_
    keep_rows = np.flatnonzero(labels >= 0)
    k = len(model.cluster_centers_)
    onehot = sp.csr_matrix((weights[keep_rows], (keep_rows, labels[keep_rows])), shape=(len(distinct), k))
    present = (X > 0).astype(float)
    cluster_df = np.asarray((present.T @ onehot).T.toarray()) / model.cluster_weights_[:, None]
    medoids = [distinct[r] for r in model.medoids_]

    scorer = SessionScorer(vectorizer, model.cluster_centers_, model.spreads_, mcfg.scorer,
                           X[keep_rows], mcfg.knn_k)
    cal_scores = [s for s, _, _ in scorer.score([sequences[i] for i in cal_idx])]
    conformal = ConformalThreshold(mcfg.false_alarm_rate).fit(cal_scores)

    text = miner.text
    report = {
        "sessions": n,
        "train_sessions": int(len(train_idx)),
        "calibration_sessions": int(n_cal),
        "distinct_sequences": len(distinct),
        "templates": len(miner.templates),
        "ngrams": len(vectorizer.vocabulary_),
        "k": int(model.k_),
        "k_auto": mcfg.k == "auto",
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
        "threshold": conformal.threshold_,
        "false_alarm_rate": mcfg.false_alarm_rate,
        "scorer": mcfg.scorer,
    }
    if not conformal.usable_:
        report["notes"].append(
            f"the calibration set ({n_cal} sessions) is too small for false_alarm_rate="
            f"{mcfg.false_alarm_rate}: at least {int(np.ceil(1 / mcfg.false_alarm_rate)) - 1} are "
            "needed, so only never-seen events can raise alerts; fit on more sessions")
    miner.freeze()
    return Baseline(miner=miner, vectorizer=vectorizer, centers=model.cluster_centers_,
                    spreads=model.spreads_, cluster_weights=model.cluster_weights_,
                    cluster_df=cluster_df.astype(np.float32), medoids=medoids, conformal=conformal,
                    scorer=mcfg.scorer, knn_rows=X[keep_rows], knn_k=mcfg.knn_k, report=report)


# -- the artifact --------------------------------------------------------------------------
def baselines_dir(state_dir: Path) -> Path:
    return Path(state_dir) / "baselines"


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def atomic_write(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` via a temp file, fsync and rename: never a half-written file."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    dir_fd = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(dir_fd)
    finally:
        os.close(dir_fd)


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
        raise BaselineError(f"{pointer}: cannot read: {exc.strerror or exc}") from None
    return name or None


def set_current(state_dir: Path, version: str) -> None:
    if version not in list_versions(state_dir):
        raise BaselineError(f"no baseline version {version!r} in {baselines_dir(state_dir)}")
    atomic_write(baselines_dir(state_dir) / "CURRENT", (version + "\n").encode())


def save_baseline(b: Baseline, state_dir: Path, *, make_current: bool = True) -> Path:
    """Write the baseline as the next version; returns its directory."""
    root = baselines_dir(state_dir)
    root.mkdir(parents=True, exist_ok=True)
    existing = list_versions(state_dir)
    number = int(existing[-1][1:]) + 1 if existing else 1
    version = f"v{number:04d}"
    tmp = Path(tempfile.mkdtemp(dir=root, prefix=f".{version}."))
    try:
        (tmp / "templates.json").write_bytes(orjson.dumps(b.miner.to_dict()))
        medoid_flat, medoid_offsets = _flat(b.medoids)
        knn = b.knn_rows.tocsr()
        arrays = {
            **b.vectorizer.to_arrays(),
            "centers": b.centers, "spreads": b.spreads, "cluster_weights": b.cluster_weights,
            "cluster_df": b.cluster_df, "medoid_flat": medoid_flat, "medoid_offsets": medoid_offsets,
            "calibration_scores": b.conformal.calibration_scores_,
            "knn_data": knn.data, "knn_indices": knn.indices.astype(np.int64),
            "knn_indptr": knn.indptr.astype(np.int64), "knn_shape": np.array(knn.shape, dtype=np.int64),
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
            "false_alarm_rate": b.false_alarm_rate,
            "threshold": b.conformal.threshold_ if np.isfinite(b.conformal.threshold_) else 1e308,
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
    except FileNotFoundError:
        raise BaselineError(f"{where}: not a baseline (no manifest.json)") from None
    except OSError as exc:
        raise BaselineError(f"{where}: cannot read manifest.json: {exc.strerror or exc}") from None
    except (orjson.JSONDecodeError, ValidationError) as exc:
        raise BaselineError(f"{where}: manifest.json is corrupt or not a tracewatch baseline "
                            f"({str(exc).splitlines()[0]})") from None
    if manifest.kind != "tracewatch-baseline":
        raise BaselineError(f"{where}: manifest.json is not a tracewatch baseline")
    if manifest.schema_version != SCHEMA_VERSION:
        raise BaselineError(f"{where}: baseline schema {manifest.schema_version} is not supported "
                            f"by this tracewatch (schema {SCHEMA_VERSION}); fit a new baseline")
    for name in ("templates.json", "model.npz"):
        try:
            digest = _sha256(path / name)
        except OSError as exc:
            raise BaselineError(f"{where}: cannot read {name}: {exc.strerror or exc}") from None
        if manifest.files.get(name) != digest:
            raise BaselineError(f"{where}: {name} does not match its checksum; the baseline is "
                                "corrupt (refit it, or roll back to another version)")
    try:
        miner = TemplateMiner.from_dict(orjson.loads((path / "templates.json").read_bytes()))
        with np.load(path / "model.npz", allow_pickle=False) as z:
            arrays = {key: z[key] for key in z.files}
        vectorizer = NgramVectorizer.from_arrays(manifest.ngram_max, arrays)
        knn = sp.csr_matrix((arrays["knn_data"], arrays["knn_indices"], arrays["knn_indptr"]),
                            shape=tuple(int(x) for x in arrays["knn_shape"]))
        conformal = ConformalThreshold(manifest.false_alarm_rate).fit(arrays["calibration_scores"])
        medoids = _unflat(arrays["medoid_flat"], arrays["medoid_offsets"])
        baseline = Baseline(
            miner=miner, vectorizer=vectorizer, centers=arrays["centers"], spreads=arrays["spreads"],
            cluster_weights=arrays["cluster_weights"], cluster_df=arrays["cluster_df"],
            medoids=medoids, conformal=conformal, scorer=manifest.scorer, knn_rows=knn,
            knn_k=manifest.knn_k, report=manifest.report, version=manifest.version)
    except (KeyError, ValueError, TypeError, zipfile.BadZipFile, OSError, orjson.JSONDecodeError) as exc:
        raise BaselineError(f"{where}: the baseline files are unreadable ({exc}); refit it") from None
    if baseline.centers.shape[1] != len(vectorizer.vocabulary_):
        raise BaselineError(f"{where}: the model does not match its vocabulary; refit it")
    miner.freeze()
    return baseline
