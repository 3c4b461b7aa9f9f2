"""Novelty with severity: a never-seen template is weighed by its records' level and by how
often normal traffic of its source brings new templates (measured on the calibration part).

A nightly build farm: in the drifting stream one build in ten reports core files under names
never logged before ("qxvb rmtl aopk ... generated 3 core files"), each a new template; a
never-seen template at ERROR level still alerts there, while in a steady stream a new INFO
template alerts as before.
"""

from __future__ import annotations

import random
import string
from datetime import datetime, timezone

import pytest

from tracewatch.demo.scenario import GeneratedSession, Scenario, Step, generate
from tracewatch.templates import SEVERE, severity

from .scenarios import fit_and_score

RATE = 0.005


def _word(rng: random.Random) -> str:
    return "".join(rng.choice(string.ascii_lowercase) for _ in range(8))


def build(drift: float):
    def steps(rng: random.Random) -> list[Step]:
        job = rng.randint(1000, 9999)
        out = [Step("checkout", f"build {job} checked out revision {rng.getrandbits(40):010x}"),
               Step("compile", f"build {job} compiled {rng.randint(100, 900)} units")]
        if rng.random() < drift:  # words nobody logged before: a new template every time
            words = " ".join(_word(rng) for _ in range(5))
            out.append(Step("core files", f"{words} generated {rng.randint(1, 9)} core files"))
        out += [Step("tests", f"build {job} passed {rng.randint(200, 3000)} tests"),
                Step("upload", f"build {job} artifacts uploaded")]
        return out
    return steps


def farm(drift: float) -> Scenario:
    return Scenario(service="buildd", workflows={"nightly": (1.0, build(drift))}, novel=[])


def _insert(sess: GeneratedSession, step: Step, label: str) -> None:
    sess.steps.insert(2, step)
    sess.label = label
    sess.times = [sess.start + 0.5 * j for j in range(len(sess.steps))]


def run(tmp_path, drift: float, seed: int = 7):
    scenario = farm(drift)
    base = generate(scenario, 3000, seed=seed, start=datetime(2026, 11, 29, tzinfo=timezone.utc), kinds=())
    day = generate(scenario, 1500, seed=seed + 1, start=datetime(2026, 11, 30, tzinfo=timezone.utc), kinds=())
    rng = random.Random(seed)
    picked = rng.sample(day, 40)
    for sess in picked[:20]:  # a new error path
        _insert(sess, Step("linker", f"linker crashed with signal {rng.randint(4, 11)}", "ERROR"), "error")
    for sess in picked[20:]:  # a new, mild step (the same template every time)
        _insert(sess, Step("cache", f"remote cache warmed with {rng.randint(10, 99)} entries"), "info")
    baseline, verdicts = fit_and_score(tmp_path, scenario, base, day, "ci", false_alarm_rate=RATE)
    return baseline, day, verdicts


def _share(verdicts, sessions) -> float:
    return sum(verdicts[s.key]["alert"] for s in sessions) / len(sessions)


def test_a_drifting_stream_stops_alarming_on_new_info_templates_but_not_on_errors(tmp_path):
    baseline, day, verdicts = run(tmp_path, drift=0.1)
    share = baseline.report["thresholds"]["ci"]["new_template_share"]
    assert 0.05 < share < 0.15  # about one calibration session in ten brought a new template
    assert any("brings new templates" in note for note in baseline.report["notes"])
    normal = [s for s in day if s.label == "normal"]
    drifting = [s for s in normal if any(st.name == "core files" for st in s.steps)]
    novel = [s for s in drifting if verdicts[s.key]["unseen_events"]]  # never seen, and listed as such
    assert len(novel) == len(drifting) > 100
    print(f"\nnew-template share {share:.4f}; false alarms {_share(verdicts, normal):.4f} "
          f"(core-file sessions {len(drifting)}, with a new template {len(novel)}: {_share(verdicts, novel):.4f}); "
          f"error {_share(verdicts, [s for s in day if s.label == 'error']):.2f}")
    assert _share(verdicts, normal) <= 2 * RATE
    errors = [s for s in day if s.label == "error"]
    assert all(verdicts[s.key]["alert"] and "unseen_event" in verdicts[s.key]["reasons"] for s in errors)


def test_a_steady_stream_alerts_on_a_new_info_template(tmp_path):
    baseline, day, verdicts = run(tmp_path, drift=0.0)
    assert baseline.report["thresholds"]["ci"]["new_template_share"] == 0.0
    for label in ("error", "info"):
        flagged = [s for s in day if s.label == label]
        assert all(verdicts[s.key]["alert"] and "unseen_event" in verdicts[s.key]["reasons"] for s in flagged)
    assert _share(verdicts, [s for s in day if s.label == "normal"]) <= 2 * RATE


@pytest.mark.parametrize("level, rank", [
    # RFC 5424 section 6.2.1 severity names (as tracewatch's syslog and journald formats give
    # them), then Python logging's and log4j's level names
    ("emerg", 3), ("alert", 3), ("crit", 3), ("err", 3), ("warning", 2), ("notice", 1), ("info", 1), ("debug", 1),
    ("CRITICAL", 3), ("ERROR", 3), ("WARNING", 2), ("INFO", 1), ("DEBUG", 1), ("FATAL", 3), ("WARN", 2),
    ("TRACE", 1), (None, 0), ("", 0),
])
def test_severity_ranks(level, rank):
    assert severity(level) == rank


def test_the_level_of_a_new_template_survives_a_checkpoint():
    from tracewatch.templates import TemplateTree

    miner = TemplateTree()
    miner.add_many(["door 4 opened"], [None])
    miner.freeze()
    idxs = miner.add_many(["latch jammed on door 4", "battery cell swapped", "latch jammed on door 9"], [None] * 3)
    miner.note_severity(idxs, ["INFO", "info", "ERROR"])  # the worst level of its records
    assert [miner.templates[i].severity for i in idxs] == [SEVERE, 1, SEVERE]
    assert miner.templates[0].severity == 0  # baseline templates keep none
    again = TemplateTree()
    again.add_many(["door 4 opened"], [None])
    again.freeze()
    again.restore_learned(miner.learned_state())
    assert [t.severity for t in again.templates] == [t.severity for t in miner.templates]
