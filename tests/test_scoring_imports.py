"""Scoring never imports scikit-learn: a loaded baseline holds plain fitted states
(tracewatch/features.py NgramWeights, tracewatch/model/calibrate.py Calibration), so every
`score` run and every daemon start is spared scikit-learn's import (about 1 s of CPU here)."""

from __future__ import annotations

import os
import subprocess
import sys

from .conftest import ROOT

PROBE = """
import sys
from tracewatch.cli import main
code = main(sys.argv[1:])
print("IMPORTED", sorted(m for m in ("sklearn", "scipy.stats") if m in sys.modules))
raise SystemExit(code)
"""


def test_score_does_not_import_scikit_learn(demo_fit, demo_state, tmp_path):
    cfg = tmp_path / "tw.toml"
    pattern = demo_fit.cfg.sources[0].line_pattern
    cfg.write_text(f"state_dir = '{demo_state}'\n[sessions]\nidle_timeout_s = 5\n"
                   f"[model]\nfalse_alarm_rate = 0.02\n[[sources]]\nname = 'api'\nline_pattern = '{pattern}'\n")
    proc = subprocess.run([sys.executable, "-c", PROBE, "score", "--config", str(cfg), "--source", "api",
                           str(demo_fit.day)], env=dict(os.environ, PYTHONPATH=str(ROOT)),
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    alerts = [line for line in proc.stdout.splitlines() if line.startswith("{")]
    assert len(alerts) >= 20  # the day holds 4 anomalies of each kind: scoring really ran
    assert proc.stdout.splitlines()[-1] == "IMPORTED []"
