"""Baseline refit: the quiet-session pool, the gates, the daemon's periodic refit and the command.

What must hold: a refit learns a new normal variant that on-call declared expected and still
flags injected anomalies; it refuses a candidate that would learn a labelled known problem,
one whose false alarms on the most recent sessions are too many, and one fitted on too few
sessions; the pool survives restarts and a corrupt pool file is a clear message; the daemon
refits on its own clock and the hot reload switches to the new baseline.
"""

from __future__ import annotations

import json
import logging
import shutil
from collections import defaultdict
from datetime import datetime, timezone
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tracewatch.alerts.incidents import IncidentTracker
from tracewatch.alerts.store import IncidentStore
from tracewatch.baselines import baselines_dir, current_version, list_versions, load_baseline
from tracewatch.batch import assign_sources, fit_files, run_files, score_files
from tracewatch.config import Config, parse_config
from tracewatch.demo.scenario import (ANOMALY_KINDS, Scenario, Step, _novel_jam, generate, parcel_lockers, pickup,
                                      render_text)
from tracewatch.errors import ConfigError, StateError
from tracewatch.pipeline import Pipeline
from tracewatch.refit import (POOL_FILE, QuietPool, add_incidents, binomial_tail, refit, refit_data,
                              refit_files)

from .conftest import run_cli
from .daemon_helpers import FakeWall, InProcess, free_port

RATE = 0.02  # small pools: a calibration set needs 1/RATE - 1 = 49 sessions
SC = parcel_lockers()
DAY = 86_400.0


# -- generated traffic ---------------------------------------------------------------------------------
def camera_pickup(rng) -> list[Step]:
    """After a deployment every pickup also stores a camera snapshot: a new normal step."""
    steps = pickup(rng)
    steps.insert(1, Step("locker camera", f"camera snapshot {rng.getrandbits(32):08x} stored for audit"))
    return steps


def deployed() -> Scenario:
    sc = parcel_lockers()
    sc.workflows["pickup"] = (0.35, camera_pickup)
    return sc


def only(*names: str) -> Scenario:
    sc = parcel_lockers()
    sc.workflows = {n: sc.workflows[n] for n in names}
    return sc


def write_log(path: Path, parts: list[tuple[Scenario, int, int, int]], kinds=ANOMALY_KINDS) -> list:
    """``(scenario, normal sessions, anomalies per kind, seed)`` parts, one day after another."""
    sessions, lines = [], []
    for day, (sc, n, per_kind, seed) in enumerate(parts):
        part = generate(sc, n, per_kind, seed=seed, start=datetime(2026, 12, 1 + day, tzinfo=timezone.utc),
                        span_s=DAY / 2, kinds=kinds)
        sessions += part
        lines += render_text(sc, part)
    path.write_text("\n".join(lines) + "\n")
    return sessions


def config_dict(folder: Path, **refit) -> dict:
    return {"state_dir": str(folder / "state"),
            "sources": [{"name": "api", "paths": [str(folder / "logs" / "*.log")], "line_pattern": SC.line_pattern,
                         "start_at": "beginning"}],
            "model": {"false_alarm_rate": RATE, "k_max": 8},
            "refit": {"min_sessions": 200, "pool_size": 2000, **refit}}


@pytest.fixture(scope="module")
def fitted(tmp_path_factory) -> Path:
    """v0001, fitted once on 800 sessions of the parcel-locker demo; tests copy it."""
    root = tmp_path_factory.mktemp("refit")
    cfg = parse_config(config_dict(root))
    write_log(root / "base.log", [(SC, 800, 0, 1)])
    fit_files(cfg, assign_sources(cfg, [str(root / "base.log")]))
    return baselines_dir(cfg.state_dir)


def workspace(fitted: Path, tmp_path: Path, **refit) -> Config:
    shutil.copytree(fitted, baselines_dir(tmp_path / "state"))
    (tmp_path / "logs").mkdir()
    return parse_config(config_dict(tmp_path, **refit))


def verdicts(cfg: Config, path: Path, baseline) -> dict[str, dict]:
    out: dict[str, dict] = {}
    score_files(cfg, assign_sources(cfg, [str(path)]), baseline, lambda v: out.__setitem__(v["session_key"], v),
                score_all=True)
    return out


def group_alerts(cfg: Config, path: Path, baseline) -> tuple[IncidentStore, dict[int, list[dict]]]:
    """Score ``path`` and group its alerts into incidents in the state's real incident store."""
    store = IncidentStore.open(cfg.state_dir)
    tracker = IncidentTracker(store, cfg.incidents)
    members: dict[int, list[dict]] = defaultdict(list)
    score_files(cfg, assign_sources(cfg, [str(path)]), baseline,
                lambda v: members[tracker.add(v)].append(v))
    return store, members


# -- reference checks ------------------------------------------------------------------------------------
@pytest.mark.parametrize("k, n, p, expected", [
    # by hand: P(X ≥ 3) = 1 − Σ_{j=0..2} C(10, j) 0.1^j 0.9^(10−j)
    #        = 1 − (0.3486784401 + 0.3874204890 + 0.1937102445)
    (3, 10, 0.1, 0.0701908264),
    (1, 10, 0.1, 1 - 0.9 ** 10),  # P(X ≥ 1) = 1 − P(X = 0)
    (0, 10, 0.1, 1.0),
    (11, 10, 0.1, 0.0),
], ids=["tail-3-of-10", "at-least-one", "at-least-zero", "more-than-n"])
def test_binomial_tail_against_hand_computed_values(k, n, p, expected):
    assert binomial_tail(k, n, p) == pytest.approx(expected, abs=1e-10)


def test_reservoir_keeps_every_session_with_the_same_probability():
    """Algorithm R (Vitter 1985, ACM TOMS 11(1)): after n offers each session is kept with
    probability capacity / n — here 5 / 20 = 0.25, over 2000 independently seeded pools."""
    kept = [0] * 20
    for seed in range(2000):
        pool = QuietPool(5, seed)
        for i in range(20):
            pool.offer_ids("api", (f"t{i}",))
        assert pool.sizes() == {"api": 5}
        for _, _, ids in pool.sessions():
            kept[int(ids[0][1:])] += 1
    shares = [k / 2000 for k in kept]
    # 4 standard deviations of a share estimated from 2000 pools: 4·√(0.25·0.75/2000) ≈ 0.039
    assert all(abs(s - 0.25) < 0.039 for s in shares), shares


def test_pool_survives_a_restart_and_makes_the_same_choices(tmp_path):
    path = tmp_path / POOL_FILE
    whole = QuietPool(50, seed=3)
    first = QuietPool(50, seed=3)
    for i in range(300):
        whole.offer_ids("api" if i % 3 else "trace", (f"a{i % 7}", f"b{i}"))
    for i in range(150):
        first.offer_ids("api" if i % 3 else "trace", (f"a{i % 7}", f"b{i}"))
    first.baseline_version, first.last_refit = "v0001", 123.5
    first.save(path)
    again = QuietPool.load(path, 50, seed=99)  # the saved generator state wins over the seed
    assert (again.baseline_version, again.last_refit, again.dirty) == ("v0001", 123.5, False)
    assert again.sessions() == first.sessions() and again.seen() == first.seen()
    for i in range(150, 300):
        again.offer_ids("api" if i % 3 else "trace", (f"a{i % 7}", f"b{i}"))
    assert sorted(again.sessions()) == sorted(whole.sessions())
    smaller = QuietPool.load(path, 10)
    assert smaller.sizes() == {"api": 10, "trace": 10}
    assert set(smaller.sessions()) <= set(first.sessions())
    assert QuietPool.load(tmp_path / "missing.json", 10).sessions() == []


def _valid_pool_doc() -> dict:
    pool = QuietPool(5)
    pool.offer_ids("api", ("x", "y"))
    return json.loads(pool.to_json())


@pytest.mark.parametrize("damage, why", [
    (lambda d: b"\x00garbage", "unexpected character"),
    (lambda d: {**d, "kind": "something-else"}, "not a tracewatch refit pool"),
    (lambda d: {**d, "schema_version": 99}, "schema 99 is not supported"),
    (lambda d: {**d, "templates": []}, "template index is out of range"),
    (lambda d: {**d, "rng_state": [3, [1, 2, 3], None]}, "wrong size"),
    (lambda d: {k: v for k, v in d.items() if k != "sources"}, "sources"),
], ids=["not-json", "foreign", "newer-schema", "index-out-of-range", "bad-generator-state", "missing-key"])
def test_a_corrupt_pool_file_is_one_clear_message(tmp_path, damage, why):
    path = tmp_path / POOL_FILE
    doc = damage(_valid_pool_doc())
    path.write_bytes(doc if isinstance(doc, bytes) else json.dumps(doc).encode())
    with pytest.raises(StateError) as err:
        QuietPool.load(path, 5)
    message = str(err.value)
    assert message.startswith(f"{path}: not a usable refit pool") and why in message
    assert "move it away" in message and "\n" not in message


POOL_TAMPERS = {  # each one a load must refuse in one line
    "generator-word-too-big": lambda d: {**d, "rng_state": [3, [2**70] * 625, None]},
    "generator-position-past-the-end": lambda d: {**d, "rng_state": [3, d["rng_state"][1][:-1] + [10**6], None]},
    "generator-gauss-infinite": lambda d: {**d, "rng_state": [3, d["rng_state"][1], 1e999]},
    "last-refit-negative": lambda d: {**d, "last_refit": -1.0},
    "baseline-outside-the-state-folder": lambda d: {**d, "baseline_version": "../../etc"},
    "arrival-past-seen": lambda d: {**d, "sources": {"api": {"seen": 1, "arrivals": [10**12], "sessions": [[0]]}}},
    "negative-index": lambda d: {**d, "sources": {"api": {"seen": 1, "arrivals": [1], "sessions": [[-1]]}}},
}


@pytest.mark.parametrize("name", list(POOL_TAMPERS))
def test_an_out_of_range_pool_file_is_refused_in_one_line(tmp_path, name):
    path = tmp_path / POOL_FILE
    path.write_text(json.dumps(POOL_TAMPERS[name](_valid_pool_doc())))
    with pytest.raises(StateError) as err:
        QuietPool.load(path, 5)
    assert "not a usable refit pool" in str(err.value) and "\n" not in str(err.value)


@settings(max_examples=150, deadline=None)
@given(where=st.sampled_from(["kind", "schema_version", "baseline_version", "last_refit", "rng_state", "templates",
                              "sources"]),
       value=st.one_of(st.none(), st.booleans(), st.integers(), st.floats(), st.text(max_size=30),
                       st.lists(st.integers(), max_size=700), st.dictionaries(st.text(max_size=5), st.integers(),
                                                                              max_size=3)))
def test_a_tampered_pool_file_is_refused_in_one_line_or_loads_within_its_bounds(tmp_path_factory, where, value):
    """One field of the refit pool replaced by anything: refused in one line, or a pool no larger
    than its capacity whose numbers agree."""
    path = tmp_path_factory.mktemp("pool") / POOL_FILE
    path.write_text(json.dumps({**_valid_pool_doc(), where: value}))
    try:
        pool = QuietPool.load(path, 5)
    except StateError as exc:
        assert "\n" not in str(exc) and "move it away" in str(exc)
        return
    assert all(n <= 5 for n in pool.sizes().values())
    assert all(pool.seen()[src] >= n for src, n in pool.sizes().items())


# -- the gates -------------------------------------------------------------------------------------------
def test_refit_learns_a_new_normal_variant_and_still_flags_anomalies(fitted, tmp_path):
    cfg = workspace(fitted, tmp_path, gate_open_incidents=False)
    old = load_baseline(cfg.state_dir)
    day = tmp_path / "logs" / "day.log"
    write_log(day, [(deployed(), 1000, 0, 2)])
    store, members = group_alerts(cfg, day, old)
    camera = max(members, key=lambda iid: len(members[iid]))
    assert len(members[camera]) > 250  # the new step raised an incident of its own
    assert store.set_label(camera, "expected", by="on-call", now=0.0)  # on-call: a deployment, not a fault
    store.close()

    report = refit_files(cfg, assign_sources(cfg, [str(day)]))
    assert report["outcome"] == "promoted", report
    assert current_version(cfg.state_dir) == report["version"] == "v0002"
    assert all(g["passed"] for g in report["gates"])
    new = load_baseline(cfg.state_dir)
    assert new.report["refit"]["outcome"] == "promoted"  # the gates' report is kept with the candidate

    later = write_log(tmp_path / "later.log", [(deployed(), 600, 10, 3)])
    before, after = verdicts(cfg, tmp_path / "later.log", old), verdicts(cfg, tmp_path / "later.log", new)

    def share(base: dict, kind: str) -> float:
        keys = [s.key for s in later if (s.label if s.label != "normal" else
                                         "variant" if s.workflow == "pickup" else "normal") == kind]
        return sum(base[k]["alert"] for k in keys) / len(keys)

    assert share(before, "variant") > 0.9 and share(after, "variant") < 0.02
    for kind in ANOMALY_KINDS:  # 10 injected sessions of each kind
        assert share(after, kind) >= 0.9, kind
    assert share(after, "normal") <= 2 * RATE


def test_incident_gate_refuses_a_candidate_that_would_learn_a_known_problem(fitted, tmp_path):
    cfg = workspace(fitted, tmp_path, gate_open_incidents=False)
    old = load_baseline(cfg.state_dir)
    jams = parcel_lockers()
    jams.novel = [_novel_jam]
    day = tmp_path / "logs" / "day.log"
    write_log(day, [(jams, 700, 80, 4)], kinds=("unseen_event",))
    store, members = group_alerts(cfg, day, old)
    latch = max(members, key=lambda iid: len(members[iid]))
    assert any("latch" in u["template"] for u in members[latch][0]["unseen_events"])
    assert store.set_label(latch, "latch-jam", by="on-call", now=0.0)

    def data_for(pool_alerts: bool):
        pool = QuietPool(2000)
        pipe = Pipeline(cfg, load_baseline(cfg.state_dir),
                        on_verdict=(lambda v: pool.offer_alert(v)) if pool_alerts else None)
        pipe.on_quiet = lambda source, seq: pool.offer(source, seq, pipe.miner.templates)
        run_files(pipe, assign_sources(cfg, [str(day)]))
        data = refit_data(pool, pipe.miner, "v0001")
        add_incidents(data, store)
        return data

    try:
        # a pool holding the latch-jam sessions as if they had raised nothing
        report, candidate = refit(data_for(True), cfg, cfg.state_dir)
        gate = {g["gate"]: g for g in report["gates"]}["known_problems"]
        assert report["outcome"] == "refused" and not gate["passed"]
        assert gate["missed_incidents"] == [latch] and f"#{latch}" in gate["detail"]
        assert list_versions(cfg.state_dir) == ["v0001", "v0002"]  # saved, with its report …
        assert current_version(cfg.state_dir) == "v0001"  # … but not made current
        assert load_baseline(cfg.state_dir, "v0002").report["refit"]["outcome"] == "refused"
        # the same gate passes for a pool of quiet sessions only: the candidate still flags them
        report, _ = refit(data_for(False), cfg, None)
        assert {g["gate"]: g["passed"] for g in report["gates"]}["known_problems"]
        assert report["outcome"] == "passed"
    finally:
        store.close()


def test_pool_size_gate_skips_the_fit(fitted, tmp_path):
    cfg = workspace(fitted, tmp_path, min_sessions=500)
    day = tmp_path / "logs" / "day.log"
    write_log(day, [(SC, 300, 0, 5)])
    report = refit_files(cfg, assign_sources(cfg, [str(day)]))
    assert report["outcome"] == "skipped" and report["version"] is None
    assert [(g["gate"], g["passed"]) for g in report["gates"]] == [("pool_size", False)]
    assert list_versions(cfg.state_dir) == ["v0001"]


# -- the command ------------------------------------------------------------------------------------------
def _toml(cfg_dict: dict) -> str:
    src = cfg_dict["sources"][0]
    refit = "\n".join(f"{k} = {json.dumps(v)}" for k, v in cfg_dict["refit"].items())
    return (f"state_dir = {json.dumps(cfg_dict['state_dir'])}\n\n[[sources]]\nname = \"api\"\n"
            f"paths = {json.dumps(src['paths'])}\nline_pattern = '{src['line_pattern']}'\nstart_at = \"beginning\"\n\n"
            f"[model]\nfalse_alarm_rate = {RATE}\nk_max = 8\n\n[refit]\n{refit}\n")


def test_command_dry_run_promote_and_holdout_refusal(fitted, tmp_path):
    workspace(fitted, tmp_path)
    cfg_path = tmp_path / "tw.toml"
    cfg_path.write_text(_toml(config_dict(tmp_path, holdout_share=0.25)))
    day = tmp_path / "logs" / "day.log"
    write_log(day, [(SC, 800, 0, 6)])

    proc = run_cli("baselines", "refit", "--config", str(cfg_path), "--dry-run", str(day))
    assert proc.returncode == 0, proc.stderr
    assert "refit of v0001: candidate (not saved) passed the gates" in proc.stdout and "holdout" in proc.stdout
    assert list_versions(tmp_path / "state") == ["v0001"]

    proc = run_cli("baselines", "refit", "--config", str(cfg_path), "--json", str(day))
    assert proc.returncode == 0, proc.stderr
    assert json.loads(proc.stdout)["outcome"] == "promoted"
    assert current_version(tmp_path / "state") == "v0002"
    shown = run_cli("baselines", "show", "v0002", "--config", str(cfg_path), check=True).stdout
    assert "refit of v0001: promoted" in shown and "holdout" in shown

    # the pool's older part saw deposits and pickups only; its most recent quarter is a full
    # day with returns and health checks, which a candidate fitted on the older part flags
    shifted = tmp_path / "logs" / "shifted.log"
    write_log(shifted, [(only("deposit", "pickup"), 600, 0, 7), (SC, 200, 0, 8)])
    proc = run_cli("baselines", "refit", "--config", str(cfg_path), "--json", str(shifted))
    assert proc.returncode == 3, proc.stderr
    report = json.loads(proc.stdout)
    holdout = {g["gate"]: g for g in report["gates"]}["holdout"]
    assert report["outcome"] == "refused" and not holdout["passed"]
    assert holdout["false_alarms"] >= 25 and holdout["p_value"] < holdout["significance"]
    assert proc.stderr.strip() == "tracewatch: refit refused: holdout gate failed; the current baseline is kept"
    assert current_version(tmp_path / "state") == "v0002" and "v0003" in list_versions(tmp_path / "state")


def test_command_user_errors_are_one_line(fitted, tmp_path):
    cfg_path = tmp_path / "tw.toml"
    cfg_path.write_text(_toml(config_dict(tmp_path)))
    (tmp_path / "logs").mkdir()
    day = tmp_path / "logs" / "day.log"
    day.write_text("")
    procs = [run_cli("baselines", "refit", "--config", str(cfg_path), str(day))]
    assert procs[-1].returncode == 1 and procs[-1].stderr.startswith("tracewatch: no baseline in")
    procs.append(run_cli("baselines", "refit", "--config", str(cfg_path), str(tmp_path / "nowhere.log")))
    assert procs[-1].returncode == 1 and "nowhere.log" in procs[-1].stderr
    cfg_path.write_text(_toml(config_dict(tmp_path, holdout_share=1.5)))
    procs.append(run_cli("baselines", "refit", "--config", str(cfg_path), str(day)))
    assert procs[-1].returncode == 2 and "refit.holdout_share" in procs[-1].stderr
    for proc in procs:
        assert "Traceback" not in proc.stderr and len(proc.stderr.strip().splitlines()) == 1
    with pytest.raises(ConfigError, match=r"refit\.every_s: unknown key"):
        parse_config({"refit": {"every_s": 60}})


# -- the daemon --------------------------------------------------------------------------------------------
def _daemon_config(fitted: Path, tmp_path: Path) -> Path:
    workspace(fitted, tmp_path)
    d = config_dict(tmp_path, enabled=True, interval_s=3600)
    cfg_path = tmp_path / "tw.toml"
    cfg_path.write_text(_toml(d) + f"\n[server]\nlisten = \"127.0.0.1:{free_port()}\"\n\n"
                        "[daemon]\npoll_interval_s = 0.2\ncheckpoint_interval_s = 0.5\n\n"
                        "[incidents]\nauto_resolve_s = 1800\n")
    return cfg_path


def test_daemon_pools_refits_on_its_clock_and_switches_baseline(fitted, tmp_path, caplog):
    caplog.set_level(logging.INFO, logger="tracewatch")
    cfg_path = _daemon_config(fitted, tmp_path)
    lines = write_log(tmp_path / "logs" / "app.log", [(SC, 600, 0, 9)])
    n_lines = sum(len(s.steps) for s in lines)
    wall = FakeWall()
    first_start = wall.t
    live = InProcess(cfg_path, wall)
    try:
        live.until(lambda: live.metric("tracewatch_records_total", {"source": "api"}) == n_lines, "every record")
        # quiet for longer than idle_timeout_s: every session closes and is scored
        live.advance(lambda: live.daemon.status()["sessions_open"] == 0, "every session closed")
        pooled = live.metric("tracewatch_refit_pool_sessions", {"source": "api"})
        assert pooled > 500 and live.metric("tracewatch_refits_total", {"outcome": "promoted"}) == 0
    finally:
        live.stop()
    assert json.loads((tmp_path / "state" / POOL_FILE).read_bytes())["baseline_version"] == "v0001"

    live = InProcess(cfg_path, wall)  # the pool survives a restart, and so does the refit schedule
    try:
        assert live.metric("tracewatch_refit_pool_sessions", {"source": "api"}) == pooled
        wall.t += 1800  # open incidents (false alarms) resolve after auto_resolve_s
        live.advance(lambda: not live.daemon.incidents.store.counts().get("open"), "incidents resolved")
        assert wall.t < first_start + 3600  # the first start + interval_s
        assert live.metric("tracewatch_refits_total", {"outcome": "promoted"}) == 0  # not due yet
        wall.t = first_start + 3600
        live.until(lambda: live.metric("tracewatch_refits_total", {"outcome": "promoted"}) == 1, "a refit")
        live.until(lambda: live.metric("tracewatch_baseline_info", {"version": "v0002"}) == 1, "the switch")
        live.until(lambda: not live.metric("tracewatch_refit_pool_sessions", {"source": "api"}), "a fresh pool")
    finally:
        live.stop()
    assert current_version(tmp_path / "state") == "v0002"
    refit_lines = [r.getMessage() for r in caplog.records if r.getMessage().startswith("refit of")]
    assert len(refit_lines) == 1 and "refit of v0001: candidate v0002 promoted" in refit_lines[0]


def test_daemon_moves_a_corrupt_pool_aside_and_starts(fitted, tmp_path, caplog):
    cfg_path = _daemon_config(fitted, tmp_path)
    (tmp_path / "state" / POOL_FILE).write_bytes(b"{ not json")
    live = InProcess(cfg_path, FakeWall())
    try:
        assert live.daemon.ready() == (True, "")
        assert (tmp_path / "state" / (POOL_FILE + ".corrupt")).read_bytes() == b"{ not json"
        assert live.daemon.refit.pool is not None and live.daemon.refit.pool.sessions() == []
    finally:
        live.stop()
    assert any("not a usable refit pool" in r.getMessage() and "moved to" in r.getMessage()
               for r in caplog.records)
