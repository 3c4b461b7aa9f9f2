"""Baseline artifact: versions, CURRENT, round trip, and clear refusals of corrupt or foreign files."""

from __future__ import annotations

import hashlib
import json

import numpy as np
import orjson
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tracewatch.baselines import (current_version, list_versions, load_baseline, load_baseline_dir,
                                  save_baseline, set_current)
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


def _reseal(dst, manifest: dict | None = None) -> None:
    """Make a version's manifest match its files again (their sha256 and the manifest's own
    checksum: sha256 of the manifest without it, keys sorted, compact JSON), as a determined
    editor would: only the content checks can then refuse it."""
    manifest = manifest if manifest is not None else orjson.loads((dst / "manifest.json").read_bytes())
    manifest.pop("checksum", None)
    manifest["files"] = {name: hashlib.sha256((dst / name).read_bytes()).hexdigest()
                         for name in ("templates.json", "model.npz")}
    manifest["checksum"] = hashlib.sha256(orjson.dumps(manifest, option=orjson.OPT_SORT_KEYS)).hexdigest()
    (dst / "manifest.json").write_bytes(orjson.dumps(manifest))


def test_npz_with_pickled_object_is_not_loaded(demo_state):
    # A model.npz carrying a pickled object array must never be unpickled: its header says
    # dtype object, and nothing is read past a header that does not fit the storage table.
    dst = demo_state / "baselines" / "v0001"
    with np.load(dst / "model.npz", allow_pickle=False) as z:
        arrays = {k: z[k] for k in z.files}
    arrays["centers"] = np.array([object()], dtype=object)
    with open(dst / "model.npz", "wb") as fh:
        np.savez(fh, **arrays)
    _reseal(dst)
    with pytest.raises(BaselineError, match="unreadable"):
        load_baseline_dir(dst)


def test_a_hand_edited_manifest_is_refused(demo_state):
    # the manifest is inside its own checksum: ngram_max = 10^9 once made `score` run for minutes
    dst = demo_state / "baselines" / "v0001"
    text = (dst / "manifest.json").read_text()
    (dst / "manifest.json").write_text(text.replace('"ngram_max": 3', '"ngram_max": 1000000000'))
    with pytest.raises(BaselineError, match="manifest.json does not match its checksum"):
        load_baseline_dir(dst)
    _reseal(dst)  # sealed again: the bound refuses it
    with pytest.raises(BaselineError, match="out of bounds .*ngram_max"):
        load_baseline_dir(dst)


def test_an_older_schema_says_to_fit_again(demo_state):
    dst = demo_state / "baselines" / "v0001"
    manifest = orjson.loads((dst / "manifest.json").read_bytes())
    manifest["schema_version"] = 3
    (dst / "manifest.json").write_bytes(orjson.dumps(manifest))
    with pytest.raises(BaselineError, match="schema 3 is not supported .* older tracewatch: fit a new baseline"):
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


# -- save and load agree, whatever the sources ---------------------------------------------------
FLOWS = [(0, 1, 2, 3), (4, 5, 6), (0, 7, 7, 3), (8, 9), (1, 2, 10, 11, 3)]


def _multi_source_baseline(parts: list[tuple[str, int, int]], seed: int):
    """A baseline fitted on ``(source, flow, sessions)`` parts: each session is the flow with, at
    random, one of three optional steps inserted, so clusters have some spread."""
    from tracewatch.model.baseline import fit_baseline
    from tracewatch.config import parse_config
    from tracewatch.templates import TemplateTree

    rng = np.random.default_rng(seed)
    miner = TemplateTree()
    for e in range(15):
        miner.add_event(f"step-{e}")
    sessions = []
    for source, flow, n in parts:
        for _ in range(n):
            seq = list(FLOWS[flow])
            if rng.random() < 0.3:
                seq.insert(int(rng.integers(1, len(seq))), int(rng.integers(12, 15)))
            sessions.append((source, tuple(seq)))
    names = sorted({s for s, _, _ in parts})
    cfg = parse_config({"sources": [{"name": n} for n in names],
                        "model": {"k_max": 5, "restarts": 1, "seed": seed, "false_alarm_rate": 0.05}})
    return fit_baseline(sessions, miner, cfg), sessions


def _verdicts(baseline, sessions):
    scorer = baseline.make_scorer()
    results, p, far, unseen = baseline.judge(scorer, [s for s, _ in sessions], [q for _, q in sessions])
    return [r[0] for r in results], [r[1] for r in results], p, far | unseen


def _assert_same_verdicts(fitted, loaded, sessions):
    a, b = _verdicts(fitted, sessions), _verdicts(loaded, sessions)
    assert np.allclose(a[0], b[0], rtol=1e-9, atol=1e-12)  # scores
    assert a[1] == b[1]  # nearest clusters
    assert np.array_equal(a[2], b[2]) and np.array_equal(a[3], b[3])  # p-values, flags


def test_a_source_without_a_cluster_scores_alike_fitted_and_loaded(tmp_path):
    # "a" runs only b's flow, a few times: it owns no cluster; the clusters belong to b and c
    fitted, sessions = _multi_source_baseline([("a", 0, 4), ("b", 0, 60), ("c", 1, 60)], seed=1)
    assert sorted(set(fitted.cluster_sources)) == ["b", "c"]
    save_baseline(fitted, tmp_path)
    loaded = load_baseline(tmp_path)
    assert loaded.cluster_sources == fitted.cluster_sources
    normal_b = [("b", FLOWS[0])]  # b's own flow: no alarm, fitted or loaded
    assert not _verdicts(fitted, normal_b)[3][0] and not _verdicts(loaded, normal_b)[3][0]
    _assert_same_verdicts(fitted, loaded, sessions + [(s, FLOWS[4]) for s in "abcz"])


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.tuples(st.sampled_from("abcd"), st.integers(0, len(FLOWS) - 1), st.integers(1, 40)),
                min_size=2, max_size=6).filter(lambda parts: sum(n for _, _, n in parts) >= 30),
       st.integers(0, 2**16))
def test_fitted_and_loaded_baselines_give_identical_verdicts(tmp_path_factory, parts, seed):
    """Property: for any mix of sources and flows, every session (of the fit, of another flow, of
    a source the baseline never saw) gets the same verdict from the fitted and the loaded baseline."""
    fitted, sessions = _multi_source_baseline(parts, seed)
    state = tmp_path_factory.mktemp("multi")
    save_baseline(fitted, state)
    loaded = load_baseline(state)
    probes = [(s, flow) for s in "abcdz" for flow in FLOWS]
    _assert_same_verdicts(fitted, loaded, sessions + probes)


# -- a state_dir that cannot be written ------------------------------------------------------------
@pytest.mark.parametrize("where", ["under-a-file", "is-a-file"])
def test_fit_into_an_unwritable_state_dir_is_one_line_before_any_work(demo_fit, tmp_path, where):
    # root ignores file modes, so the state_dir is made unusable by a plain file in its way
    (tmp_path / "blocker").write_text("a file, not a folder\n")
    state = tmp_path / "blocker" / "state" if where == "under-a-file" else tmp_path / "blocker"
    conf = tmp_path / "tw.toml"
    conf.write_text(f'state_dir = "{state}"\n[[sources]]\nname = "api"\n'
                    f"line_pattern = '''{demo_fit.cfg.sources[0].line_pattern}'''\n")
    proc = run_cli("fit", "--config", str(conf), str(demo_fit.day))
    assert proc.returncode == 1
    assert proc.stderr.startswith("tracewatch: ") and "cannot write baselines" in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1 and "Traceback" not in proc.stderr
    # checked before reading and fitting: a one-session input would otherwise be refused by the fit
    one = tmp_path / "one.log"
    one.write_text(demo_fit.day.read_text().splitlines()[0] + "\n")
    proc = run_cli("fit", "--config", str(conf), str(one))
    assert proc.returncode == 1 and "cannot write baselines" in proc.stderr and "sessions found" not in proc.stderr
