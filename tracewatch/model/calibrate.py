"""Calibration: turn the user's false-alarm rate into a threshold with conformal p-values.

Split-conformal (inductive) prediction — Papadopoulos, Proedrou, Vovk, Gammerman, "Inductive
Confidence Machines for Regression", ECML 2002; Vovk, Gammerman, Shafer, "Algorithmic
Learning in a Random World", 2005. Nonconformity scores of held-out normal sessions form the
calibration set; a new score s gets p = (1 + #{calibration scores ≥ s}) / (n + 1), and an
alarm is raised when p ≤ rate, so P(false alarm) ≤ rate when sessions are exchangeable.
"""

from __future__ import annotations

import math

import numpy as np


def calibration_size(sessions: int, calibration_fraction: float) -> int:
    """How many of ``sessions`` baseline sessions a fit holds out to calibrate on."""
    return max(1, int(round(sessions * calibration_fraction)))


def calibration_needed(false_alarm_rate: float) -> int:
    """The fewest calibration sessions that can give ``false_alarm_rate``: the lowest p-value of
    n of them is 1/(n + 1), so n ≥ 1/rate − 1."""
    return int(math.ceil(1 / false_alarm_rate)) - 1


class Calibration:
    """Conformal calibration over scores (one nonconformity score per session, higher = more
    anomalous), with numpy alone: ``calibrate(calibration_scores)`` stores them sorted as
    ``calibration_scores_`` and derives ``threshold_``: an alarm is raised exactly when a score
    is above it. ``threshold_`` is +inf when the calibration set is too small for the rate
    (fewer than 1/rate − 1 sessions); ``usable_`` then is False. The scikit-learn estimator over
    it is :class:`tracewatch.model.estimators.ConformalThreshold`; a loaded baseline holds this
    class, so scoring never imports scikit-learn."""

    def __init__(self, false_alarm_rate: float = 0.005) -> None:
        self.false_alarm_rate = false_alarm_rate

    def calibrate(self, X) -> "Calibration":
        """``X``: the calibration sessions' scores (1-D, finite)."""
        if not 0 < self.false_alarm_rate < 1:
            raise ValueError(f"false_alarm_rate must be between 0 and 1, not {self.false_alarm_rate!r}")
        cal = np.asarray(X, dtype=np.float64)
        if not np.isfinite(cal).all():
            raise ValueError("calibration scores must be finite numbers")
        if cal.ndim == 2 and cal.shape[1] == 1:
            cal = cal[:, 0]
        if cal.ndim != 1:
            raise ValueError(f"X must be scores, one per calibration session (1-D), not shape {cal.shape}")
        cal = np.sort(cal)
        n = len(cal)
        self.calibration_scores_ = cal
        # alarm iff 1 + #{cal ≥ s} ≤ rate·(n+1)  ⟺  #{cal ≥ s} ≤ m
        m = math.floor(self.false_alarm_rate * (n + 1) + 1e-9) - 1
        self.usable_ = m >= 0 and n > 0
        self.threshold_ = float(cal[n - m - 1]) if self.usable_ and m < n else (
            -math.inf if self.usable_ else math.inf)
        return self

    def p_values(self, X) -> np.ndarray:
        cal = self.calibration_scores_
        s = np.asarray(X, dtype=float)
        at_least = len(cal) - np.searchsorted(cal, s, side="left")
        return (1.0 + at_least) / (len(cal) + 1.0)

    def alarms(self, X) -> np.ndarray:
        return np.asarray(X, dtype=float) > self.threshold_
