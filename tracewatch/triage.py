"""Triage: on-call labels teach tracewatch which incidents are expected and which are a known problem.

Stage: incidents → **triage** → a suggestion stored with each new incident. An on-call engineer
labels incidents ``expected`` or with the name of a known problem (``tracewatch label``); the
alerts of the labelled incidents train a multi-class kernel perceptron
(:class:`KernelPerceptron`). For the first alert of a new incident, :class:`Triage` answers
``suppress`` (expected: the incident is opened as *expected*, without a notification),
``suggest`` (a known problem's name) or ``abstain`` when the confidence margin is below
``[triage] min_margin`` — an incident unlike every labelled one gets no label.

The model is saved as JSON (``<state_dir>/triage.json``: classes, dual coefficients and the
support examples), checked by pydantic on load — sizes, ranges and that the parts fit
together, so a tampered file is refused with one line rather than a hang or a crash — never
pickle. Training takes at most :data:`MAX_EXAMPLES` labelled alerts. The daemon re-reads it when
the file changes, so a label given with the CLI takes effect without a restart.
"""

from __future__ import annotations

import logging
import math
import os
import time
from collections import Counter
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Annotated, Literal

import numpy as np
import orjson
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.feature_extraction import DictVectorizer
from sklearn.utils.multiclass import check_classification_targets
from sklearn.utils.validation import check_array, check_is_fitted, column_or_1d

from .alerts.vectors import TERM_PATTERN, alert_vector
from .config import TriageConfig
from .errors import StateError, first_problem
from .fs import atomic_write

log = logging.getLogger("tracewatch.triage")

EXPECTED = "expected"
FILENAME = "triage.json"
SCHEMA_VERSION = 1
KERNELS = ("cosine", "rbf", "spectrum")


# -- kernels ---------------------------------------------------------------------------------------
def spectrum(seq: Sequence[str], n: int) -> Counter:
    """The n-spectrum feature map: how often each contiguous run of ``n`` template ids occurs."""
    return Counter("\x1f".join(seq[i:i + n]) for i in range(len(seq) - n + 1))


def spectrum_kernel(a: Sequence[str], b: Sequence[str], n: int) -> int:
    """K(a, b) = Σ_s φ_s(a) φ_s(b) over all length-n runs s (Leslie, Eskin & Noble, PSB 2002)."""
    fa, fb = spectrum(a, n), spectrum(b, n)
    return sum(c * fb[s] for s, c in fa.items())


class KernelPerceptron(ClassifierMixin, BaseEstimator):
    """Multi-class kernel perceptron in dual form, a scikit-learn classifier.

    The kernel perceptron (Aizerman, Braverman & Rozonoer, 1964) keeps, per class c, a weight
    vector w_c = Σ_j α_cj φ(x_j) over training examples, so only kernel values K(x_i, x_j) are
    needed. The multi-class update: when the true class t of x_i does not score strictly above
    every rival, α_ti += w_i and α_ri −= w_i for the best rival r (w_i: the example's
    ``sample_weight``, 1 by default, as a weighted perceptron scales its step). With ``average`` the dual
    coefficients are averaged over all steps of all epochs — the averaged perceptron of Freund &
    Schapire, "Large margin classification using the perceptron algorithm" (1999), whose mistake
    bound holds for any kernel.

    Kernels (all normalised so that K(x, x) = 1):
      - ``cosine``: items are sparse vectors (mappings term → weight) or rows of a 2-D numeric
        array (checked as scikit-learn checks its input: finite, 2-D, dense);
      - ``rbf``: exp(−gamma ‖x − y‖²) on the same items;
      - ``spectrum``: items are sequences of template ids; the n-spectrum kernel of Leslie, Eskin
        & Noble (PSB 2002), divided by √(K(x,x) K(y,y)) (common practice, so long sessions do
        not dominate).

    Sign convention: the per-class scores f_c, higher = more like that class, sum to 0 for a
    sample (every update adds +w and −w). ``decision_function`` gives them all, shape
    (n_samples, n_classes); with two classes, as scikit-learn's classifiers do, only
    f_{classes_[1]}, shape (n_samples,): positive exactly when ``classes_[1]`` is predicted.
    """

    def __init__(self, kernel: Literal["cosine", "rbf", "spectrum"] = "cosine", *, gamma: float = 1.0,
                 spectrum_n: int = 3, epochs: int = 20, average: bool = True, shuffle: bool = True,
                 seed: int = 0) -> None:
        self.kernel = kernel
        self.gamma = gamma
        self.spectrum_n = spectrum_n
        self.epochs = epochs
        self.average = average
        self.shuffle = shuffle
        self.seed = seed

    # -- public --------------------------------------------------------------------------------
    def fit(self, X, y, sample_weight=None) -> "KernelPerceptron":
        """Learn ``classes_``, ``alpha_`` (classes × support) and ``support_`` (the examples with a
        non-zero coefficient); ``mistakes_`` counts the updates of each epoch."""
        if self.kernel not in KERNELS:
            raise ValueError(f"kernel must be one of {', '.join(KERNELS)}, not {self.kernel!r}")
        items = self._items(X, fitting=True)
        y = column_or_1d(y, warn=True)
        check_classification_targets(y)
        if len(items) != len(y) or not items:
            raise ValueError("X and y must be non-empty and of the same length")
        w = np.ones(len(items)) if sample_weight is None else np.asarray(sample_weight, dtype=float)
        if w.shape != (len(items),) or not np.isfinite(w).all() or (w < 0).any():
            raise ValueError("sample_weight must hold one finite, non-negative weight per example")
        if not w.any():
            raise ValueError("sample_weight: every weight is zero, nothing to learn from")
        classes = np.unique(y)
        if len(classes) < 2:
            raise ValueError("y holds one class only: at least two classes are needed to learn anything")
        feats = [self._features(it) for it in items]
        sq = np.array([_sq(f) for f in feats])
        vec = DictVectorizer().fit(feats)
        m = vec.transform(feats)
        gram = self._finish((m @ m.T).toarray(), sq, sq)
        target = np.searchsorted(classes, y)
        alpha = np.zeros((len(classes), len(items)))
        total = np.zeros_like(alpha)
        rng = np.random.default_rng(self.seed)
        order = np.arange(len(items))
        self.mistakes_ = []
        for _ in range(self.epochs):
            if self.shuffle:
                rng.shuffle(order)
            wrong = 0
            for i in order:
                f = alpha @ gram[:, i]
                t = target[i]
                score = f[t]
                f[t] = -np.inf
                rival = int(np.argmax(f))
                if score <= f[rival] and w[i] > 0:  # a tie is a mistake: the true class must win outright
                    alpha[t, i] += w[i]
                    alpha[rival, i] -= w[i]
                    wrong += 1
                if self.average:
                    total += alpha
            self.mistakes_.append(wrong)
            if wrong == 0 and not self.average:
                break
        if self.average:
            alpha = total / (len(self.mistakes_) * len(items))
        keep = np.flatnonzero(np.abs(alpha).sum(axis=0) > 0)
        self.classes_ = classes
        self.alpha_ = alpha[:, keep]
        self.support_ = [items[i] for i in keep]
        self._prepare()
        return self

    def decision_function(self, X) -> np.ndarray:
        """Scores f_c(x) = Σ_j α_cj K(s_j, x): (n_samples, n_classes), or (n_samples,) for two classes."""
        check_is_fitted(self)
        scores = self._scores(self._items(X))
        return scores[:, 1] if len(self.classes_) == 2 else scores

    def predict(self, X) -> np.ndarray:
        check_is_fitted(self)
        scores = self._scores(self._items(X))
        return self.classes_[np.argmax(scores, axis=1)]

    def margin(self, X) -> tuple[np.ndarray, np.ndarray]:
        """(predicted classes, geometric margins): the distance in feature space from φ(x) to the
        boundary between the predicted class and the runner-up, (f_top − f_second) / ‖w_top −
        w_second‖. With ‖φ(x)‖ = 1 it lies in [0, 1]: near 0 for an item unlike every
        labelled one, or between two classes."""
        check_is_fitted(self)
        scores = self._scores(self._items(X))
        order = np.argsort(-scores, axis=1)
        top, second = order[:, 0], order[:, 1]
        rows = np.arange(len(scores))
        diff = self.alpha_[top] - self.alpha_[second]  # (n, support)
        norm = np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", diff, self._gram, diff), 0.0))
        gap = scores[rows, top] - scores[rows, second]
        margins = np.divide(gap, norm, out=np.zeros_like(gap), where=norm > 0)
        return self.classes_[top], margins

    # -- workers -------------------------------------------------------------------------------
    def _items(self, X, *, fitting: bool = False) -> list:
        """One item per sample: a list of mappings (cosine, rbf) or of sequences (spectrum) as
        given; anything else is numeric and checked as scikit-learn checks it (2-D, finite, not
        sparse), each row a mapping column → value (its values as the sequence, for spectrum)."""
        if isinstance(X, (list, tuple)) and all(
                isinstance(x, Mapping) if self.kernel != "spectrum" else isinstance(x, (list, tuple)) for x in X):
            return list(X)
        A = check_array(X)
        if fitting:
            self.n_features_in_ = A.shape[1]
        elif A.shape[1] != getattr(self, "n_features_in_", A.shape[1]):
            raise ValueError(f"X has {A.shape[1]} features, but KernelPerceptron is expecting "
                             f"{self.n_features_in_} features as input")  # scikit-learn's own wording
        if self.kernel == "spectrum":
            return [[str(v) for v in row] for row in A.tolist()]
        return [{str(j): float(v) for j, v in enumerate(row) if v} for row in A.tolist()]

    def _features(self, item) -> dict:
        if self.kernel == "spectrum":
            return dict(spectrum([str(t) for t in item], self.spectrum_n))
        return {str(k): float(v) for k, v in item.items() if v}

    def _finish(self, dots: np.ndarray, sq_rows: np.ndarray, sq_cols: np.ndarray) -> np.ndarray:
        """Kernel values from dot products and squared norms of the feature maps."""
        if self.kernel == "rbf":
            dist = np.maximum(sq_rows[:, None] + sq_cols[None, :] - 2.0 * dots, 0.0)
            return np.exp(-self.gamma * dist)
        norms = np.sqrt(np.outer(sq_rows, sq_cols))
        return np.divide(dots, norms, out=np.zeros_like(dots), where=norms > 0)

    def _prepare(self) -> None:
        """Index the support examples (after fit or load)."""
        feats = [self._features(it) for it in self.support_]
        self._vec = DictVectorizer().fit(feats)
        self._support = self._vec.transform(feats)
        self._support_sq = np.array([_sq(f) for f in feats])
        self._gram = self._finish((self._support @ self._support.T).toarray(), self._support_sq, self._support_sq)

    def _scores(self, items: list) -> np.ndarray:
        feats = [self._features(it) for it in items]
        dots = (self._vec.transform(feats) @ self._support.T).toarray()  # terms unseen at fit add 0
        k = self._finish(dots, np.array([_sq(f) for f in feats]), self._support_sq)
        return k @ self.alpha_.T


def _sq(features: Mapping[str, float]) -> float:
    return float(sum(v * v for v in features.values()))


# -- triage of alerts and incidents -----------------------------------------------------------------
MAX_CLASSES = 256  # labels a model tells apart ("expected" and the known problems' names)
MAX_EXAMPLES = 4000  # labelled alerts trained on (the kernel matrix is examples², ~128 MB of floats)
MAX_TERMS = 100_000  # terms of one support vector (an alert's vector has a few thousand at most)
MAX_SEQUENCE = 10_000  # template ids of one support sequence (alerts keep 500)
MAX_TIME = 253_402_300_799.0  # 9999-12-31T23:59:59Z
MAX_FILE_BYTES = 256 << 20  # a file larger than any model of MAX_EXAMPLES alerts is not read

_Label = Annotated[str, Field(min_length=1, max_length=200)]
_Finite = Annotated[float, Field(allow_inf_nan=False)]
_Count = Annotated[int, Field(ge=0, lt=1 << 63)]


class _Saved(BaseModel):
    """``triage.json``, checked on load: sizes, ranges, and that the parts fit together (one row
    of coefficients per class, one column per support example of the kernel's kind)."""

    model_config = ConfigDict(extra="forbid", strict=True)

    kind: Literal["tracewatch-triage"]
    schema_version: int
    kernel: Literal["cosine", "rbf", "spectrum"]
    gamma: Annotated[float, Field(gt=0, le=1000, allow_inf_nan=False)]  # as [triage] rbf_gamma
    spectrum_n: Annotated[int, Field(ge=1, le=8)]  # as [triage] spectrum_n
    classes: Annotated[list[_Label], Field(max_length=MAX_CLASSES)]
    alpha: Annotated[list[Annotated[list[_Finite], Field(max_length=MAX_EXAMPLES)]], Field(max_length=MAX_CLASSES)]
    support: Annotated[list[Annotated[dict[Annotated[str, Field(pattern=TERM_PATTERN)], _Finite],
                                      Field(max_length=MAX_TERMS)]
                            | Annotated[list[Annotated[str, Field(max_length=200)]], Field(max_length=MAX_SEQUENCE)]],
                       Field(max_length=MAX_EXAMPLES)]
    trained_at: Annotated[float, Field(ge=0, le=MAX_TIME, allow_inf_nan=False)]
    examples: Annotated[int, Field(ge=0, le=MAX_EXAMPLES)]
    incidents: Annotated[dict[_Label, Annotated[int, Field(ge=1, lt=1 << 63)]], Field(max_length=1 << 20)]
    mistakes: Annotated[list[_Count], Field(max_length=1000)]  # one per epoch, as [triage] epochs

    @model_validator(mode="after")
    def _consistent(self) -> "_Saved":
        if not self.classes:
            if self.alpha or self.support:
                raise ValueError("coefficients or support examples without classes")
            return self
        if len(self.classes) < 2 or self.classes != sorted(set(self.classes)):
            raise ValueError("classes must be at least two different labels, sorted")
        if set(self.classes) != set(self.incidents):
            raise ValueError("classes and the labelled incidents disagree")
        if len(self.alpha) != len(self.classes) or any(len(row) != len(self.support) for row in self.alpha):
            raise ValueError(f"alpha must be {len(self.classes)} rows of {len(self.support)} coefficients "
                             "(classes × support examples)")
        kind = list if self.kernel == "spectrum" else dict
        if not all(isinstance(item, kind) for item in self.support):
            raise ValueError(f"support examples of the {self.kernel} kernel must be "
                             f"{'sequences' if kind is list else 'vectors'}")
        if len(self.support) > self.examples or any(n > self.examples for n in self.mistakes):
            raise ValueError("more support examples or mistakes than training examples")
        return self


def alert_item(alert: dict, kernel: str):
    """What the kernel compares: the template-id sequence (spectrum) or the alert's grouping
    vector — its explanation and sequence n-grams (cosine, rbf)."""
    if kernel == "spectrum":
        return [str(t) for t in alert.get("sequence") or []]
    return alert_vector(alert)


def _bounded(examples: Sequence[tuple[dict, str, int]]) -> list[tuple[dict, str, int]]:
    """At most :data:`MAX_EXAMPLES`, taking the same share of every labelled incident's alerts."""
    if len(examples) <= MAX_EXAMPLES:
        return list(examples)
    per: dict[int, list] = {}
    for ex in examples:
        per.setdefault(ex[2], []).append(ex)
    keep = max(1, MAX_EXAMPLES // len(per))
    return [ex for group in per.values() for ex in group[:keep]][:MAX_EXAMPLES]


class Triage:
    """The trained model of one state directory: ``train`` from labelled alerts, ``save``,
    ``suggest`` for a new alert. ``suggest`` re-reads ``triage.json`` when it changed on disk."""

    def __init__(self, cfg: TriageConfig, state_dir: Path) -> None:
        self.cfg = cfg
        self.path = Path(state_dir) / FILENAME
        self.model: KernelPerceptron | None = None
        self.info: dict = {}
        self._sig: tuple | None = None
        self._refused: tuple | None = None  # the signature of a file refused (logged once)

    # -- training --------------------------------------------------------------------------------
    def train(self, examples: Sequence[tuple[dict, str, int]]) -> dict:
        """Fit on (alert, label, incident id) triples; returns what was learned. Fewer than two
        different labels leave no model (triage abstains)."""
        c = self.cfg
        examples = _bounded(examples)
        labels = {(iid, label) for _, label, iid in examples}
        self.info = {"kernel": c.kernel, "examples": len(examples), "trained_at": time.time(),
                     "incidents": dict(Counter(label for _, label in labels)), "mistakes": [], "support": 0}
        self.model = None
        if len(self.info["incidents"]) >= 2:
            m = KernelPerceptron(c.kernel, gamma=c.rbf_gamma, spectrum_n=c.spectrum_n, epochs=c.epochs, seed=c.seed)
            self.model = m.fit([alert_item(a, c.kernel) for a, _, _ in examples], [label for _, label, _ in examples])
            self.info.update(mistakes=m.mistakes_, support=len(m.support_), classes=[str(c) for c in m.classes_])
        return self.info

    def train_from_store(self, store) -> dict:
        return self.train(store.labelled_alerts())

    def save(self) -> None:
        m, info = self.model, self.info
        doc = {"kind": "tracewatch-triage", "schema_version": SCHEMA_VERSION, "kernel": self.cfg.kernel,
               "gamma": self.cfg.rbf_gamma, "spectrum_n": self.cfg.spectrum_n,
               "classes": [] if m is None else [str(c) for c in m.classes_],
               "alpha": [] if m is None else m.alpha_.tolist(), "support": [] if m is None else m.support_,
               "trained_at": info["trained_at"], "examples": info["examples"], "incidents": info["incidents"],
               "mistakes": info["mistakes"]}
        atomic_write(self.path, orjson.dumps(doc))

    # -- loading ---------------------------------------------------------------------------------
    def load(self) -> bool:
        """Read ``triage.json`` if it changed since the last read; False when there is none.
        A damaged or tampered file is a StateError (and no model is used)."""
        try:
            st = os.stat(self.path)
        except FileNotFoundError:
            self.model, self.info, self._sig = None, {}, None
            return False
        except OSError as exc:
            self.model, self.info, self._sig = None, {}, None
            raise StateError(f"{self.path}: cannot read the triage model: {exc.strerror or exc}") from exc
        sig = (st.st_ino, st.st_mtime_ns, st.st_size)
        if sig == self._sig:
            return True
        self.model, self.info, self._sig = None, {}, None
        advice = "; label an incident again to retrain it, or move the file away"
        if st.st_size > MAX_FILE_BYTES:
            raise StateError(f"{self.path}: not a usable triage model ({st.st_size} bytes, more than a model of "
                             f"{MAX_EXAMPLES} examples takes){advice}")
        try:
            saved = _Saved.model_validate_json(self.path.read_bytes())
        except OSError as exc:
            raise StateError(f"{self.path}: cannot read the triage model: {exc.strerror or exc}") from exc
        except ValidationError as exc:
            raise StateError(f"{self.path}: not a usable triage model ({first_problem(exc)}){advice}") from exc
        if saved.schema_version != SCHEMA_VERSION:
            raise StateError(f"{self.path}: triage schema {saved.schema_version} is not supported "
                             f"(this tracewatch reads {SCHEMA_VERSION}); label an incident again to retrain")
        info = saved.model_dump(exclude={"kind", "schema_version", "alpha", "support", "gamma", "spectrum_n"})
        info["support"] = len(saved.support)
        model = None
        if saved.classes:
            model = KernelPerceptron(saved.kernel, gamma=saved.gamma, spectrum_n=saved.spectrum_n)
            model.classes_ = np.array(saved.classes)
            model.alpha_ = np.array(saved.alpha, dtype=float).reshape(len(saved.classes), len(saved.support))
            model.support_ = saved.support
            model._prepare()
        self.model, self.info, self._sig = model, info, sig
        return True

    # -- suggesting ------------------------------------------------------------------------------
    def suggest(self, alert: dict) -> dict | None:
        """For the first alert of a new incident: ``{"action": "suppress" | "suggest" | "abstain",
        "label", "margin"}``, or None without a usable model. Never raises: triage is advice, and
        a damaged model file must not stop incidents from being recorded. A refused file is
        logged once (until it changes); any other failure is a fault, logged with its traceback."""
        try:
            self.load()
        except StateError as exc:
            sig = _signature(self.path)
            if sig != self._refused:
                self._refused = sig
                log.error("triage: %s; no suggestions until it is fixed", exc)
            return None
        if self.model is None:
            return None
        try:
            labels, margins = self.model.margin([alert_item(alert, self.model.kernel)])
        except Exception:  # noqa: BLE001 - a fault: logged with its cause; grouping goes on
            log.exception("triage failed; no suggestion for alert %s", alert.get("alert_id"))
            return None
        label, margin = str(labels[0]), float(margins[0])
        if not math.isfinite(margin) or margin < self.cfg.min_margin:
            return {"action": "abstain", "label": None, "margin": round(margin, 4)}
        action = "suppress" if label == EXPECTED and self.cfg.suppress_expected else "suggest"
        return {"action": action, "label": label, "margin": round(margin, 4)}


def _signature(path: Path) -> tuple | None:
    try:
        st = os.stat(path)
    except OSError:
        return None
    return st.st_ino, st.st_mtime_ns, st.st_size
