"""A real Alertmanager (Debian's `prometheus-alertmanager` 0.2x) receives tracewatch's incidents.

Alertmanager runs on deploy/alertmanager/alertmanager.yml — the very file users copy — with
cluster mode off; the test changes only the receiver's webhook port (to a free one, so nothing
on the machine is called). A real `tracewatch run` with ``[notify] alertmanager_url`` follows
logs holding two kinds of fault, two sessions each, which open two incidents.

What must hold: Alertmanager's ``GET /api/v2/alerts`` shows one active alert per incident with
tracewatch's labels and annotations, routed to the example's receiver; once the incidents are
resolved, Alertmanager has received them as resolved and shows them no more as active."""

from __future__ import annotations

import random
import secrets
import subprocess
import time
from datetime import datetime, timezone

import pytest
import yaml
from prometheus_client.parser import text_string_to_metric_families

from tracewatch.demo.scenario import GeneratedSession, generate, parcel_lockers, render_text

from .daemon_helpers import (DEPLOY, DaemonProcess, Neighbour, fitted, free_port, http_json, need_program,  # noqa: F401
                             neighbours, no_daemon_left, workspace, write_burst)

AM_CONFIG = DEPLOY / "alertmanager" / "alertmanager.yml"
EXAMPLE_RECEIVER_PORT = ":5001/"


def two_faults(start: float) -> list[str]:
    """Four sessions: a never-seen error in two copies of one normal session, a step repeated
    30 times in two copies of another (invented data; steps 0.05 s apart)."""
    sc = parcel_lockers()
    normal = generate(sc, 40, seed=21)
    first = next(s for s in normal if len(s.steps) >= 5)
    second = next(s for s in normal if len(s.steps) >= 5 and s.workflow != first.workflow)
    novel = sc.novel[0](random.Random(3))
    faulty = []
    for i in range(2):
        faulty.append(GeneratedSession(f"fault-a{i}", first.workflow, [*first.steps[:2], novel, *first.steps[2:]]))
        faulty.append(GeneratedSession(f"fault-b{i}", second.workflow,
                                       [second.steps[0], *[second.steps[1]] * 30, *second.steps[2:]]))
    for n, sess in enumerate(faulty):
        sess.start = start + n * 0.5
        sess.times = [sess.start + 0.05 * k for k in range(len(sess.steps))]
    return render_text(sc, faulty)


@pytest.fixture
def alertmanager(tmp_path, neighbours):
    """Alertmanager on a copy of the example config (receiver port changed), ready."""
    binary = need_program("prometheus-alertmanager", "prometheus-alertmanager")
    text = AM_CONFIG.read_text()
    assert text.count(EXAMPLE_RECEIVER_PORT) == 1
    config = tmp_path / "alertmanager.yml"
    config.write_text(text.replace(EXAMPLE_RECEIVER_PORT, f":{free_port()}/"))
    am = neighbours([binary, f"--config.file={config}", f"--storage.path={tmp_path / 'am-data'}",
                     "--cluster.listen-address="], "--web.listen-address", "alertmanager")
    return am.ready("/-/ready")  # Alertmanager management API: /-/ready (alertmanager README, from memory)


def incident_alerts(am: Neighbour) -> list[dict]:
    """GET /api/v2/alerts with a label filter (Alertmanager OpenAPI v2, api/v2/openapi.yaml):
    the active, unsilenced, uninhibited alerts; resolved ones are not listed."""
    status, body = am.request("/api/v2/alerts", {"filter": 'alertname="TracewatchIncident"'})
    assert status == 200, body
    return sorted(body, key=lambda a: int(a["labels"]["incident"]))


def am_samples(am: Neighbour) -> dict[tuple, float]:
    status, text = am.request("/metrics")
    assert status == 200
    return {(s.name, tuple(sorted(s.labels.items()))): s.value
            for fam in text_string_to_metric_families(text) for s in fam.samples}


def test_a_real_alertmanager_shows_two_incidents_then_their_resolution(fitted, tmp_path, alertmanager):
    token = secrets.token_hex(16)
    cfg_path = workspace(fitted, tmp_path)
    with open(cfg_path, "a") as fh:
        fh.write(f'\n[incidents]\nauto_resolve_s = 0\ntoken = "{token}"\n\n'
                 f'[notify]\nalertmanager_url = "{alertmanager.base}"\nalertmanager_labels = {{team = "lockers"}}\n'
                 'retry_initial_s = 0.2\nresend_s = 1\n')  # firing incidents sent again every second
    daemon = DaemonProcess(cfg_path).ready()
    base = f"http://127.0.0.1:{daemon.port}"
    lines = two_faults(time.time() - 60)
    write_burst(tmp_path / "logs" / "app.log", lines)
    daemon.caught_up(len(lines))

    _, listed = http_json(base, "/api/incidents")
    incidents = sorted(listed["incidents"], key=lambda i: i["id"])
    assert [(i["count"], i["status"]) for i in incidents] == [(2, "open"), (2, "open")], incidents

    def both_with_two_alerts() -> list[dict]:  # the notification at opening said 1; a re-send says 2
        got = incident_alerts(alertmanager)
        return got if [a["annotations"]["alerts"] for a in got] == ["2", "2"] else []
    got = alertmanager.until(both_with_two_alerts, "both incidents, with 2 alerts each, in Alertmanager")
    now = datetime.now(timezone.utc)
    for inc, alert in zip(incidents, got):
        labels = alert["labels"]
        assert labels == {"alertname": "TracewatchIncident", "incident": str(inc["id"]), "team": "lockers",
                          "tracewatch_store": labels["tracewatch_store"]}
        assert len(labels["tracewatch_store"]) == 12
        notes = alert["annotations"]
        assert notes["summary"] == inc["title"]
        assert (notes["status"], notes["alerts"], notes["sources"]) == ("open", "2", "api")
        assert notes["description"].startswith("2 alert(s) from api")
        assert alert["generatorURL"] == f"{base}/incidents/{inc['id']}"
        # API v2 alert status and routing (openapi.yaml: gettableAlert.status.state, receivers)
        assert alert["status"]["state"] == "active"
        assert [r["name"] for r in alert["receivers"]] == ["oncall"]  # the example's route
        assert datetime.fromisoformat(alert["endsAt"].replace("Z", "+00:00")) > now  # still firing
    assert got[0]["labels"]["tracewatch_store"] == got[1]["labels"]["tracewatch_store"]
    assert got[0]["annotations"]["summary"] != got[1]["annotations"]["summary"]

    for inc in incidents:  # the on-call engineer resolves both (POST, bearer token)
        code, body = http_json(base, f"/api/incidents/{inc['id']}/resolve", body={},
                               headers={"Authorization": f"Bearer {token}"})
        assert code == 200, body
    alertmanager.until(lambda: incident_alerts(alertmanager) == [], "the incidents to leave the active list")
    samples = am_samples(alertmanager)
    # Alertmanager's own counters (alertmanager/api/metrics, from memory): alerts received over
    # API v2 as resolved, and none active any more
    assert samples[("alertmanager_alerts_received_total", (("status", "resolved"), ("version", "v2")))] >= 2
    assert samples[("alertmanager_alerts", (("state", "active"),))] == 0
    assert daemon.terminate() == 0
    assert "Traceback" not in daemon.stderr()


def test_the_example_receiver_config_passes_amtool():
    amtool = need_program("amtool", "prometheus-alertmanager")
    check = subprocess.run([amtool, "check-config", str(AM_CONFIG)], capture_output=True, text=True, timeout=60)
    assert check.returncode == 0 and "SUCCESS" in check.stdout, check.stdout + check.stderr
    route = yaml.safe_load(AM_CONFIG.read_text())["route"]
    # tracewatch's incidents get one notification group each (labels set by tracewatch/alerts/sinks.py)
    assert route["routes"][0]["matchers"] == ['alertname="TracewatchIncident"']
    assert route["routes"][0]["group_by"] == ["tracewatch_store", "incident"]
