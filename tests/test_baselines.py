"""Baseline artifact: versions, CURRENT, round trip, and clear refusals of corrupt or foreign files."""

from __future__ import annotations

import hashlib
import json

import numpy as np
import pytest

from tracewatch.baselines import (current_version, list_versions, load_baseline, load_baseline_dir,
                                  set_current)
from tracewatch.errors import BaselineError, NoBaselineError

from .conftest import run_cli


def test_round_trip_scores_identically(demo_fit):
    cfg, baseline, _ = demo_fit
    loaded = load_baseline(cfg.state_dir)
    assert loaded.version == baseline.version == "v0001" == current_version(cfg.state_dir)
    seqs = list({s for s in loaded.normal_seqs[:50]}) + [(0, 1, 2, 3, 999)]
    a = baseline.make_scorer().score("api", seqs)
    b = loaded.make_scorer().score("api", seqs)
    assert np.allclose([x[0] for x in a], [x[0] for x in b])
    assert [x[1] for x in a] == [x[1] for x in b]
    assert loaded.conformal("api").threshold_ == baseline.conformal("api").threshold_
    assert np.array_equal(loaded.calibration["*"].calibration_scores_, baseline.calibration["*"].calibration_scores_)
    assert [t.id for t in loaded.miner.templates] == [t.id for t in baseline.miner.templates]


def test_corrupt_model_file_is_refused(demo_state):
    dst = demo_state / "baselines" / "v0001"
    data = bytearray((dst / "model.npz").read_bytes())
    data[len(data) // 2] ^= 0xFF
    (dst / "model.npz").write_bytes(bytes(data))
    with pytest.raises(BaselineError, match="does not match its checksum"):
        load_baseline_dir(dst)


def test_foreign_and_newer_manifests_are_refused(demo_state, tmp_path):
    dst = demo_state / "baselines" / "v0001"
    manifest = json.loads((dst / "manifest.json").read_text())
    (dst / "manifest.json").write_text(json.dumps({**manifest, "schema_version": 99}))
    with pytest.raises(BaselineError, match="schema 99 is not supported"):
        load_baseline_dir(dst)
    (dst / "manifest.json").write_text('{"hello": "world"}')
    with pytest.raises(BaselineError, match="corrupt or not a tracewatch baseline"):
        load_baseline_dir(dst)
    (dst / "manifest.json").write_text("\x00garbage")
    with pytest.raises(BaselineError, match="corrupt"):
        load_baseline_dir(dst)
    with pytest.raises(BaselineError, match="no manifest.json"):
        load_baseline_dir(tmp_path)


def test_npz_with_pickled_object_is_not_loaded(demo_state):
    # A model.npz carrying a pickled object array must never be unpickled (numpy allow_pickle=False).
    dst = demo_state / "baselines" / "v0001"
    with np.load(dst / "model.npz", allow_pickle=False) as z:
        arrays = {k: z[k] for k in z.files}
    arrays["centers"] = np.array([object()], dtype=object)
    with open(dst / "model.npz", "wb") as fh:
        np.savez(fh, **arrays)
    manifest = json.loads((dst / "manifest.json").read_text())
    manifest["files"]["model.npz"] = hashlib.sha256((dst / "model.npz").read_bytes()).hexdigest()
    (dst / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(BaselineError, match="unreadable"):
        load_baseline_dir(dst)


def test_no_baseline_says_how_to_fit(tmp_path):
    with pytest.raises(NoBaselineError, match="tracewatch fit --config"):
        load_baseline(tmp_path)


def test_versions_and_rollback(demo_fit):
    cfg = demo_fit.cfg
    assert list_versions(cfg.state_dir) == ["v0001"]
    with pytest.raises(BaselineError, match="no baseline version 'v0007'"):
        set_current(cfg.state_dir, "v0007")


def test_score_command_with_corrupt_baseline_is_one_line(demo_fit, demo_state, tmp_path):
    (demo_state / "baselines" / "v0001" / "templates.json").write_text("[]")
    conf = tmp_path / "tw.toml"
    conf.write_text(f'state_dir = "{demo_state}"\n[[sources]]\nname = "x"\n')
    proc = run_cli("score", "--config", str(conf), str(demo_fit.day))
    assert proc.returncode == 1
    assert "templates.json does not match its checksum" in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1 and "Traceback" not in proc.stderr
