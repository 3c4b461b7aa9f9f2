"""k for exact variants: normal traffic made of a few fixed step sequences (ticket machines at
tram stops), one of them only 3% of traffic, and an anomaly that repeats a known step 20–40
times. Over ten seeds the anomaly is caught every time and the rare variant never flagged.
"""

from __future__ import annotations

import random
from datetime import datetime, timezone

import numpy as np
import pytest
from sklearn.metrics import silhouette_score

from tracewatch.demo.scenario import GeneratedSession, generate

from .scenarios import RARE, STEPS, VARIANTS, fit_and_score, ticket_machines

RATE = 0.005


def _repeat_a_step(sess: GeneratedSession, rng: random.Random) -> None:
    """A known step repeated 20–40 times (a coin slot that keeps accepting)."""
    i = rng.randrange(1, len(sess.steps) - 1)
    times = rng.randint(20, 40)
    sess.steps[i:i + 1] = [sess.steps[i]] * times
    sess.label = "repeated_step"
    sess.times = [sess.start + 0.2 * j for j in range(len(sess.steps))]


def run(tmp_path, seed: int):
    scenario = ticket_machines()
    base = generate(scenario, 3000, seed=seed, start=datetime(2026, 11, 29, tzinfo=timezone.utc), kinds=())
    day = generate(scenario, 1500, seed=seed + 100, start=datetime(2026, 11, 30, tzinfo=timezone.utc), kinds=())
    rng = random.Random(seed)
    for sess in rng.sample(day, 20):
        _repeat_a_step(sess, rng)
    baseline, verdicts = fit_and_score(tmp_path, scenario, base, day, "tickets", false_alarm_rate=RATE)
    return baseline, day, verdicts


@pytest.mark.parametrize("seed", range(10))
def test_exact_variants_separate(tmp_path, seed):
    baseline, day, verdicts = run(tmp_path, seed)
    report = baseline.report
    bad = [s.key for s in day if s.label != "normal"]
    rare = [s.key for s in day if s.label == "normal" and s.workflow == RARE]
    normal = [s.key for s in day if s.label == "normal"]
    caught = sum(verdicts[k]["alert"] for k in bad)
    rare_flagged = sum(verdicts[k]["alert"] for k in rare)
    false_alarms = sum(verdicts[k]["alert"] for k in normal)
    print(f"\nseed {seed}: k={report['k']} knee={report['knee']} caught {caught}/{len(bad)} "
          f"rare flagged {rare_flagged}/{len(rare)} false alarms {false_alarms}/{len(normal)}")
    assert caught == len(bad)
    assert rare_flagged == 0
    assert false_alarms <= 2 * RATE * len(normal)


def test_k_is_the_number_of_variants_and_the_silhouettes_match_sklearn():
    from tracewatch.model.estimators import NgramVectorizer
    from tracewatch.model.fit import ClusterModel

    names = {name: i for i, name in enumerate(STEPS)}
    seqs = [tuple(names[s] for s in seq.split()) for _, seq in VARIANTS.values()]
    w = np.array([round(3000 * share) for share, _ in VARIANTS.values()], dtype=float)
    X = NgramVectorizer(3).fit(seqs, sample_weight=w).transform(seqs)[0]
    model = ClusterModel(k="auto", k_max=16, restarts=4, seed=0).fit(X, sample_weight=w)
    assert model.knee_ < len(VARIANTS)  # the inertia curve's knee merges the small variants
    assert model.k_ == len(VARIANTS)
    assert len(set(model.labels_.tolist())) == len(VARIANTS)
    # reference: sklearn.metrics.silhouette_score (Rousseeuw 1987) on every session, each
    # variant's row repeated by its count, for the chosen k and the knee's
    expanded = np.repeat(X.toarray(), w.astype(int), axis=0)
    for k in (model.knee_, model.k_):
        labels = ClusterModel(k=k, restarts=4, seed=0).fit(X, sample_weight=w).labels_
        ours = model.curve_[k - 1]["silhouette"]
        theirs = silhouette_score(expanded, np.repeat(labels, w.astype(int)))
        assert ours == pytest.approx(theirs, abs=1e-6)  # sklearn's zero distances carry float rounding
    assert model.curve_[model.k_ - 1]["silhouette"] == pytest.approx(1.0)
