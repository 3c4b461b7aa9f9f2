"""Metrics: names and labels per DESIGN.md, values read back from a fresh registry."""

from __future__ import annotations

import math
import tempfile

from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.parser import text_string_to_metric_families

from tracewatch.config import parse_config
from tracewatch.pipeline import Pipeline
from tracewatch.service.metrics import SCORE_BUCKETS, DaemonMetrics


def _pipeline_snapshot() -> dict:
    """A real pipeline (fit mode: no baseline needed) fed a few lines, one of them unreadable."""
    # the rejected line's sample goes to <state_dir>/rejects.jsonl: keep it out of the work tree
    cfg = parse_config({"state_dir": tempfile.mkdtemp(prefix="tw-metrics-"),
                        "sources": [{"name": "api", "line_pattern": r"^(?P<ts>\S+) key=(?P<key>\S+) (?P<message>.*)$"}]})
    pipe = Pipeline(cfg)
    lines = ["2026-01-01T00:00:00Z key=a start", "2026-01-01T00:00:01Z key=a stop", "garbage without a key", ""]
    for i, line in enumerate(lines):
        pipe.feed_line("api", "f", line, i, "invalid_utf8" if i == 2 else None)
    return {"records": dict(pipe.records), "lines": dict(pipe.lines), "rejected": dict(pipe.rejected),
            "repaired": dict(pipe.repaired), "sessions_open": len(pipe.sessionizer.open),
            "sessions_scored": {"api": 7}, "alerts": {("api", "unseen_event"): 2},
            "sessions_evicted": 3, "baseline_version": "v0002", "sources": ["api", "idle-source"],
            "files": [{"source": "api", "lag_bytes": 100, "lag_seconds": 1.5},
                      {"source": "api", "lag_bytes": 20, "lag_seconds": 4.0}],
            "incidents": {"open": 2, "acknowledged": 1, "resolved": 0, "expected": 0},
            "notifications": {"webhook": {"sent": 3, "rejected": 0, "retried": 1, "pending": 1}}}


def test_values_from_the_snapshot():
    reg = CollectorRegistry()
    DaemonMetrics(reg, _pipeline_snapshot)
    get = reg.get_sample_value
    assert get("tracewatch_records_total", {"source": "api"}) == 3  # the blank line is not a record
    assert get("tracewatch_lines_total", {"source": "api"}) == 4
    assert get("tracewatch_records_rejected_total", {"source": "api", "reason": "no_match"}) == 1
    assert get("tracewatch_records_rejected_total", {"source": "api", "reason": "empty"}) == 1
    assert get("tracewatch_lines_repaired_total", {"source": "api", "reason": "invalid_utf8"}) == 1
    assert get("tracewatch_sessions_open") == 2  # key a, and the keyless line's time window
    assert get("tracewatch_sessions_scored_total", {"source": "api"}) == 7
    assert get("tracewatch_alerts_total", {"source": "api", "reason": "unseen_event"}) == 2
    assert get("tracewatch_sessions_evicted_total") == 3
    assert get("tracewatch_baseline_info", {"version": "v0002"}) == 1
    assert get("tracewatch_ingest_lag_bytes", {"source": "api"}) == 120
    assert get("tracewatch_ingest_lag_seconds", {"source": "api"}) == 4.0
    assert get("tracewatch_files_followed", {"source": "api"}) == 2
    assert get("tracewatch_files_followed", {"source": "idle-source"}) == 0


def test_rejected_series_exist_at_zero_for_each_formats_reasons():
    """Before any line is read, every reason a source's format may reject a line for is a series
    at 0, per source; a reason of another format is not."""
    cfg = parse_config({"state_dir": tempfile.mkdtemp(prefix="tw-metrics-"),
                        "sources": [{"name": "api", "line_pattern": r"^(?P<message>.*)$"},
                                    {"name": "tracer", "format": "strace"},
                                    {"name": "pods", "format": "cri", "payload_format": "jsonl"}]})
    pipe = Pipeline(cfg)
    reg = CollectorRegistry()
    DaemonMetrics(reg, lambda: {"sources": [s.name for s in cfg.sources], "rejected": dict(pipe.rejected),
                                "reject_reasons": pipe.reject_reasons})
    get = reg.get_sample_value
    expected = {"api": ("empty", "no_match", "continuation_cap"), "tracer": ("empty", "not_strace"),
                "pods": ("empty", "bad_container_line", "partial_unfinished", "joined_too_long",
                         "bad_json", "not_an_object", "no_message_field")}  # the runtime's and the payload's
    for source, reasons in expected.items():
        for reason in reasons:
            assert get("tracewatch_records_rejected_total", {"source": source, "reason": reason}) == 0, (source, reason)
    assert get("tracewatch_records_rejected_total", {"source": "tracer", "reason": "no_match"}) is None
    pipe.feed_line("tracer", "f", "strace: Process 4242 attached", 0)
    assert get("tracewatch_records_rejected_total", {"source": "tracer", "reason": "not_strace"}) == 1


def test_score_histogram_buckets():
    reg = CollectorRegistry()
    m = DaemonMetrics(reg, dict)
    for score in (0.1, 0.9, 2.5, math.inf):
        m.observe_score("api", score)
    get = reg.get_sample_value
    assert get("tracewatch_session_score_count", {"source": "api"}) == 4
    assert get("tracewatch_session_score_bucket", {"source": "api", "le": "1.0"}) == 2
    assert get("tracewatch_session_score_bucket", {"source": "api", "le": "3.0"}) == 3
    assert get("tracewatch_session_score_bucket", {"source": "api", "le": "+Inf"}) == 4
    assert list(SCORE_BUCKETS) == sorted(SCORE_BUCKETS)


def test_exposition_parses_and_follows_the_naming_rules():
    """The text exposition parses with prometheus_client's own parser (Prometheus text format
    0.0.4); names start with tracewatch_, counters end in _total and no label is a session key
    (Prometheus naming practices, prometheus.io/docs/practices/naming)."""
    reg = CollectorRegistry()
    DaemonMetrics(reg, _pipeline_snapshot).observe_score("api", 1.0)
    families = list(text_string_to_metric_families(generate_latest(reg).decode()))
    assert families
    allowed = {"source", "reason", "version", "le", "status", "sink"}
    for fam in families:
        if fam.name.startswith(("process_", "python_")):
            continue  # prometheus_client's standard collectors, with their own labels
        assert fam.name.startswith("tracewatch_")
        for sample in fam.samples:
            assert set(sample.labels) <= allowed, sample
            if fam.type == "counter":
                assert sample.name.endswith(("_total", "_created")), sample.name


def test_standard_collectors_build_info_and_promtool():
    """process_*/python_* families, tracewatch_build_info, no _created series; and Prometheus's own
    linter (`promtool check metrics`, from Debian's prometheus package) accepts the exposition."""
    import shutil
    import subprocess

    import pytest

    from tracewatch import __version__

    reg = CollectorRegistry()
    DaemonMetrics(reg, _pipeline_snapshot).observe_score("api", 1.0)
    text = generate_latest(reg).decode()
    names = {f.name for f in text_string_to_metric_families(text)}
    assert {"tracewatch_incidents", "tracewatch_notifications_sent", "tracewatch_notifications_failed",
            "tracewatch_notifications_pending"} <= names  # the parser names counters without _total
    assert {"process_cpu_seconds", "process_resident_memory_bytes", "python_info", "python_gc_objects_collected"} <= names
    assert f'tracewatch_build_info{{version="{__version__}"}} 1.0' in text
    assert "_created" not in text
    if shutil.which("promtool") is None:
        pytest.skip("promtool not installed (Debian package prometheus; `make test` installs it)")
    proc = subprocess.run(["promtool", "check", "metrics"], input=text, capture_output=True, text=True, timeout=30)
    assert proc.returncode == 0, proc.stdout + proc.stderr



def test_incident_and_notification_series_exist_at_zero_then_count(tmp_path):
    """A real store, tracker and notifier (tracewatch/service/incidents.py) sending to a real HTTP
    receiver on 127.0.0.1: every series with a known label set is 0 before anything happened."""
    from tracewatch.service.incidents import Incidents

    from .incident_data import Receiver, toy_alert

    receiver = Receiver().start()
    cfg = parse_config({"state_dir": str(tmp_path / "state"), "notify": {"webhook_url": receiver.url},
                        "sources": [{"name": "api"}, {"name": "audit"}]})
    incidents = Incidents(cfg)
    try:
        incidents.store  # noqa: B018 - opens it, as the daemon's start does
        reg = CollectorRegistry()
        DaemonMetrics(reg, lambda: {"sources": ["api", "audit"], **incidents.snapshot()}, ["api", "audit"])
        get = reg.get_sample_value
        for source in ("api", "audit"):
            for reason in ("far_from_baseline", "unseen_event"):
                assert get("tracewatch_alerts_total", {"source": source, "reason": reason}) == 0
            for reason in ("invalid_utf8", "line_too_long"):
                assert get("tracewatch_lines_repaired_total", {"source": source, "reason": reason}) == 0
            assert get("tracewatch_records_total", {"source": source}) == 0
            assert get("tracewatch_sessions_scored_total", {"source": source}) == 0
            assert get("tracewatch_session_score_count", {"source": source}) == 0
        for status in ("open", "acknowledged", "resolved", "expected"):
            assert get("tracewatch_incidents", {"status": status}) == 0
        assert get("tracewatch_notifications_sent_total", {"sink": "webhook"}) == 0
        assert get("tracewatch_notifications_failed_total", {"sink": "webhook", "reason": "retried"}) == 0
        assert get("tracewatch_notifications_failed_total", {"sink": "webhook", "reason": "rejected"}) == 0
        assert get("tracewatch_notifications_pending", {"sink": "webhook"}) == 0

        incidents.tracker.add(toy_alert("1", "A"))
        receiver.status = 503  # the receiver in trouble: kept and retried
        incidents.notifier.run_once(100.0)
        assert get("tracewatch_incidents", {"status": "open"}) == 1
        assert get("tracewatch_notifications_pending", {"sink": "webhook"}) == 1
        assert get("tracewatch_notifications_failed_total", {"sink": "webhook", "reason": "retried"}) == 1
        receiver.status = 200
        incidents.notifier.run_once(200.0)  # after the backoff
        assert get("tracewatch_notifications_sent_total", {"sink": "webhook"}) == 1
        assert get("tracewatch_notifications_pending", {"sink": "webhook"}) == 0
        incidents.tracker.add(toy_alert("2", "B"))  # unlike the first: an incident of its own
        receiver.status = 400  # refused for good
        incidents.notifier.run_once(300.0)
        assert get("tracewatch_incidents", {"status": "open"}) == 2
        assert get("tracewatch_notifications_failed_total", {"sink": "webhook", "reason": "rejected"}) == 1
        assert get("tracewatch_notifications_pending", {"sink": "webhook"}) == 0
        assert [r["status"] for r in receiver.requests] == [503, 200, 400]
    finally:
        incidents.close()
        receiver.stop()
