"""Scoring stage: the baseline model (fit), its calibration, scoring and explanations."""
