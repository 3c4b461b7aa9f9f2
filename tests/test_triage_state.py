"""Triage's saved model and its failures (tracewatch/triage.py, Triage): a tampered triage.json is
refused with one line — by `tracewatch label --list`, and once (not per alert) by the daemon's
incidents, which go on without suggestions; a fault inside triage is logged with its cause.
The kernel perceptron itself is tested in test_triage.py."""

from __future__ import annotations

import json
import logging

import pytest

from tracewatch.alerts.incidents import IncidentTracker
from tracewatch.alerts.store import IncidentStore
from tracewatch.config import TriageConfig, parse_config
from tracewatch.service.incidents import Incidents
from tracewatch.triage import EXPECTED, Triage

from .conftest import run_cli
from .incident_data import config, toy_alert


@pytest.fixture
def trained(tmp_path):
    """A state folder with three incidents (A twice, B) and a triage model trained on two labels;
    returns the config file and the saved model as a dict."""
    state = tmp_path / "state"
    store = IncidentStore.open(state)
    tracker = IncidentTracker(store, parse_config({}).incidents)
    for aid in ("a1", "a2", "b1"):
        tracker.add(toy_alert(aid, aid[0].upper()))
    store.close()
    t = Triage(TriageConfig(), state)
    t.train([(toy_alert("a1", "A"), EXPECTED, 1), (toy_alert("a2", "A"), EXPECTED, 1),
             (toy_alert("b1", "B"), "disk-full", 2)])
    t.save()
    conf = tmp_path / "tw.toml"
    conf.write_text(f'state_dir = "{state}"\n')
    return conf, json.loads((state / "triage.json").read_bytes())


def _tamper(doc: dict, how: str) -> bytes:
    doc = json.loads(json.dumps(doc))
    if how == "alpha-rows":
        doc["alpha"] = doc["alpha"][:1]
    elif how == "alpha-columns":
        doc["alpha"] = [row[:-1] for row in doc["alpha"]]
    elif how == "gamma-negative":
        doc["gamma"] = -1.0
    elif how == "classes-unsorted":
        doc["classes"] = doc["classes"][::-1]
    elif how == "support-of-another-kernel":
        doc["kernel"] = "spectrum"
    elif how == "spectrum-n-0":
        doc["spectrum_n"] = 0
    elif how == "more-support-than-examples":
        doc["examples"] = 1
    elif how == "coefficient-infinite":
        return json.dumps(doc).replace(json.dumps(doc["alpha"][0][0]), "1e999", 1).encode()
    return json.dumps(doc).encode()


HOW = ["alpha-rows", "alpha-columns", "gamma-negative", "classes-unsorted", "support-of-another-kernel",
       "spectrum-n-0", "more-support-than-examples", "coefficient-infinite"]


@pytest.mark.parametrize("how", HOW)
def test_a_tampered_model_is_refused_with_one_line(trained, how):
    conf, doc = trained
    path = conf.parent / "state" / "triage.json"
    assert run_cli("label", "--config", str(conf), "--list", check=True).returncode == 0  # as saved: fine
    path.write_bytes(_tamper(doc, how))
    proc = run_cli("label", "--config", str(conf), "--list")
    assert proc.returncode == 1 and "Traceback" not in proc.stderr, proc.stderr
    assert proc.stderr.count("\n") == 1 and "not a usable triage model" in proc.stderr


def test_the_daemon_logs_a_refused_model_once_and_groups_on(trained, tmp_path, caplog):
    conf, doc = trained
    cfg = config(tmp_path / "live")
    model = cfg.state_dir / "triage.json"
    model.parent.mkdir(parents=True)
    model.write_bytes(_tamper(doc, "alpha-rows"))
    incidents = Incidents(cfg)
    try:
        opened = {incidents.add(toy_alert(f"x{n}", name)) for n, name in enumerate("CDE")}
        assert len(opened) == 3 and None not in opened  # three new incidents, each asked triage
        refused = [r for r in caplog.records if "not a usable triage model" in r.getMessage()]
        assert len(refused) == 1 and "\n" not in refused[0].getMessage() and refused[0].exc_info is None
        assert all(r["suggestion"] is None for r in incidents.store.incidents())
        model.write_bytes(json.dumps(doc).encode())  # repaired: suggestions come back
        iid = incidents.add(toy_alert("b9", "B"))
        assert incidents.store.incident(iid)["suggestion"]["label"] == "disk-full"
    finally:
        incidents.close()


def test_a_fault_inside_triage_is_logged_with_its_cause(trained, caplog):
    conf, _ = trained
    broken = toy_alert("c", "C", unexpected=[{"weight": 1.0}])  # no n-gram: no alert tracewatch makes
    with caplog.at_level(logging.ERROR, logger="tracewatch.triage"):
        assert Triage(TriageConfig(), conf.parent / "state").suggest(broken) is None  # advice only
    (record,) = [r for r in caplog.records if r.name == "tracewatch.triage"]
    assert record.exc_info is not None and record.exc_info[0] is KeyError  # the cause, for the log
