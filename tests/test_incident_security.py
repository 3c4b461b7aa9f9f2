"""Who may change an incident (tracewatch/service/incidents_api.py): state changes need the
configured bearer token, compared in constant time; without a configured token they are refused;
refused requests change nothing. The server binds loopback unless configured otherwise."""

from __future__ import annotations

import json
import socket

import pytest

from tracewatch.config import parse_config
from tracewatch.service.http import serve, split_listen

from .conftest import run_cli
from .incident_data import Served, config, request, toy_alert

TOKEN = "s3cret-token-for-tests-0123456789"
ENV = "TRACEWATCH_TEST_INCIDENT_TOKEN"


def _snapshot(served) -> tuple:
    store = served.incidents.store
    return [(i["id"], i["status"], i["note"]) for i in store.incidents()], store.outbox_max()


@pytest.fixture
def served(tmp_path, monkeypatch, request):
    monkeypatch.delenv(ENV, raising=False)
    s = Served(config(tmp_path, incidents={"token_env": ENV, **getattr(request, "param", {})}))
    s.iid = s.incidents.add(toy_alert("1", "A"))
    yield s
    s.close()


def _post(served, action: str, auth: str | None = None, body: bytes = b"") -> int:
    headers = {"Authorization": auth} if auth is not None else {}
    return request(served.port, "POST", f"/api/incidents/{served.iid}/{action}", headers=headers, body=body)


@pytest.mark.parametrize("action", ["ack", "resolve", "expected"])
def test_without_a_configured_token_state_changes_are_refused(served, action):
    before = _snapshot(served)
    for auth in (None, f"Bearer {TOKEN}", "Bearer "):
        status, _, body = _post(served, action, auth)
        assert status == 403 and b"state changes are disabled" in body
    assert _snapshot(served) == before


@pytest.mark.parametrize("served", [{"token": TOKEN}], indirect=True, ids=["token-in-config"])
def test_missing_or_wrong_tokens_are_refused_and_change_nothing(served):
    before = _snapshot(served)
    for auth in (None, "", f"Basic {TOKEN}", "Bearer", "Bearer wrong", f"Bearer {TOKEN}x", f"Bearer {TOKEN[:-1]}",
                 f"bearer {TOKEN.upper()}"):
        status, headers, _ = _post(served, "resolve", auth)
        assert status == 401, auth
        # RFC 6750 §3: a 401 for a bearer-protected resource carries WWW-Authenticate: Bearer
        assert headers["WWW-Authenticate"].startswith("Bearer")
    assert _snapshot(served) == before
    status, _, _ = _post(served, "resolve", f"Bearer {TOKEN}", b'{"note": "fixed by restart"}')
    assert status == 200
    after, outbox = _snapshot(served)
    assert after == [(served.iid, "resolved", "fixed by restart")] and outbox == before[1] + 1


def test_token_from_the_environment_and_the_cli_over_http(served, monkeypatch):
    monkeypatch.setenv(ENV, TOKEN)  # the daemon's token, read when a request comes
    assert _post(served, "ack", "Bearer nope")[0] == 401
    url = f"http://127.0.0.1:{served.port}"
    monkeypatch.setenv("TRACEWATCH_INCIDENT_TOKEN", "wrong-token-wrong-token")  # the CLI's
    proc = run_cli("incidents", "ack", str(served.iid), "--url", url)
    assert proc.returncode == 1 and "HTTP 401" in proc.stderr
    assert _snapshot(served)[0][0][1] == "open"
    monkeypatch.setenv("TRACEWATCH_INCIDENT_TOKEN", TOKEN)
    proc = run_cli("incidents", "ack", str(served.iid), "--url", url)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.startswith(f"incident #{served.iid} is now acknowledged")
    listing = run_cli("incidents", "--url", url, check=True).stdout
    assert "acknowledged" in listing and "never-seen event 'event A <var>'" in listing


@pytest.mark.parametrize("served", [{"token": TOKEN}], indirect=True, ids=["token-in-config"])
def test_oversized_or_malformed_bodies(served):
    assert _post(served, "ack", f"Bearer {TOKEN}", b"x" * 5000)[0] == 413
    assert _post(served, "ack", f"Bearer {TOKEN}", b"{not json")[0] == 400
    assert request(served.port, "POST", "/api/incidents/1/delete", headers={"Authorization": f"Bearer {TOKEN}"})[0] == 404
    assert _snapshot(served)[0] == [(served.iid, "open", "")]


@pytest.mark.parametrize("served", [{"token": TOKEN}], indirect=True, ids=["token-in-config"])
def test_unknown_incidents_and_disallowed_changes_are_404_and_409(served, monkeypatch):
    # the incident layer says IncidentNotFound / InvalidTransition; only the HTTP layer says 404 / 409
    auth = {"Authorization": f"Bearer {TOKEN}"}
    status, _, body = request(served.port, "POST", "/api/incidents/99/ack", headers=auth)
    assert status == 404 and json.loads(body) == {"error": "no incident 99"}
    assert _post(served, "resolve", f"Bearer {TOKEN}")[0] == 200
    status, _, body = _post(served, "ack", f"Bearer {TOKEN}")
    assert status == 409 and json.loads(body) == {
        "error": f"incident {served.iid} is resolved; it cannot be marked acknowledged"}
    monkeypatch.setenv("TRACEWATCH_INCIDENT_TOKEN", TOKEN)  # the CLI's
    proc = run_cli("incidents", "ack", str(served.iid), "--url", f"http://127.0.0.1:{served.port}")
    assert proc.returncode == 1 and proc.stderr.strip().endswith(
        f"HTTP 409: incident {served.iid} is resolved; it cannot be marked acknowledged")


def test_the_server_binds_loopback_by_default(served):
    host, port = split_listen(parse_config({}).server.listen)
    assert host == "127.0.0.1"  # the default listen address (DESIGN.md: loopback unless configured)
    with socket.socket() as s:
        s.bind((host, 0))
        free = s.getsockname()[1]
    server, thread = serve(f"{host}:{free}", served.daemon, served.daemon.registry)
    try:
        assert server.socket.getsockname() == ("127.0.0.1", free)
    finally:
        server.shutdown()
        server.server_close()
        thread.join(5)


def test_requests_do_not_leak_store_connections(served):
    """Each request is answered in a thread of its own: its database connection must not outlive
    it, or a stream of requests would exhaust the daemon's file descriptors."""
    import os

    def open_fds() -> int:
        return len(os.listdir("/proc/self/fd"))

    request(served.port, "GET", "/api/incidents")
    before = open_fds()
    for n in range(60):
        assert request(served.port, "GET", "/" if n % 2 else f"/api/incidents/{served.iid}")[0] == 200
    assert open_fds() <= before + 5
