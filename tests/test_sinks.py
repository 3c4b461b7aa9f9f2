"""Notification sinks (tracewatch/alerts/sinks.py) against a real HTTP receiver on 127.0.0.1
standing in for a webhook and for Prometheus Alertmanager: payload shapes, backoff, refusals,
re-sending firing incidents, and a receiver that is down while the process restarts."""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import urllib.request
from datetime import datetime

import pytest

from tracewatch.alerts.incidents import IncidentTracker, set_status
from tracewatch.alerts.sinks import AlertmanagerSink, Notifier, WebhookSink
from tracewatch.alerts.store import IncidentStore
from tracewatch.config import parse_config

from .conftest import ROOT, wait_for
from .incident_data import Receiver, free_port, live_setup, scaled, storm_sessions, toy_alert

# RFC 3339 §5.6 date-time (Alertmanager's openapi.yaml declares startsAt/endsAt "format: date-time")
RFC3339 = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(\.\d+)?(Z|[+-]\d{2}:\d{2})$")
# Prometheus data model: label names match [a-zA-Z_][a-zA-Z0-9_]*
LABEL_NAME = re.compile(r"^[a-zA-Z_][a-zA-Z0-9_]*$")


@pytest.fixture
def receiver():
    r = Receiver().start()
    yield r
    r.stop()


@pytest.fixture
def store(tmp_path):
    s = IncidentStore.open(tmp_path / "state")
    yield s
    s.close()


def _tracker(store) -> IncidentTracker:
    return IncidentTracker(store, parse_config({"incidents": {"escalation_steps": [3]}}).incidents)


def _common(store) -> dict:
    return {"page_url": "http://127.0.0.1:9464", "store_id": store.store_id, "timeout": 2.0}


def check_postable_alert(alert: dict) -> None:
    """The shape of one alert of ``POST /api/v2/alerts`` (prometheus/alertmanager,
    api/v2/openapi.yaml: definitions postableAlert = {startsAt, endsAt, annotations} + alert =
    {labels (required), generatorURL (format uri)}; labelSet = string → string)."""
    assert set(alert) <= {"labels", "annotations", "startsAt", "endsAt", "generatorURL"}
    assert isinstance(alert["labels"], dict) and alert["labels"]
    for part in ("labels", "annotations"):
        assert all(isinstance(k, str) and isinstance(v, str) for k, v in alert.get(part, {}).items())
    # "alertname" is required (prometheus.io/docs/alerting/latest/clients/); names per the data model
    assert alert["labels"]["alertname"] and all(LABEL_NAME.match(k) for k in alert["labels"])
    for key in ("startsAt", "endsAt"):
        if key in alert:
            assert RFC3339.match(alert[key]), alert[key]
    assert re.match(r"^https?://[^/\s]+/\S*$", alert["generatorURL"])


def test_alertmanager_payload_resend_and_resolve(store, receiver):
    sink = AlertmanagerSink(receiver.url, labels={"team": "lockers"}, **_common(store))
    t = 1000.0
    notifier = Notifier(store, [sink], resend_s=60, clock=lambda: t)
    tracker = _tracker(store)
    iid = tracker.add(toy_alert("1", "A"))
    notifier.run_once(t)  # the "opened" notification, then the re-send of everything firing
    posts = receiver.bodies()
    assert [r["path"] for r in receiver.requests] == ["/api/v2/alerts"] * 2
    for body in posts:
        assert isinstance(body, list) and len(body) == 1  # postableAlerts is an array
        check_postable_alert(body[0])
    firing = posts[0][0]
    assert "endsAt" not in firing  # still firing: Alertmanager keeps it while we re-send
    assert firing["labels"] == {"team": "lockers", "alertname": "TracewatchIncident", "incident": str(iid),
                                "tracewatch_store": store.store_id[:12]}
    assert firing["annotations"]["summary"] == "never-seen event 'event A <var>'"
    # its one alert is the one session of api counted in its minute
    assert firing["annotations"]["severity"] == "low"
    assert firing["annotations"]["rate"] == "1 of 1 sessions of api in 10 min (100%)"
    assert firing["generatorURL"] == f"http://127.0.0.1:9464/incidents/{iid}"
    assert datetime.fromisoformat(firing["startsAt"]).timestamp() == pytest.approx(1_800_000_000.0)
    # clients re-send active alerts periodically (prometheus.io/docs/alerting/latest/clients/)
    notifier.run_once(t + 59)
    assert len(receiver.bodies()) == 2
    notifier.run_once(t + 60)
    assert len(receiver.bodies()) == 3 and receiver.bodies()[-1][0]["labels"] == firing["labels"]
    set_status(store, iid, "resolve", by="test", now=1_800_000_100.0)
    notifier.run_once(t + 61)
    resolved = receiver.bodies()[-1][0]
    check_postable_alert(resolved)
    # the same labels identify the same alert; endsAt ends it
    assert resolved["labels"] == firing["labels"] and resolved["startsAt"] == firing["startsAt"]
    assert datetime.fromisoformat(resolved["endsAt"]) >= datetime.fromisoformat(resolved["startsAt"])
    notifier.run_once(t + 200)  # nothing firing any more: nothing re-sent
    assert len(receiver.bodies()) == 4


def test_webhook_payload(store, receiver):
    notifier = Notifier(store, [WebhookSink(receiver.url + "/hook", **_common(store))])
    tracker = _tracker(store)
    iid = tracker.add(toy_alert("1", "A", source="api"))
    for n in (2, 3):
        tracker.add(toy_alert(str(n), "A", source="worker"))
    set_status(store, iid, "expected", by="test")
    assert notifier.run_once() == 3
    bodies = receiver.bodies()
    assert [b["event"] for b in bodies] == ["opened", "escalated", "resolved"]
    assert [b["incident"]["count"] for b in bodies] == [1, 3, 3]
    assert bodies[-1]["incident"]["status"] == "expected"
    assert bodies[1]["incident"]["sources"] == ["api", "worker"] and bodies[1]["incident"]["step"] == 3
    ids = [b["notification_id"] for b in bodies]
    assert len(set(ids)) == 3 and all(i.startswith(store.store_id + ":") for i in ids)
    assert bodies[0]["url"] == f"http://127.0.0.1:9464/incidents/{iid}"
    assert receiver.requests[0]["headers"]["Content-Type"] == "application/json"
    assert notifier.run_once() == 0  # nothing twice


def test_backoff_while_the_receiver_fails_then_recovers(store, receiver):
    now = [0.0]
    notifier = Notifier(store, [WebhookSink(receiver.url, **_common(store))], retry_initial_s=1,
                        retry_max_s=4, clock=lambda: now[0])
    _tracker(store).add(toy_alert("1", "A"))
    receiver.status = 503
    tries = []
    for now[0] in (0.0, 0.5, 1.0, 2.9, 3.0, 6.9, 7.0, 10.9, 11.0):
        notifier.run_once()
        tries.append(len(receiver.requests))
    # waits of 1, 2, 4, then 4 (retry_max_s) seconds between attempts
    assert tries == [1, 1, 2, 2, 3, 3, 4, 4, 5]
    assert store.cursors()["webhook"]["attempts"] == 5 and "503" in store.cursors()["webhook"]["last_error"]
    receiver.status = 200
    now[0] = 15.0
    assert notifier.run_once() == 1
    assert store.cursors()["webhook"] == {"pending": 0, "attempts": 0, "delivered": 1, "rejected": 0,
                                          "last_error": ""}


def test_a_refused_notification_is_not_retried_forever(store, receiver):
    notifier = Notifier(store, [WebhookSink(receiver.url, **_common(store))])
    tracker = _tracker(store)
    tracker.add(toy_alert("1", "A"))
    receiver.status = 400  # the receiver says the request itself is wrong
    notifier.run_once()
    receiver.status = 200
    tracker.add(toy_alert("2", "B"))
    notifier.run_once()
    assert [r["status"] for r in receiver.requests] == [400, 200]
    assert store.cursors()["webhook"]["rejected"] == 1 and store.cursors()["webhook"]["delivered"] == 1



def test_a_damaged_outbox_row_is_set_aside_and_the_rest_goes_out(tmp_path):
    store = IncidentStore.open(tmp_path / "state")
    receiver = Receiver().start()
    try:
        notifier = Notifier(store, [WebhookSink(receiver.url + "/hook", page_url="http://x", store_id="s", timeout=5)])
        tracker = IncidentTracker(store, parse_config({}).incidents, on_outbox=notifier.wake)
        tracker.add(toy_alert("1", "A"))
        tracker.add(toy_alert("2", "B"))
        store.db.execute("UPDATE outbox SET payload = '{\"id\": \"one\"}' WHERE id = 1")
        assert notifier.run_once() == 1  # before: a KeyError in every round, and nothing more went out
        assert [b["incident"]["id"] for b in receiver.bodies()] == [2]
        assert store.cursors()["webhook"] | {"last_error": ""} == {
            "pending": 0, "attempts": 0, "delivered": 1, "rejected": 1, "last_error": ""}
    finally:
        receiver.stop()
        store.close()


@pytest.mark.parametrize("section, key, value, message", [
    ("notify", "webhook_url", "ftp://127.0.0.1/x", "notify.webhook_url: must be an http:// or https:// URL"),
    ("notify", "alertmanager_url", "127.0.0.1:9093", "notify.alertmanager_url: must be an http:// or https://"),
    ("notify", "alertmanager_labels", {"team-name": "x"}, "not a valid Prometheus label name"),
    ("incidents", "escalation_steps", [100, 10], "incidents.escalation_steps: increasing alert counts"),
    ("incidents", "token", "short", "incidents.token: String should have at least 16 characters"),
    ("incidents", "cut", 1.5, "incidents.cut: Input should be less than or equal to 1"),
], ids=["webhook-scheme", "alertmanager-no-scheme", "label-name", "steps", "token", "cut"])
def test_bad_incident_and_notify_config_is_one_clear_error(section, key, value, message):
    from tracewatch.errors import ConfigError

    with pytest.raises(ConfigError) as err:
        parse_config({section: {key: value}})
    assert message in str(err.value) and "\n" not in str(err.value)


PROCESS = """
import sys
from tracewatch.config import parse_config
from tracewatch.service.incidents import Incidents
from tests.conftest import wait_for
from tests.incident_data import toy_alert

state, url, until, *actions = sys.argv[1:]
inc = Incidents(parse_config({"state_dir": state, "notify": {"webhook_url": url, "retry_initial_s": 0.05,
                                                             "retry_max_s": 0.2}}))
inc.start()
for act in actions:
    if act.startswith("resolve:"):
        inc.set_status(int(act[8:]), "resolve", by="test")
    else:
        inc.add(toy_alert(act, act[0]))
print("queued", flush=True)
webhook = lambda: inc.notifier.status()["webhook"]
if until == "killed":  # until the test kills it (or, should the test die first, its stdin closes)
    sys.stdin.read()
else:
    done = {"3-attempts": lambda: webhook()["attempts"] >= 3,
            "delivered": lambda: webhook()["pending"] == 0,
            "a-round": lambda: webhook()["rounds"] >= 1 and webhook()["pending"] == 0}[until]
    wait_for(done, 20, what=until)
inc.close()
"""


def _process(state, url: str, until: str, *actions: str) -> subprocess.Popen:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.Popen([sys.executable, "-c", PROCESS, str(state), url, until, *actions],
                            cwd=ROOT, env=env, stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True)


def test_receiver_down_across_restarts_nothing_lost_nothing_twice(tmp_path):
    receiver = Receiver().start()
    port = receiver.port
    receiver.stop()  # down: connection refused
    url = f"http://127.0.0.1:{port}/hook"
    state = tmp_path / "state"
    # 1) alerts open two incidents, one is resolved; the process retries three times, then stops cleanly
    a = _process(state, url, "3-attempts", "A1", "B1", "resolve:1")
    assert a.wait(30) == 0
    tried = a.stderr.read()
    assert "notification 1 kept, attempt 3" in tried and "Connection refused" in tried, tried
    # 2) another alert opens a third incident; that process is killed -9 while the receiver is down
    b = _process(state, url, "killed", "C1")
    assert b.stdout.readline().strip() == "queued"
    b.send_signal(signal.SIGKILL)
    b.wait(10)
    # 3) the receiver is back; the next start delivers the spool, in order, once
    receiver = Receiver(port).start()
    try:
        c = _process(state, url, "delivered")
        assert c.wait(30) == 0, c.stderr.read()
        first = receiver.bodies()
        d = _process(state, url, "a-round")  # and one more restart: a whole round sends nothing again
        assert d.wait(30) == 0, d.stderr.read()
        again = receiver.bodies()  # d has exited: whatever it sent was received before
    finally:
        receiver.stop()
    assert [(b["incident"]["id"], b["event"]) for b in first] == [(1, "opened"), (2, "opened"), (1, "resolved"),
                                                                  (3, "opened")]
    assert [b["notification_id"].split(":")[1] for b in first] == ["1", "2", "3", "4"]
    assert again == first


# -- the real daemon: `tracewatch run` while the receiver is down, restarted, then the receiver is back ----
NOTIFY = """
[incidents]
escalation_steps = [5]

[notify]
webhook_url = "http://127.0.0.1:{hook}/hook"
retry_initial_s = 0.05
retry_max_s = 0.2
"""


def _api(port: int, path: str):
    with urllib.request.urlopen(f"http://127.0.0.1:{port}{path}", timeout=5) as resp:
        return json.loads(resp.read())


def _until(check, what: str, timeout: float = 30.0):
    return wait_for(check, timeout, what=what, step=0.1, ignore=(OSError,))  # the daemon may not listen yet


def test_daemon_restarts_while_the_webhook_is_down(tmp_path):
    hook = free_port()  # nothing listens there yet: the receiver is down
    cfg_path, port = live_setup(tmp_path, seed=51, tail=NOTIFY.format(hook=hook))
    day = storm_sessions(40, 20, seed=52, span_s=20)
    (tmp_path / "logs" / "app.log").write_text("\n".join(scaled(day)) + "\n")

    def run() -> subprocess.Popen:
        return subprocess.Popen([sys.executable, "-m", "tracewatch", "run", "--config", str(cfg_path)], cwd=ROOT,
                                env=dict(os.environ, PYTHONPATH=str(ROOT)), stdout=subprocess.DEVNULL,
                                stderr=subprocess.PIPE, text=True)

    def stop(proc: subprocess.Popen) -> str:
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(30) == 0
        return proc.stderr.read()

    first = run()
    try:
        _until(lambda: sum(s["sessions_scored"] for s in _api(port, "/api/status")["sources"]) == 60,
               "60 sessions scored")
        doc = _api(port, "/api/incidents")
        spooled = doc["notify"]["webhook"]["pending"]
        assert len(doc["incidents"]) >= 2 and spooled >= 4 and doc["notify"]["webhook"]["attempts"] >= 1
    finally:
        log = stop(first)
    assert "Connection refused" in log
    second = run()  # restarted while the receiver is still down
    try:
        _until(lambda: _api(port, "/api/incidents")["notify"]["webhook"]["attempts"] >= 1, "a failed attempt")
    finally:
        stop(second)
    receiver = Receiver(hook).start()
    try:
        third = run()
        try:
            _until(lambda: _api(port, "/api/incidents")["notify"]["webhook"]["pending"] == 0, "the spool delivered")
        finally:
            stop(third)
        fourth = run()  # and once more: a whole delivery round sends nothing twice
        try:
            _until(lambda: _api(port, "/api/incidents")["notify"]["webhook"]["rounds"] >= 1, "a delivery round")
        finally:
            stop(fourth)
        bodies = receiver.bodies()
    finally:
        receiver.stop()
    incidents = doc["incidents"]
    print(f"\n{len(incidents)} incidents, {spooled} notifications spooled across 2 restarts, {len(bodies)} received")
    assert len(bodies) == spooled
    ids = [b["notification_id"] for b in bodies]
    assert len(set(ids)) == len(ids) and ids == sorted(ids, key=lambda i: int(i.split(":")[1]))
    opened = sorted(b["incident"]["id"] for b in bodies if b["event"] == "opened")
    assert opened == sorted(i["id"] for i in incidents)  # every incident announced once
