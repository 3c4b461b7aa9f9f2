"""Baseline artifact: versions, CURRENT, round trip, and clear refusals of corrupt or foreign files."""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
import sys
import warnings
import zipfile
from pathlib import Path

import numpy as np
import orjson
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from tracewatch.baselines import (current_version, list_versions, load_baseline, load_baseline_dir,
                                  save_baseline, set_current)
from tracewatch.errors import BaselineError, NoBaselineError
from tracewatch.model.score import SCORERS

from .conftest import ROOT, run_cli


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


def _reseal(dst, manifest: dict | None = None, *, files: bool = True) -> None:
    """Make a version's manifest match its files again (their sha256 and the manifest's own
    checksum: sha256 of the manifest without it, keys sorted, compact JSON), as a determined
    editor would: only the content checks can then refuse it."""
    manifest = manifest if manifest is not None else orjson.loads((dst / "manifest.json").read_bytes())
    manifest.pop("checksum", None)
    if files:
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


def _multi_source_baseline(parts: list[tuple[str, int, int]], seed: int, scorer: str = "centroid"):
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
                        "model": {"k_max": 5, "restarts": 1, "seed": seed, "false_alarm_rate": 0.05,
                                  "scorer": scorer}})
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


# -- tampered baselines: one line, exit 1, never a hang ------------------------------------------------
DELETE = object()
HUGE = 2**64 - 1  # the largest whole number orjson writes; a longer one reads as a float
# (path in manifest.json, a value out of its bounds or of the wrong kind); DELETE removes the key
MANIFEST_EDITS = [
    *[(("schema_version",), v) for v in ("5", None, 3.5, DELETE)],
    *[(("kind",), v) for v in ("tracewatch-other", None)],
    *[(("version",), v) for v in ("v1", "../v0001", 7)],
    (("created",), "x" * 65), (("tracewatch",), ["0.1"]),
    *[(("files",), v) for v in ({}, {"model.npz": "0" * 64}, {"templates.json": "zz", "model.npz": "0" * 64})],
    *[(("ngram_max",), v) for v in (0, 6, -1, 10**9, HUGE, "3", None, 2.5, DELETE)],
    *[(("false_alarm_rate",), v) for v in (0, 0.5, -0.01, 7, 1e308, "often")],
    *[(("scorer",), v) for v in ("nearest", "", 3, DELETE)],
    *[(("scorer_params",), v) for v in ({}, {"unseen_weight": -1, "knn_k": 0}, {"unseen_weight": 1e300, "knn_k": HUGE},
                                        {"unseen_weight": 5.0, "knn_k": 1, "extra": 1})],
    *[(("sources",), v) for v in ([], ["*"], ["*", "*", "a"], ["*", "a", "bad name"], ["*", "a" * 300], "a")],
    *[(("report", "k"), v) for v in (0, -1, 10**9)],
    *[(("report", "sessions"), v) for v in (-1, HUGE, "many")],
    *[(("report", "curve"), v) for v in ("x", [{"k": 1}], [{"k": 1, "inertia": -1.0, "silhouette": None}])],
    *[(("report", "notes"), v) for v in (["x" * 70_000], [1])],
    (("report", "thresholds"), {"a": {"threshold": "high", "calibration_sessions": 1}}),
    (("report", "clusters"), [{"cluster": 0}]), (("report", "false_alarm_rate"), 0.9),
    *[(("report",), v) for v in (None, [], {"sessions": 1})],
    (("report", "surprise"), 1), (("surprise",), 1),
]
ARRAY_EDITS = ["dtype", "drop", "add", "extra-dim", "empty", "nan", "inf", "negative", "huge", "missing"]
NPZ_EDITS = ["truncate", "random", "bzip2", "huge-shape", "fortran", "npy-3.0", "twice", "not-npy", "extra"]
TEMPLATE_EDITS = [
    ("routing_tokens", 0), ("routing_tokens", 7), ("routing_tokens", "two"), ("join_share", 0),
    ("join_share", 1.5), ("max_branches", 1), ("max_branches", 10**9), ("templates", "none"), ("surprise", 1),
    ("0.tokens", []), ("0.count", -1), ("0.count", HUGE), ("0.id", "XYZ"), ("0.surprise", 1),
    ("0.template", "x" * 70_000), ("0.structured", []), ("0.path", ["x"] * 65), ("1.id", "copy of 0"),
    ("templates", "first three"), ("json", "truncated"), ("json", "a list"),
]
SPECIAL = ["fifo-model", "fifo-manifest", "zero-templates", "fifo-current", "current-elsewhere", "huge-manifest",
           "nested-manifest", "no-templates"]
UNSEALED = ["manifest", "templates", "model"]

TAMPERS = st.one_of(
    st.tuples(st.just("manifest"), st.sampled_from(range(len(MANIFEST_EDITS)))),
    st.tuples(st.just("array"), st.sampled_from(range(40)), st.sampled_from(ARRAY_EDITS), st.integers(0, 2**20)),
    st.tuples(st.just("npz"), st.sampled_from(NPZ_EDITS), st.integers(0, 2**20)),
    st.tuples(st.just("templates"), st.sampled_from(range(len(TEMPLATE_EDITS)))),
    st.tuples(st.just("unsealed"), st.sampled_from(UNSEALED)),
    st.tuples(st.just("special"), st.sampled_from(SPECIAL)),
)


@pytest.fixture(scope="module")
def pristine(tmp_path_factory) -> dict[str, Path]:
    """A saved baseline of each scorer (three sources, five flows): the state folders tests copy."""
    out = {}
    for scorer in sorted(SCORERS):
        state = tmp_path_factory.mktemp(f"pristine-{scorer}")
        fitted, _ = _multi_source_baseline([("a", 0, 40), ("a", 1, 30), ("b", 2, 40), ("c", 4, 30)], 3, scorer)
        save_baseline(fitted, state)
        out[scorer] = state
    return out


def _npz_arrays(dst: Path) -> dict[str, np.ndarray]:
    with np.load(dst / "model.npz", allow_pickle=False) as z:
        return {k: z[k] for k in z.files}


def _save_npz(dst: Path, arrays: dict) -> None:
    with open(dst / "model.npz", "wb") as fh:
        np.savez_compressed(fh, **arrays)


def _edit_array(x: np.ndarray, edit: str, pick: int) -> np.ndarray | None:
    """The array after one edit that no baseline can hold (None: the array is gone)."""
    if edit == "dtype":
        others = [t for t in ("<f8", "<f4", "<i8", "<i4", ">f8", "?", "<c16", "<U4") if np.dtype(t) != x.dtype]
        return x.astype(others[pick % len(others)])
    if edit == "drop":
        return x[:-1] if len(x) else np.zeros((1, *x.shape[1:]), x.dtype)
    if edit == "add":
        return np.concatenate([x, x[-1:] if len(x) else np.zeros((1, *x.shape[1:]), x.dtype)])
    if edit == "extra-dim":
        return x[None]
    if edit == "empty":
        return x[:0] if len(x) else np.zeros((1, *x.shape[1:]), x.dtype)
    if edit == "missing":
        return None
    x = x.copy()
    flat = x.reshape(-1)
    if not len(flat):  # nothing to change: an element that cannot be there
        return np.ones(1, x.dtype)
    i = pick % len(flat)
    floats = x.dtype.kind == "f"
    with np.errstate(over="ignore"):  # 1e300 in a float32 array is inf: refused all the same
        flat[i] = {"nan": np.nan if floats else -7, "inf": np.inf if floats else 2**62, "negative": -7,
                   "huge": 1e300 if floats else 2**62}[edit]
    return x


def _edit_npz(dst: Path, edit: str, pick: int) -> None:
    path = dst / "model.npz"
    data = path.read_bytes()
    arrays = _npz_arrays(dst)
    if edit == "truncate":
        path.write_bytes(data[: pick % len(data)])
    elif edit == "random":
        path.write_bytes(np.random.default_rng(pick).bytes(len(data)))
    elif edit in ("bzip2", "twice", "not-npy", "huge-shape", "npy-3.0"):
        import io

        compression = zipfile.ZIP_BZIP2 if edit == "bzip2" else zipfile.ZIP_DEFLATED
        with zipfile.ZipFile(path, "w", compression) as zf, warnings.catch_warnings():
            warnings.simplefilter("ignore")  # "Duplicate name" is the point of "twice"
            for k, v in arrays.items():
                buf = io.BytesIO()
                np.lib.format.write_array(buf, v, version=(3, 0) if edit == "npy-3.0" else None)
                raw = buf.getvalue()
                if edit == "huge-shape" and k == "centers":  # a header announcing 10^12 × V floats
                    header = {"descr": "<f8", "fortran_order": False, "shape": (10**12, v.shape[1])}
                    buf = io.BytesIO()
                    np.lib.format.write_array_header_1_0(buf, header)
                    raw = buf.getvalue() + v.tobytes()
                zf.writestr(f"{k}.npy", raw)
            if edit == "twice":
                zf.writestr("idf.npy", raw)
            if edit == "not-npy":
                zf.writestr("notes.txt", b"hello")
    elif edit == "fortran":
        arrays["centers"] = np.asfortranarray(arrays["centers"])
        _save_npz(dst, arrays)
    elif edit == "extra":
        arrays["surprise"] = np.zeros(3)
        _save_npz(dst, arrays)


def _set(doc, path: str, value) -> None:
    keys = [int(k) if k.isdigit() else k for k in path.split(".")]
    for k in keys[:-1]:
        doc = doc[k]
    doc[keys[-1]] = value


def _apply(state: Path, tamper: tuple) -> str:
    """Damage the baseline in ``state`` as ``tamper`` says; returns what was done."""
    dst = state / "baselines" / "v0001"
    kind = tamper[0]
    manifest = orjson.loads((dst / "manifest.json").read_bytes())
    if kind == "manifest":
        path, value = MANIFEST_EDITS[tamper[1]]
        target = manifest
        for k in path[:-1]:
            target = target[k]
        if value is DELETE:
            del target[path[-1]]
        else:
            target[path[-1]] = value
        _reseal(dst, manifest, files=False)
        return f"manifest {'.'.join(path)} = {str(value)[:40] if value is not DELETE else '(deleted)'}"
    if kind == "array":
        arrays = _npz_arrays(dst)
        name = sorted(arrays)[tamper[1] % len(arrays)]
        edited = _edit_array(arrays[name], tamper[2], tamper[3])
        if edited is None:
            del arrays[name]
        else:
            arrays[name] = edited
        _save_npz(dst, arrays)  # (np.savez pickles an object array; loading never may unpickle it)
        _reseal(dst)
        return f"array {name}: {tamper[2]}"
    if kind == "npz":
        _edit_npz(dst, tamper[1], tamper[2])
        _reseal(dst)
        return f"model.npz: {tamper[1]}"
    if kind == "templates":
        what, value = TEMPLATE_EDITS[tamper[1]]
        doc = orjson.loads((dst / "templates.json").read_bytes())
        if what == "json":
            raw = orjson.dumps(doc)
            (dst / "templates.json").write_bytes(raw[: len(raw) // 2] if value == "truncated" else b"[1, 2]")
        else:
            if value == "first three":
                value = doc["templates"][:3]
            elif value == "copy of 0":
                value = doc["templates"][0]["id"]
            _set(doc if not what[0].isdigit() else doc["templates"], what, value)
            (dst / "templates.json").write_bytes(orjson.dumps(doc))
        _reseal(dst)
        return f"templates.json {what} = {str(value)[:40]}"
    if kind == "unsealed":  # an edit that is valid in itself, the checksum alone refuses it
        if tamper[1] == "manifest":
            manifest["false_alarm_rate"] = 0.01
            (dst / "manifest.json").write_bytes(orjson.dumps(manifest))
        elif tamper[1] == "templates":
            doc = orjson.loads((dst / "templates.json").read_bytes())
            doc["templates"][0]["count"] += 1
            (dst / "templates.json").write_bytes(orjson.dumps(doc))
        else:
            arrays = _npz_arrays(dst)
            with open(dst / "model.npz", "wb") as fh:
                np.savez(fh, **arrays)  # the same arrays, stored uncompressed
        return f"unsealed edit of {tamper[1]}"
    special = tamper[1]
    if special in ("fifo-model", "fifo-manifest", "fifo-current"):
        target = {"fifo-model": dst / "model.npz", "fifo-manifest": dst / "manifest.json",
                  "fifo-current": state / "baselines" / "CURRENT"}[special]
        target.unlink()
        os.mkfifo(target)
    elif special == "zero-templates":
        (dst / "templates.json").unlink()
        (dst / "templates.json").symlink_to("/dev/zero")
    elif special == "current-elsewhere":
        (state / "baselines" / "CURRENT").write_text("../../../etc\n")
    elif special == "huge-manifest":
        manifest["report"]["notes"] = ["x" * 60_000] * 300  # 18 MB
        _reseal(dst, manifest, files=False)
    elif special == "nested-manifest":
        (dst / "manifest.json").write_bytes(b"[" * 100_000 + b"]" * 100_000)
    elif special == "no-templates":
        (dst / "templates.json").unlink()
    return special


def _tampered(pristine: dict, tmp: Path, scorer: str, tamper: tuple) -> tuple[Path, str]:
    state = Path(shutil.copytree(pristine[scorer], tmp / "state"))
    return state, _apply(state, tamper)


@settings(max_examples=250, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(scorer=st.sampled_from(sorted(SCORERS)), tamper=TAMPERS)
def test_every_tampered_baseline_is_refused_in_one_line(pristine, tmp_path_factory, scorer, tamper):
    """Property (in-process, many examples): any field out of range, any wrong shape, dtype or
    value, a damaged or odd model.npz, edited templates, odd files: BaselineError, one line."""
    state, what = _tampered(pristine, tmp_path_factory.mktemp("tamper"), scorer, tamper)
    with pytest.raises(BaselineError) as caught:
        load_baseline(state)
    message = str(caught.value)
    assert message and "\n" not in message, what
    assert len(message) < 600, what  # a sentence, not a dump


@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(scorer=st.sampled_from(sorted(SCORERS)), tamper=TAMPERS)
@example(scorer="centroid", tamper=("manifest", MANIFEST_EDITS.index((("ngram_max",), 10**9))))
@example(scorer="knn", tamper=("array", 0, "dtype", 0))
@example(scorer="centroid", tamper=("array", 3, "drop", 0))
@example(scorer="knn", tamper=("array", 11, "huge", 5))
@example(scorer="centroid", tamper=("npz", "truncate", 999))
@example(scorer="centroid", tamper=("npz", "huge-shape", 0))
@example(scorer="centroid", tamper=("templates", 0))
@example(scorer="centroid", tamper=("unsealed", "manifest"))
@example(scorer="centroid", tamper=("special", "fifo-model"))
@example(scorer="centroid", tamper=("special", "fifo-current"))
@example(scorer="centroid", tamper=("special", "zero-templates"))
@example(scorer="centroid", tamper=("special", "huge-manifest"))
def test_score_refuses_a_tampered_baseline_in_one_line_without_hanging(pristine, tmp_path_factory, scorer, tamper):
    """Property through the real command: `tracewatch score` on a tampered baseline prints one
    line, exits 1 and ends (the timeout only proves it does not hang; timings are in bench/)."""
    tmp = tmp_path_factory.mktemp("tamper-cli")
    state, what = _tampered(pristine, tmp, scorer, tamper)
    conf = tmp / "tw.toml"
    conf.write_text(f'state_dir = "{state}"\n[[sources]]\nname = "a"\n')
    log = tmp / "a.log"
    log.write_text("one line\n")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.run([sys.executable, "-m", "tracewatch", "score", "--config", str(conf), str(log)],
                          env=env, cwd=tmp, capture_output=True, text=True, timeout=20)
    assert proc.returncode == 1, (what, proc.stderr)
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("tracewatch: ") and "Traceback" not in proc.stderr, (what, proc.stderr)
    assert proc.stdout == "", what
