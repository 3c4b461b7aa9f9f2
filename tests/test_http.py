"""HTTP endpoints on a real loopback port, answering for a real (not yet started) daemon.

The started daemon's answers are checked end to end in test_daemon.py."""

from __future__ import annotations

import http.client
import json

import pytest
from prometheus_client import CollectorRegistry

from tracewatch.config import parse_config
from tracewatch.errors import ConfigError
from tracewatch.service.daemon import Daemon
from tracewatch.service.http import serve


@pytest.fixture
def served(tmp_path):
    (tmp_path / "logs").mkdir()
    cfg = parse_config({"state_dir": str(tmp_path / "state"),
                        "sources": [{"name": "api", "paths": [str(tmp_path / "logs" / "*.log")]}]})
    reg = CollectorRegistry()
    daemon = Daemon(cfg, registry=reg)
    server, thread = serve("127.0.0.1:0", daemon, reg)
    yield daemon, server.server_address[1]
    server.shutdown()
    server.server_close()
    thread.join(5)
    daemon.journal.close()


def _get(port: int, path: str, headers: dict | None = None) -> tuple[int, dict, bytes]:
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=10)
    conn.request("GET", path, headers=headers or {})
    resp = conn.getresponse()
    body = resp.read()
    conn.close()
    return resp.status, dict(resp.getheaders()), body


def test_health_and_readiness_before_start(served):
    _, port = served
    assert _get(port, "/healthz")[0] == 200
    status, _, body = _get(port, "/readyz")
    assert status == 503  # a readiness probe must fail until the baseline is loaded
    assert b"starting" in body
    status, headers, body = _get(port, "/api/status")
    assert status == 200 and headers["Content-Type"] == "application/json"
    doc = json.loads(body)
    assert doc["ready"] is False and doc["baseline_version"] is None
    assert doc["sources"][0]["name"] == "api" and doc["sources"][0]["attached"] is False


def test_metrics_content_types(served):
    _, port = served
    status, headers, body = _get(port, "/metrics")
    # Prometheus text format 0.0.4 by default (prometheus_client.exposition.CONTENT_TYPE_PLAIN_0_0_4)
    assert status == 200 and headers["Content-Type"].startswith("text/plain; version=0.0.4")
    assert b"tracewatch_sessions_open 0.0" in body
    status, headers, body = _get(port, "/metrics", {"Accept": "application/openmetrics-text"})
    # OpenMetrics 1.0 when asked for, ending with "# EOF" (OpenMetrics spec, "Overall Structure")
    assert headers["Content-Type"].startswith("application/openmetrics-text")
    assert body.rstrip().endswith(b"# EOF")


def test_alerts_paging_and_bad_queries(served):
    daemon, port = served
    daemon.journal.open(None)
    for n in range(1, 5):
        daemon.journal.append({"alert": True, "alert_id": f"a{n}", "source": "api"})
    doc = json.loads(_get(port, "/api/alerts?since=1&limit=2")[2])
    assert [a["alert_id"] for a in doc["alerts"]] == ["a2", "a3"] and doc["next"] == 3
    doc = json.loads(_get(port, f"/api/alerts?since={doc['next']}")[2])
    assert [a["alert_id"] for a in doc["alerts"]] == ["a4"]
    assert _get(port, "/api/alerts?since=abc")[0] == 400
    assert _get(port, "/api/alerts?limit=0")[0] == 400
    assert _get(port, "/nothing-here")[0] == 404


def test_port_in_use_is_a_clear_error(served):
    daemon, port = served
    with pytest.raises(ConfigError, match=f"127.0.0.1:{port} is already in use"):
        serve(f"127.0.0.1:{port}", daemon, CollectorRegistry())
