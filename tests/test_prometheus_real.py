"""A real Prometheus (Debian's `prometheus` 2.x) scrapes a real `tracewatch run`.

Prometheus runs on deploy/prometheus/prometheus.yml and tracewatch-rules.yml — the very files
users copy — in a temp folder. The test changes only what ties them to this machine: the
target in tracewatch-targets.json (the file-based service discovery file the config names),
the Alertmanager port (a free one, so nothing on the machine receives alerts) and the two global
intervals (15s → 1s, so the test waits seconds, not minutes).

What must hold: Prometheus's parser accepts every sample the daemon exposes, and what it stores
equals what the daemon processed; the example rules load, evaluate, and the daemon-down rule
goes pending once the daemon is gone."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from collections import Counter
from pathlib import Path

import pytest
import yaml
from prometheus_client.parser import text_string_to_metric_families

from tracewatch.demo.scenario import parcel_lockers

from .daemon_helpers import (DEPLOY, DaemonProcess, Neighbour, fitted, free_port, need_program,  # noqa: F401
                             neighbours, no_daemon_left, workspace, write_burst)

PROM_DIR = DEPLOY / "prometheus"
RULES = ("TracewatchDown", "TracewatchIngestLagGrowing", "TracewatchRecordsRejected", "TracewatchNoBaseline",
         "TracewatchSessionsEvicted", "TracewatchNotificationsStuck")


def prometheus_folder(folder: Path, target_port: int) -> Path:
    """deploy/prometheus copied into ``folder`` with this machine's ports and 1 s intervals."""
    shutil.copy(PROM_DIR / "tracewatch-rules.yml", folder / "tracewatch-rules.yml")  # unchanged
    cfg = yaml.safe_load((PROM_DIR / "prometheus.yml").read_text())
    cfg["global"] = {**cfg["global"], "scrape_interval": "1s", "evaluation_interval": "1s"}
    cfg["alerting"]["alertmanagers"][0]["static_configs"][0]["targets"] = [f"127.0.0.1:{free_port()}"]
    (folder / "prometheus.yml").write_text(yaml.safe_dump(cfg, sort_keys=False))
    targets = json.loads((PROM_DIR / "tracewatch-targets.json").read_text())
    targets[0]["targets"] = [f"127.0.0.1:{target_port}"]
    (folder / "tracewatch-targets.json").write_text(json.dumps(targets))
    return folder / "prometheus.yml"


@pytest.fixture
def prometheus(tmp_path, neighbours):
    """Start Prometheus on the copied config once the test knows the daemon's port."""
    binary = need_program("prometheus", "prometheus")

    def start(target_port: int) -> Neighbour:
        folder = tmp_path / "prometheus"
        folder.mkdir()
        config = prometheus_folder(folder, target_port)
        prom = neighbours([binary, f"--config.file={config}", f"--storage.tsdb.path={folder / 'data'}"],
                          "--web.listen-address", "prometheus")
        return prom.ready("/-/ready")  # Prometheus management API (prometheus.io/docs, "Management API")

    return start


def query(prom: Neighbour, expr: str) -> dict[tuple, float]:
    """An instant query (GET /api/v1/query, Prometheus HTTP API): {sorted label items: value}."""
    status, body = prom.request("/api/v1/query", {"query": expr})
    assert status == 200 and body["status"] == "success", body
    return {tuple(sorted(r["metric"].items())): float(r["value"][1]) for r in body["data"]["result"]}


def by(prom: Neighbour, label: str, expr: str) -> dict[str, float]:
    return {dict(k)[label]: v for k, v in query(prom, f"sum by ({label}) ({expr})").items()}


def test_a_real_prometheus_stores_what_the_daemon_processed(fitted, tmp_path, prometheus):
    _, _, _, lines, expected = fitted
    daemon = DaemonProcess(workspace(fitted, tmp_path)).ready()
    write_burst(tmp_path / "logs" / "app.log", lines)
    status = daemon.caught_up(len(lines))
    _, text = daemon.get("/metrics")
    exposed = {(s.name, tuple(sorted(s.labels.items()))): s.value
               for fam in text_string_to_metric_families(text.decode()) for s in fam.samples}

    prom = prometheus(daemon.port)
    instance = f"127.0.0.1:{daemon.port}"
    prom.until(lambda: query(prom, "tracewatch_records_total"), "the first scrape")
    scraped = query(prom, 'scrape_samples_scraped{job="tracewatch"}')
    up = query(prom, 'up{job="tracewatch"}')

    # the target and its labels come from tracewatch-targets.json (file_sd_configs)
    assert up == {(("__name__", "up"), ("env", "example"), ("instance", instance), ("job", "tracewatch")): 1.0}
    # every sample of the exposition was accepted by Prometheus's own parser
    assert list(scraped.values()) == [len(exposed)]
    names = {dict(k)["__name__"] for k in query(prom, '{job="tracewatch", __name__=~"(tracewatch|process|python)_.*"}')}
    assert names == {name for name, _ in exposed}

    keys = {re.match(parcel_lockers().line_pattern, line)["key"] for line in lines}
    reasons = Counter(r for a in expected for r in a["reasons"])  # `tracewatch score` on the same lines
    assert by(prom, "source", "tracewatch_records_total") == {"api": len(lines)}
    assert by(prom, "source", "tracewatch_sessions_scored_total") == {"api": len(keys)}
    assert status["sources"][0]["sessions_scored"] == len(keys)
    assert by(prom, "reason", 'tracewatch_alerts_total{source="api"}') == dict(reasons)
    assert sum(reasons.values()) >= len(expected) >= 10
    assert query(prom, "tracewatch_baseline_info") == {
        (("__name__", "tracewatch_baseline_info"), ("env", "example"), ("instance", instance),
         ("job", "tracewatch"), ("version", status["baseline_version"])): 1.0}
    for (name, labels), value in exposed.items():  # and equal to what the daemon itself says
        if name in ("tracewatch_records_total", "tracewatch_sessions_scored_total", "tracewatch_alerts_total",
                    "tracewatch_baseline_info", "tracewatch_sessions_open", "tracewatch_ingest_lag_bytes"):
            matcher = ", ".join(f'{k}="{v}"' for k, v in labels)
            assert list(query(prom, f"{name}{{{matcher}}}").values()) == [value], name

    # the example rules load and evaluate cleanly (GET /api/v1/rules)
    def evaluated() -> list[dict]:
        rules = prom.request("/api/v1/rules")[1]["data"]["groups"][0]["rules"]
        return rules if all(r["health"] == "ok" for r in rules) else []
    rules = prom.until(evaluated, "the rules' first evaluation")
    assert [r["name"] for r in rules] == list(RULES)
    assert {r["state"] for r in rules} == {"inactive"}  # a healthy daemon raises none of them

    # the daemon goes away: up == 0, and TracewatchDown is pending (for: 5m) — GET /api/v1/alerts
    assert daemon.terminate() == 0

    def down_alert() -> list[dict]:
        alerts = prom.request("/api/v1/alerts")[1]["data"]["alerts"]
        return [a for a in alerts if a["labels"]["alertname"] == "TracewatchDown"]
    (alert,) = prom.until(down_alert, "TracewatchDown")
    assert alert["state"] == "pending"
    assert alert["labels"] == {"alertname": "TracewatchDown", "instance": instance, "job": "tracewatch",
                               "env": "example", "severity": "page"}
    assert alert["annotations"]["summary"] == f"tracewatch on {instance} is down"


def test_the_example_config_and_rules_pass_promtool(tmp_path):
    promtool = need_program("promtool", "prometheus")
    check = subprocess.run([promtool, "check", "rules", str(PROM_DIR / "tracewatch-rules.yml")],
                           capture_output=True, text=True, timeout=60)
    assert check.returncode == 0 and f"SUCCESS: {len(RULES)} rules found" in check.stdout, check.stdout + check.stderr
    config = subprocess.run([promtool, "check", "config", str(PROM_DIR / "prometheus.yml")],
                            capture_output=True, text=True, timeout=60)
    assert config.returncode == 0, config.stdout + config.stderr
    # the rules' unit tests on synthetic series: each alert fires when it should, with its text
    unit = subprocess.run([promtool, "test", "rules", "tracewatch-rules.test.yml"], cwd=PROM_DIR,
                          capture_output=True, text=True, timeout=60)
    assert unit.returncode == 0 and "SUCCESS" in unit.stdout, unit.stdout + unit.stderr
