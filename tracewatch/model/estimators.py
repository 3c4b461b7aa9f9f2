"""The scikit-learn faces of the n-gram weights and the conformal calibration.

Fitting a baseline goes through these estimators (``get_params``/``clone``, ``check_is_fitted``,
``fit(X, y=None, sample_weight=None)``; tests/test_estimator_checks.py runs scikit-learn's own
checks on them). What they learn is a plain object — :class:`~tracewatch.features.NgramWeights`,
:class:`~tracewatch.model.calibrate.Calibration` — which the estimator is a subclass of, so a
fitted estimator and a baseline loaded from disk (which holds the plain classes) answer the
same calls. Only this module imports scikit-learn for them: scoring and the daemon's start do
not pay its import (about 1 s).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.utils.validation import check_array, check_is_fitted

from ..features import NgramWeights
from .calibrate import Calibration


class NgramVectorizer(TransformerMixin, BaseEstimator, NgramWeights):
    """Event n-gram tf-idf vectoriser, a scikit-learn estimator over :class:`NgramWeights`."""

    def fit(self, X: Sequence[Sequence[int]], y=None, sample_weight: Sequence[float] | None = None
            ) -> "NgramVectorizer":
        return self.count(X, sample_weight)

    def transform(self, X: Sequence[Sequence[int]]):
        check_is_fitted(self)
        return super().transform(X)

    def to_arrays(self) -> dict[str, np.ndarray]:
        check_is_fitted(self)
        return super().to_arrays()


class ConformalThreshold(BaseEstimator, Calibration):
    """Split-conformal threshold, a scikit-learn estimator over :class:`Calibration`."""

    def fit(self, X, y=None, sample_weight=None) -> "ConformalThreshold":
        """``X``: the calibration sessions' scores (1-D). Each session counts once: the p-value's
        guarantee is about exchangeable sessions, so there are no sample weights."""
        if sample_weight is not None:
            raise ValueError("ConformalThreshold takes no sample weights: give every calibration score")
        return self.calibrate(check_array(X, ensure_2d=False, dtype=np.float64))

    def p_values(self, X) -> np.ndarray:
        check_is_fitted(self)
        return super().p_values(X)

    def alarms(self, X) -> np.ndarray:
        check_is_fitted(self)
        return super().alarms(X)
