"""Split-conformal threshold: the p-value formula by hand, and the false-alarm rate it delivers."""

from __future__ import annotations

import math

import numpy as np
import pytest

from tracewatch.model.estimators import ConformalThreshold


def test_p_values_by_hand():
    ct = ConformalThreshold(0.25).fit([1, 2, 3, 4, 5, 6, 7])
    # p = (1 + #{cal ≥ s}) / (n + 1), n = 7
    assert np.allclose(ct.p_values([0, 4, 7, 8]), [8 / 8, 5 / 8, 2 / 8, 1 / 8])
    # alarm iff p ≤ 0.25 ⟺ #{cal ≥ s} ≤ 1 ⟺ s > 6
    assert ct.threshold_ == 6
    assert list(ct.alarms([6, 6.5, 7])) == [False, True, True]


def test_too_small_calibration_set_never_alarms():
    ct = ConformalThreshold(0.005).fit(np.arange(50.0))
    assert not ct.usable_ and math.isinf(ct.threshold_)
    assert not ct.alarms([1e9]).any()


@pytest.mark.parametrize("rate", [0.005, 0.05], ids=["0.5%", "5%"])
def test_false_alarm_rate_on_exchangeable_data(rate):
    # Vovk et al. 2005: with exchangeable scores, P(p ≤ rate) ≤ rate, and ≥ rate − 1/(n+1).
    rng = np.random.default_rng(11)
    n, m, trials = 999, 20_000, 40
    rates = []
    for _ in range(trials):
        ct = ConformalThreshold(rate).fit(rng.gamma(2.0, size=n))
        rates.append(ct.alarms(rng.gamma(2.0, size=m)).mean())
    mean = float(np.mean(rates))
    # sampling error: the marginal rate is between rate − 1/(n+1) and rate; allow 4 standard
    # errors of the mean over trials on top
    se = np.std(rates) / math.sqrt(trials)
    assert rate - 1 / (n + 1) - 4 * se <= mean <= rate + 4 * se
    # the threshold and the p-values are the same rule
    ct = ConformalThreshold(rate).fit(rng.gamma(2.0, size=n))
    s = rng.gamma(2.0, size=m)
    assert np.array_equal(ct.p_values(s) <= rate, ct.alarms(s))
