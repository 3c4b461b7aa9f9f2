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


def test_demo_alerts_are_compared_with_a_normal_session_of_their_own_workflow(tmp_path):
    """The demo as ``tracewatch demo`` writes it (log and traces): the generator knows each
    session's workflow, so the baseline session an alert is explained against can be checked
    to be one of the alert's own workflow (for a mixed session: of either of its two)."""
    import re

    import orjson

    from tracewatch.batch import assign_sources, fit_files, score_files
    from tracewatch.config import load_config
    from tracewatch.demo.run import CONFIG, write_scenario
    from tracewatch.demo.scenario import baseline_and_day, parcel_lockers
    from tracewatch.demo.traces import TRACE_SOURCE, trace_id, write_trace_scenario

    sc, seed = parcel_lockers(), 7  # run_demo's
    base_log, day_log, labels_log = write_scenario(tmp_path, sc, seed=seed)
    base_tr, day_tr, labels_tr = write_trace_scenario(tmp_path, sc, seed=seed + 100, n_normal=1000, per_kind=10)
    (tmp_path / "tracewatch.toml").write_text(CONFIG.format(pattern=sc.line_pattern) + "\n" + TRACE_SOURCE)
    cfg = load_config(tmp_path / "tracewatch.toml")
    baseline, _, fit_pipe = fit_files(cfg, assign_sources(cfg, [str(base_log), str(base_tr)]))
    workflow_of = {("locker-api", s.key): s.workflow
                   for s in baseline_and_day(sc, seed=seed, n_baseline=3000, n_normal=2000, per_kind=25)[0]}
    workflow_of.update({("locker-traces", trace_id(s)): s.workflow for s in baseline_and_day(
        sc, seed=seed + 100, n_baseline=3000, n_normal=1000, per_kind=10)[0]})
    known: dict[tuple, set[str]] = {}  # (source, steps as text) of every baseline session -> its workflows
    for (source, seq), key in zip(fit_pipe.fit_sessions(), fit_pipe.fit_keys()):
        known.setdefault((source, tuple(map(baseline.miner.text, seq))), set()).add(workflow_of[(source, key)])

    alerts: list[dict] = []
    score_files(cfg, assign_sources(cfg, [str(day_log), str(day_tr)]), baseline,
                lambda v: alerts.append(v) if v["alert"] else None)
    truth = {("locker-api", t["session_key"]): t for t in map(orjson.loads, labels_log.read_bytes().splitlines())}
    truth.update({("locker-traces", t["session_key"]): t for t in map(orjson.loads, labels_tr.read_bytes().splitlines())})
    own_workflow = 0
    for v in alerts:
        t = truth[(v["source"], v["session_key"])]
        own = {t["workflow"], *re.findall(r"mixed with a '([^']+)' session", t["detail"])}
        compared = known.get((v["source"], tuple(v["closest_normal"])), set())
        own_workflow += bool(own & compared)
    print(f"\n{own_workflow}/{len(alerts)} alerts compared with a normal session of their own workflow")
    assert len(alerts) > 150
    assert own_workflow >= 0.95 * len(alerts)


def test_an_alert_on_a_shape_seen_twice_in_the_baseline_says_it_is_rare_there(tmp_path):
    """A split payment (coins, then a card) happened twice in the baseline day; tomorrow's
    five are flagged — and each says why: these exact steps are rare in the baseline, with
    the count, never an empty difference."""
    import random
    from datetime import datetime, timezone

    from tracewatch.demo.scenario import GeneratedSession, Step, generate

    from .scenarios import STEPS, fit_and_score, ticket_machines

    def split_payment(rng: random.Random, key: str, start: float) -> GeneratedSession:
        steps = [Step(n, STEPS[n]) for n in "open zone fare coin card ok print close".split()]
        return GeneratedSession(key, "split", steps, start=start, times=[start + 0.3 * j for j in range(len(steps))])

    sc, rng = ticket_machines(), random.Random(3)
    base = generate(sc, 3000, seed=3, start=datetime(2026, 11, 29, tzinfo=timezone.utc), kinds=())
    day = generate(sc, 1000, seed=4, start=datetime(2026, 11, 30, tzinfo=timezone.utc), kinds=())
    t0 = datetime(2026, 11, 29, tzinfo=timezone.utc).timestamp()
    base += [split_payment(rng, f"split{i}", t0 + 3600 * (i + 1)) for i in range(2)]
    day += [split_payment(rng, f"today{i}", t0 + 86_400 + 3600 * (i + 1)) for i in range(5)]
    baseline, verdicts = fit_and_score(tmp_path, sc, base, day, "tickets", false_alarm_rate=0.005)
    today = [verdicts[f"today{i}"] for i in range(5)]
    assert baseline.period_sessions == 3002
    assert all(v["alert"] for v in today)
    for v in today:
        assert v["seen_in_baseline"] == 2
        assert v["diff"] and v["diff"][0] == (f"rare in the baseline: these exact steps were seen in 2 of its "
                                              f"{baseline.period_sessions} sessions")
    # every alert on a shape the baseline knows says so; no alert has an empty difference
    alerts = [v for v in verdicts.values() if v["alert"]]
    assert all(v["diff"] for v in alerts)
    assert all(v["diff"][0].startswith("rare in the baseline") for v in alerts if v["seen_in_baseline"])
