"""Triage: the kernel perceptron on hand-checkable toys and against scikit-learn, the spectrum
kernel by hand, a labelled-incident scenario from the parcel-locker machinery, the tracker hook,
the store migration, and the `tracewatch label` command."""

from __future__ import annotations

import json
import math
import random
from collections import Counter
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest
from sklearn.exceptions import NotFittedError
from sklearn.linear_model import Perceptron
from sklearn.metrics.pairwise import cosine_similarity, rbf_kernel

from tracewatch.alerts.incidents import IncidentTracker, set_status
from tracewatch.alerts.store import SCHEMA_VERSION, IncidentStore
from tracewatch.alerts.summary import brief, detail
from tracewatch.batch import assign_sources, fit_files, score_files
from tracewatch.cli import main
from tracewatch.config import TriageConfig, parse_config
from tracewatch.demo.scenario import generate, parcel_lockers, render_text
from tracewatch.errors import ConfigError, StateError
from tracewatch.service.incidents import Incidents
from tracewatch.service.page import detail_page, list_page
from tracewatch.triage import EXPECTED, KernelPerceptron, Triage, spectrum, spectrum_kernel

from .conftest import run_cli
from .incident_data import _retime, _retry, _unseen, config, toy_alert


# -- the kernel perceptron -------------------------------------------------------------------------
def test_two_point_toy_worked_on_paper():
    # e1 is "a", e2 is "b". Epoch 1, in order: e1 scores 0 for both (a tie is a mistake) →
    # α_a,1 = 1, α_b,1 = −1; e2 scores K(e1, e2) = 0 for both → α_b,2 = 1, α_a,2 = −1.
    # Epoch 2 makes no mistake, so training stops.
    m = KernelPerceptron("cosine", average=False, shuffle=False).fit(np.eye(2), ["a", "b"])
    assert m.mistakes_ == [2, 0]
    assert m.alpha_.tolist() == [[1.0, -1.0], [-1.0, 1.0]]
    # (2, 1) normalised is (2, 1)/√5: f_a = 2/√5 − 1/√5 = 1/√5, f_b = −1/√5 (scores sum to 0);
    # with two classes decision_function is f_b alone, as scikit-learn's binary classifiers give it
    assert m._scores([{"0": 2.0, "1": 1.0}])[0] == pytest.approx([1 / math.sqrt(5), -1 / math.sqrt(5)])
    assert m.decision_function(np.array([[2.0, 1.0]])) == pytest.approx([-1 / math.sqrt(5)])
    assert m.predict(np.array([[2.0, 1.0], [1.0, 3.0]])).tolist() == ["a", "b"]
    # geometric margin: the distance from (2, 1)/√5 to the diagonal, (2 − 1)/√5/√2 = 1/√10;
    # a point on the diagonal has margin 0
    labels, margins = m.margin(np.array([[2.0, 1.0], [1.0, 1.0]]))
    assert labels[0] == "a" and margins == pytest.approx([1 / math.sqrt(10), 0.0])


def test_three_classes_converge_and_keep_the_sign_convention():
    m = KernelPerceptron("cosine", average=False, seed=3).fit(np.eye(3), ["x", "y", "z"])
    assert m.mistakes_[-1] == 0
    queries = np.array([[5.0, 1.0, 0.0], [0.0, 2.0, 1.0], [0.1, 0.0, 3.0]])
    assert m.predict(queries).tolist() == ["x", "y", "z"]
    scores = m.decision_function(queries)
    assert scores.sum(axis=1) == pytest.approx([0.0, 0.0, 0.0])  # every update adds +1 and −1
    assert (scores.argmax(axis=1) == [0, 1, 2]).all()  # higher = more like that class


def test_not_fitted_and_bad_input_are_clear():
    with pytest.raises(NotFittedError, match="not fitted"):
        KernelPerceptron().predict(np.eye(2))
    with pytest.raises(ValueError, match="two classes"):
        KernelPerceptron().fit(np.eye(2), ["a", "a"])
    with pytest.raises(ValueError, match="kernel"):
        KernelPerceptron("linear").fit(np.eye(2), ["a", "b"])


def _separable(rng: np.random.Generator, n: int, classes: int = 3, dim: int = 6) -> tuple[np.ndarray, np.ndarray]:
    """Points near one of ``classes`` orthogonal directions, with random lengths: separable with a
    wide margin, so any perceptron that has converged classifies new points alike."""
    y = rng.integers(0, classes, n)
    X = np.eye(dim)[y] + rng.normal(0, 0.08, (n, dim))
    return X * rng.uniform(0.5, 4.0, (n, 1)), y


def test_cosine_kernel_agrees_with_sklearn_perceptron_on_the_explicit_feature_map():
    # Outside check: scikit-learn's sklearn.linear_model.Perceptron (primal, one-vs-rest) trained
    # on the cosine kernel's explicit feature map x/‖x‖ must predict what the dual form does.
    rng = np.random.default_rng(11)
    X, y = _separable(rng, 120)
    Xt, yt = _separable(rng, 300)
    ours = KernelPerceptron("cosine", seed=1).fit(X, y)

    def unit(a: np.ndarray) -> np.ndarray:
        return a / np.linalg.norm(a, axis=1, keepdims=True)

    ref = Perceptron(random_state=0).fit(unit(X), y)
    assert ref.score(unit(X), y) == 1.0  # separable in feature space
    assert (ours.predict(X).astype(int) == y).all()
    assert (ours.predict(Xt).astype(int) == ref.predict(unit(Xt))).all()
    assert (ours.predict(Xt).astype(int) == yt).all()


def test_binary_sign_matches_sklearn_decision_function():
    # scikit-learn's convention for two classes: decision_function > 0 means classes_[1]
    rng = np.random.default_rng(5)
    X, y = _separable(rng, 80, classes=2, dim=4)
    Xt, _ = _separable(rng, 200, classes=2, dim=4)
    unit = Xt / np.linalg.norm(Xt, axis=1, keepdims=True)
    ref = Perceptron(random_state=0).fit(X / np.linalg.norm(X, axis=1, keepdims=True), y)
    ours = KernelPerceptron("cosine").fit(X, y)
    assert (np.sign(ours.decision_function(Xt)) == np.sign(ref.decision_function(unit))).all()


@pytest.mark.parametrize("kernel, reference", [
    ("cosine", lambda A, B: cosine_similarity(A, B)),  # sklearn.metrics.pairwise.cosine_similarity
    ("rbf", lambda A, B: rbf_kernel(A, B, gamma=0.7)),  # sklearn.metrics.pairwise.rbf_kernel
], ids=["cosine", "rbf"])
def test_kernel_values_match_sklearn_pairwise(kernel, reference):
    rng = np.random.default_rng(2)
    X, y = _separable(rng, 40, dim=5)
    Xt = rng.normal(0, 1, (25, 5))
    m = KernelPerceptron(kernel, gamma=0.7).fit(X, y)
    support = np.array([[s.get(str(j), 0.0) for j in range(5)] for s in m.support_])
    assert m.decision_function(Xt) == pytest.approx(reference(Xt, support) @ m.alpha_.T)


# -- the spectrum kernel ---------------------------------------------------------------------------
def test_spectrum_kernel_by_hand():
    a, b = ["A", "B", "A", "B", "C"], ["B", "A", "B", "C"]
    # 2-spectra: a = {AB: 2, BA: 1, BC: 1}, b = {BA: 1, AB: 1, BC: 1} → 2·1 + 1·1 + 1·1 = 4
    assert spectrum(a, 2) == Counter({"A\x1fB": 2, "B\x1fA": 1, "B\x1fC": 1})
    assert spectrum_kernel(a, b, 2) == 4
    # 3-spectra: a = {ABA, BAB, ABC}, b = {BAB, ABC} → 2; a run longer than the sequence → 0
    assert spectrum_kernel(a, b, 3) == 2
    assert spectrum_kernel(a, b, 6) == 0
    # normalised: K(a, a) = 4 + 1 + 1 = 6, K(b, b) = 3, so K̂(a, b) = 4/√18. Trained in order,
    # a then b (as in the toy above), α = [[1, −1], [−1, 1]]: f_a(a) = 1 − 4/√18.
    m = KernelPerceptron("spectrum", spectrum_n=2, average=False, shuffle=False).fit([a, b], ["p", "q"])
    assert m.alpha_.tolist() == [[1.0, -1.0], [-1.0, 1.0]]
    assert m.decision_function([a]) == pytest.approx([4 / math.sqrt(18) - 1])  # f_q = −f_p


# -- a labelled-incident scenario (parcel lockers) ------------------------------------------------------
DAY1 = datetime(2026, 11, 30, 3, 0, tzinfo=timezone.utc)
RETRY, JAM, DEADLOCK = "retry", "jam", "deadlock"


def _day(seed: int, start: datetime, per_kind: int, n_normal: int, kinds: tuple[str, ...]):
    """Sessions of the demo scenario hit by faults: RETRY ("door opened" 15–40 times), JAM (the
    never-seen latch sensor error), DEADLOCK (the never-seen ledger deadlock)."""
    sc = parcel_lockers()
    rng = random.Random(seed)
    pool = iter(generate(sc, 8 * per_kind * len(kinds) + n_normal, 0, seed=seed, start=start, span_s=240))
    out = []
    for kind in kinds:
        made = 0
        while made < per_kind:
            sess = next(pool)
            if kind == RETRY and not _retry(sess, rng):
                continue
            if kind != RETRY:
                _unseen(sess, rng, sc.novel[0] if kind == JAM else sc.novel[3])
            sess.label = kind
            _retime(sess, rng)
            out.append(sess)
            made += 1
    return out + [next(pool) for _ in range(n_normal)]


@pytest.fixture(scope="module")
def labelled(tmp_path_factory):
    """Day 1's incidents labelled (retry = expected, jam = known problem "latch-jam"), the model
    trained and saved; day 2's alerts (three hours later) of all three kinds, not yet grouped."""
    root = tmp_path_factory.mktemp("triage")
    sc = parcel_lockers()
    base = generate(sc, 600, 0, seed=41, start=DAY1 - timedelta(days=1))
    day1 = _day(42, DAY1, 20, 30, (RETRY, JAM))
    day2 = _day(43, DAY1 + timedelta(hours=3), 15, 20, (RETRY, JAM, DEADLOCK))
    for name, sessions in (("base", base), ("day1", day1), ("day2", day2)):
        (root / f"{name}.log").write_text("\n".join(render_text(sc, sessions)) + "\n")
    cfg = config(root)
    baseline, _, _ = fit_files(cfg, assign_sources(cfg, [str(root / "base.log")]))
    alerts1: list[dict] = []
    alerts2: list[dict] = []
    score_files(cfg, assign_sources(cfg, [str(root / "day1.log")]), baseline, alerts1.append)
    score_files(cfg, assign_sources(cfg, [str(root / "day2.log")]), baseline, alerts2.append)
    truth = {s.key: s.label for s in day1 + day2}
    store = IncidentStore.open(cfg.state_dir)
    tracker = IncidentTracker(store, cfg.incidents)
    kinds: dict[int, Counter] = {}
    for a in alerts1:
        kinds.setdefault(tracker.add(a), Counter())[truth[a["session_key"]]] += 1
    by_kind = {c.most_common(1)[0][0]: iid for iid, c in kinds.items()}
    assert set(by_kind) >= {RETRY, JAM}
    set_status(store, by_kind[RETRY], "expected", by="test")
    store.set_label(by_kind[RETRY], EXPECTED, by="test", note="maintenance retries", now=0.0)
    store.set_label(by_kind[JAM], "latch-jam", by="test", now=0.0)
    triage = Triage(cfg.triage, cfg.state_dir)
    info = triage.train_from_store(store)
    triage.save()
    yield cfg, store, by_kind, info, alerts2, truth
    store.close()


def test_model_learns_from_the_labelled_incidents(labelled):
    _, _, _, info, _, _ = labelled
    assert info["incidents"] == {EXPECTED: 1, "latch-jam": 1}
    assert info["classes"] == [EXPECTED, "latch-jam"]
    assert info["mistakes"][-1] == 0 and info["support"] >= 2


def test_new_alerts_expected_suppressed_known_suggested_unrelated_abstains(labelled):
    cfg, _, _, _, alerts2, truth = labelled
    triage = Triage(cfg.triage, cfg.state_dir)  # as the daemon: read from triage.json
    got: dict[str, Counter] = {}
    for a in alerts2:
        s = triage.suggest(a)
        got.setdefault(truth[a["session_key"]], Counter())[(s["action"], s["label"])] += 1
    assert got[RETRY] == Counter({("suppress", EXPECTED): 15})
    assert got[JAM] == Counter({("suggest", "latch-jam"): 15})
    assert got[DEADLOCK] == Counter({("abstain", None): 15})  # a fault no one has labelled


def test_tracker_hook_stores_suggestions_and_opens_expected_quietly(labelled, tmp_path):
    cfg, _, _, _, alerts2, truth = labelled
    # what the daemon holds, on a fresh store (day 2's alerts all open new incidents) with the model
    (tmp_path / "triage.json").write_bytes((cfg.state_dir / "triage.json").read_bytes())
    incidents = Incidents(cfg.model_copy(update={"state_dir": tmp_path}))
    try:
        kind_of = {incidents.add(a): truth[a["session_key"]] for a in alerts2}
        store = incidents.store
        rows = {r["id"]: r for r in store.incidents()}
        assert sorted(kind_of.values()) == [DEADLOCK, JAM, RETRY]
        for iid, kind in kind_of.items():
            inc = rows[iid]
            if kind == RETRY:
                assert inc["status"] == "expected" and inc["status_by"] == "triage"
                assert inc["suggestion"]["action"] == "suppress" and inc["count"] == 15
            elif kind == JAM:
                assert inc["status"] == "open" and inc["suggestion"]["label"] == "latch-jam"
            else:
                assert inc["status"] == "open" and inc["suggestion"]["action"] == "abstain"
        opened = {p["id"] for _, ev, p in store.outbox_after(0) if ev == "opened"}
        assert opened == {i for i, k in kind_of.items() if k != RETRY}  # no notification when suppressed
        jam = next(i for i, k in kind_of.items() if k == JAM)
        listed = list_page([brief(rows[jam])], store.counts(), {}, refresh_s=30)  # the page takes the list form
        assert "triage suggests latch-jam (margin" in listed
        shown = detail_page(detail({**store.incident(jam), "note": "<b>x</b>"}), refresh_s=30)
        assert "triage suggests latch-jam" in shown and "<b>x</b>" not in shown  # escaped
    finally:
        incidents.close()


def test_saved_model_round_trip_and_damage(labelled, tmp_path):
    cfg, _, _, _, alerts2, _ = labelled
    trained = Triage(cfg.triage, cfg.state_dir)
    (tmp_path / "triage.json").write_bytes((cfg.state_dir / "triage.json").read_bytes())
    copy = Triage(cfg.triage, tmp_path)
    assert [copy.suggest(a) for a in alerts2[:10]] == [trained.suggest(a) for a in alerts2[:10]]
    doc = json.loads((tmp_path / "triage.json").read_text())
    assert set(doc) >= {"kind", "schema_version", "classes", "alpha", "support"}  # JSON, never pickle
    (tmp_path / "triage.json").write_text('{"kind": "tracewatch-triage", "alpha": "x"}')
    damaged = Triage(cfg.triage, tmp_path)
    with pytest.raises(StateError, match="not a usable triage model"):
        damaged.load()
    assert damaged.suggest(alerts2[0]) is None  # advice only: grouping goes on


def test_one_label_is_not_enough(tmp_path):
    t = Triage(TriageConfig(), tmp_path)
    info = t.train([(toy_alert("a1", "A"), EXPECTED, 1), (toy_alert("a2", "A"), EXPECTED, 1)])
    t.save()
    assert t.model is None and "classes" not in info
    assert Triage(TriageConfig(), tmp_path).suggest(toy_alert("a3", "A")) is None


# -- store migration and config ----------------------------------------------------------------------
def test_schema_1_store_is_upgraded_in_place(tmp_path):
    store = IncidentStore.open(tmp_path)
    IncidentTracker(store, parse_config({}).incidents).add(toy_alert("a1", "A"))
    db = store.db  # make it look like a schema-1 file: no labels table, no suggestion or signature column
    db.execute("DROP TABLE labels")
    db.execute("ALTER TABLE incidents DROP COLUMN suggestion")
    db.execute("ALTER TABLE incidents DROP COLUMN signature")
    db.execute("UPDATE meta SET value = '1' WHERE key = 'schema_version'")
    store.close()
    store = IncidentStore.open(tmp_path, create=False)
    try:
        assert store.db.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()[0] == str(
            SCHEMA_VERSION)
        assert store.set_label(1, "latch-jam", by="test", now=1.0)
        assert store.incidents()[0]["label"] == "latch-jam" and store.incidents()[0]["suggestion"] is None
    finally:
        store.close()


@pytest.mark.parametrize("section, key", [({"kernel": "linear"}, "triage.kernel"),
                                          ({"min_margin": 2}, "triage.min_margin"),
                                          ({"spectrum_n": 0}, "triage.spectrum_n"),
                                          ({"margin": 0.1}, "triage.margin")],
                         ids=["kernel", "min_margin", "spectrum_n", "unknown"])
def test_bad_triage_config_names_the_key(section, key):
    with pytest.raises(ConfigError, match=key.replace(".", r"\.")):
        parse_config({"triage": section})


# -- the `tracewatch label` command -------------------------------------------------------------------------
def test_label_cli_round_trip(tmp_path):
    state = tmp_path / "state"
    store = IncidentStore.open(state)
    tracker = IncidentTracker(store, parse_config({}).incidents)
    iid_a = tracker.add(toy_alert("a1", "A"))
    tracker.add(toy_alert("a2", "A"))
    iid_b = tracker.add(toy_alert("b1", "B"))
    store.close()
    conf = tmp_path / "tw.toml"
    conf.write_text(f'state_dir = "{state}"\n[triage]\nmin_margin = 0.2\n')

    done = run_cli("label", "--config", str(conf), str(iid_a), "--expected", "--note", "nightly job", check=True)
    assert f"incident #{iid_a} labelled 'expected'" in done.stdout and "two different labels" in done.stdout
    done = run_cli("label", "--config", str(conf), str(iid_b), "--known", "disk-full", check=True)
    assert "1 support example" not in done.stdout and "support example" in done.stdout

    listed = json.loads(run_cli("label", "--config", str(conf), "--list", "--json", check=True).stdout)
    assert {(r["incident_id"], r["label"]) for r in listed["labels"]} == {(iid_a, EXPECTED), (iid_b, "disk-full")}
    assert listed["model"]["classes"] == ["disk-full", EXPECTED] and listed["model"]["examples"] == 3
    text = run_cli("label", "--config", str(conf), "--list", check=True).stdout
    assert "disk-full" in text and "nightly" not in text and "triage model (cosine kernel)" in text

    store = IncidentStore.open(state, create=False)
    try:
        assert store.incident(iid_a)["status"] == "expected" and store.incident(iid_a)["note"] == "nightly job"
        assert store.incident(iid_b)["status"] == "open"  # a known problem is still a problem
    finally:
        store.close()
    t = Triage(TriageConfig(min_margin=0.2), state)
    assert t.suggest(toy_alert("b9", "B")) == {"action": "suggest", "label": "disk-full",
                                               "margin": t.suggest(toy_alert("b9", "B"))["margin"]}
    assert t.suggest(toy_alert("a9", "A"))["action"] == "suppress"
    assert t.suggest(toy_alert("c9", "C"))["action"] == "abstain"


@pytest.mark.parametrize("args, code, message", [
    (["99", "--known", "disk-full"], 1, "no incident 99"),
    (["1"], 2, "exactly one of --expected or --known"),
    (["1", "--expected", "--known", "x"], 2, "exactly one of"),
    (["1", "--known", "bad name!"], 2, "--known: 'bad name!' is not a usable name"),
    (["1", "--known", "expected"], 2, "is not a usable name"),
    (["--list", "1"], 2, "give no ID"),
], ids=["unknown-incident", "no-label", "both", "bad-name", "reserved-name", "list-with-id"])
def test_label_cli_errors_are_one_line(tmp_path, capsys, args, code, message):
    store = IncidentStore.open(tmp_path / "state")
    IncidentTracker(store, parse_config({}).incidents).add(toy_alert("a1", "A"))
    store.close()
    conf = tmp_path / "tw.toml"
    conf.write_text(f'state_dir = "{tmp_path / "state"}"\n')
    assert main(["label", "--config", str(conf), *args]) == code  # the command's own entry point, in-process
    err = capsys.readouterr().err
    assert message in err and len(err.strip().splitlines()) == 1
