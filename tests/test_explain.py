"""Explanations: run-length encoding and the step-by-step difference, on sequences by hand."""

from __future__ import annotations

from tracewatch.model.explain import runs, step_diff

NAMES = {1: "auth", 2: "reserve", 3: "open door", 4: "close door", 5: "record", 9: "jammed latch"}


def _diff(session, normal, unseen=()):
    return step_diff(session, normal, NAMES.__getitem__, lambda e: e not in unseen)


def test_runs():
    assert runs([1, 1, 2, 3, 3, 3, 1]) == [(1, 2), (2, 1), (3, 3), (1, 1)]


def test_missing_step():
    assert _diff([1, 2, 3, 5], [1, 2, 3, 4, 5]) == ["missing: close door"]


def test_retry_loop_is_compressed():
    assert _diff([1, 2] + [3] * 37 + [4, 5], [1, 2, 3, 4, 5]) == ["repeated ×37 (normally ×1): open door"]


def test_unseen_and_extra_steps():
    assert _diff([1, 2, 9, 3, 4, 5], [1, 2, 3, 4, 5], unseen={9}) == ["not seen before: jammed latch"]
    assert _diff([1, 2, 2, 2, 3], [1, 3]) == ["repeated ×3: reserve"]


def test_identical_sessions_have_no_difference():
    assert _diff([1, 2, 3], [1, 2, 3]) == []
