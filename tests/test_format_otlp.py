"""Format ``otlp-json``: OTLP/JSON trace exports, from hand-made documents to real traces made
with the OpenTelemetry Python SDK, fitted and scored end to end."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from collections import Counter
from pathlib import Path

import orjson
import pytest

from tracewatch.batch import fit_files, score_files
from tracewatch.config import SourceConfig, parse_config
from tracewatch.errors import ConfigError
from tracewatch.formats import feed_lines
from tracewatch.formats.otlp import OtlpJsonFormat
from tracewatch.records import Record, Rejection

from .daemon_helpers import DaemonProcess, free_port, no_daemon_left  # noqa: F401 - the fixture stops a daemon left running

HERE = Path(__file__).resolve().parent
TRACE = "5B8EFFF798038103D269B633813FC60C"  # the upper-case hex form the OTLP spec shows as valid


def fmt(**kw) -> OtlpJsonFormat:
    return OtlpJsonFormat(SourceConfig(name="traces", format="otlp-json", **kw))


def span(name: str, start, *, trace: str = TRACE, kind=2, status=None, **extra) -> dict:
    s = {"traceId": trace, "spanId": "EEE19B7EC3C1B174", "name": name, "kind": kind,
         "startTimeUnixNano": start, "endTimeUnixNano": "1544712661100000000"}
    if status is not None:
        s["status"] = status
    return {**s, **extra}


def doc(*groups: tuple[str, list[dict]]) -> dict:
    return {"resourceSpans": [
        {"resource": {"attributes": [{"key": "service.name", "value": {"stringValue": svc}}]},
         "scopeSpans": [{"scope": {"name": "lib"}, "spans": spans}]} for svc, spans in groups]}


# -- the OTLP/JSON rules -------------------------------------------------------------------------
def test_one_span_per_record_keyed_by_trace_with_event_type():
    d = doc(("checkout-svc", [span("POST /reserve", "1544712661000000000", status={"code": 2}),
                              span("SELECT stock", 1544712660500000000, kind=3, status={})]))
    out = fmt().feed(json.dumps(d), 7)
    assert all(isinstance(r, Record) for r in out)
    # opentelemetry-proto docs/specification.md, "JSON Protobuf Encoding": ids are hex in either
    # case; 64-bit integers may be decimal strings or numbers; enums are integers
    # (SpanKind 2 = SERVER, 3 = CLIENT; StatusCode 2 = ERROR, from trace/v1/trace.proto)
    assert [r.key for r in out] == [TRACE.lower()] * 2
    assert [r.event for r in out] == ["checkout-svc:CLIENT:SELECT stock", "checkout-svc:SERVER:POST /reserve:ERROR"]
    assert [r.ts for r in out] == [1544712660.5, 1544712661.0]
    assert [r.level for r in out] == [None, "ERROR"] and out[0].message == "SELECT stock"
    assert out[0].offset == 7 and orjson.loads(out[0].raw)["name"] == "SELECT stock"


def test_spans_of_a_document_are_sorted_by_start_across_services():
    d = doc(("b-svc", [span("late", "300"), span("first", "100")]), ("a-svc", [span("middle", "200")]))
    assert [r.message for r in fmt().feed(json.dumps(d), 0)] == ["first", "middle", "late"]


def test_unknown_fields_are_ignored_and_defaults_apply():
    # "OTLP/JSON receivers MUST ignore message fields with unknown names" (specification.md)
    d = {"resourceSpans": [{"resource": {}, "futureField": [1, 2], "scopeSpans": [
        {"spans": [{"traceId": TRACE, "name": "tick", "brandNew": {"x": 1}}]}]}], "extra": True}
    [rec] = fmt().feed(json.dumps(d), 0)
    # service.name defaults to "unknown_service" (OpenTelemetry resource semantic conventions);
    # a missing kind is 0, SPAN_KIND_UNSPECIFIED; a missing start time gives no time
    assert rec.event == "unknown_service:UNSPECIFIED:tick" and rec.ts is None


def test_span_event_parts_are_configurable():
    d = doc(("svc", [span("op", "1", status={"code": 2})]))
    [rec] = fmt(span_event=["name", "status"]).feed(json.dumps(d), 0)
    assert rec.event == "op:ERROR"
    [rec] = fmt(span_event=["service", "name"]).feed(json.dumps(d), 0)
    assert rec.event == "svc:op"
    with pytest.raises(ConfigError, match='span_event: must include "name"'):
        parse_config({"sources": [{"name": "t", "format": "otlp-json", "span_event": ["kind"]}]})


def test_lenient_forms_seen_in_the_wild():
    # the plain protobuf JSON mapping writes ids in base64 and enums by name (not OTLP/JSON,
    # but some exporters do it); both name the same span as the hex / integer form
    b64 = "W47/95gDgQPSabYzgT/GDA=="  # base64 of the bytes 5B8EFFF7...3FC60C
    d = doc(("svc", [span("op", "5", trace=b64, kind="SPAN_KIND_CLIENT", status={"code": "STATUS_CODE_ERROR"})]))
    [rec] = fmt().feed(json.dumps(d), 0)
    assert rec.key == TRACE.lower() and rec.event == "svc:CLIENT:op:ERROR"


@pytest.mark.parametrize("bad", [
    {"traceId": "0" * 32, "name": "x"},  # all-zero trace id is invalid (trace.proto)
    {"traceId": "xyz", "name": "x"},
    {"traceId": TRACE, "name": ""},
    {"traceId": TRACE},
    "not a span",
], ids=["zero-id", "not-hex", "empty-name", "no-name", "not-an-object"])
def test_unusable_spans_are_rejected_one_by_one(bad):
    d = doc(("svc", [span("good", "1"), bad]))
    out = fmt().feed(json.dumps(d), 0)
    assert sorted(type(x).__name__ for x in out) == ["Record", "Rejection"]
    assert [x.reason for x in out if isinstance(x, Rejection)] == ["bad_span"]


# -- lines to documents ------------------------------------------------------------------------
def test_pretty_printed_document_spread_over_lines():
    d = doc(("svc", [span("a", "1"), span("b", "2")]))
    lines = json.dumps(d, indent=2).splitlines()
    f = fmt()
    out = [f.feed(line, i) for i, line in enumerate(lines)]
    assert all(o == [] for o in out[:-1])  # held until the document is complete
    assert [r.message for r in out[-1]] == ["a", "b"] and out[-1][0].offset == 0
    assert f.lines_in_documents == len(lines)


def test_documents_of_both_kinds_mixed_with_garbage():
    d = doc(("svc", [span("a", "1")]))
    pretty = json.dumps(d, indent=4).splitlines()
    lines = [json.dumps(d), "", *pretty, "not json", '{"resourceMetrics": []}', "[1, 2]", json.dumps(d)]
    f = fmt()
    out = feed_lines(f, lines)
    assert [r.message for r in out if isinstance(r, Record)] == ["a", "a", "a"]
    assert Counter(r.reason for r in out if isinstance(r, Rejection)) == {
        "empty": 1, "bad_json": 1, "not_traces": 1, "not_an_object": 1}
    assert f.lines_in_documents + 4 == len(lines)


def test_a_cut_document_is_rejected_and_reading_resumes():
    d = doc(("svc", [span("a", "1")]))
    pretty = json.dumps(d, indent=2).splitlines()
    # a pretty-printed document cut short, then a whole one; a JSON line cut by the line limit,
    # then a whole one; a document still open at the end of the file
    lines = pretty[:6] + pretty + [json.dumps(d)[:40], json.dumps(d)] + pretty[:3]
    f = fmt()
    out = feed_lines(f, lines)
    assert [r.message for r in out if isinstance(r, Record)] == ["a", "a"]
    assert Counter(r.reason for r in out if isinstance(r, Rejection)) == {"truncated_document": 6 + 1 + 3}
    assert f.lines_in_documents == len(pretty) + 1


def test_documents_over_the_bound_are_rejected_without_being_held():
    big = doc(("svc", [span(f"op{i}", str(i), attributes=[{"key": "k", "value": {"stringValue": "v" * 200}}])
                       for i in range(20)]))
    small = doc(("svc", [span("ok", "1")]))
    lines = json.dumps(big, indent=2).splitlines() + json.dumps(small, indent=2).splitlines()
    f = fmt(max_document_bytes=2048)
    out = []
    for i, line in enumerate(lines):
        out += f.feed(line, i)
        assert f._held_bytes <= 2048 + len(line.encode()) + 1  # never holds much more than the bound
    out += f.flush()
    assert [r.message for r in out if isinstance(r, Record)] == ["ok"]
    too_large = [r for r in out if isinstance(r, Rejection)]
    assert {r.reason for r in too_large} == {"document_too_large"}
    assert len(too_large) == len(json.dumps(big, indent=2).splitlines())


# -- real traces from the OpenTelemetry SDK ----------------------------------------------------
def run_app(tmp_path: Path, name: str, *args: str) -> tuple[Path, list[dict]]:
    out, labels = tmp_path / f"{name}.jsonl", tmp_path / f"{name}-labels.jsonl"
    subprocess.run([sys.executable, str(HERE / "otel_app.py"), str(out), str(labels), *args], check=True,
                   timeout=120)
    return out, [json.loads(x) for x in labels.read_text().splitlines()]


def fit_and_score(tmp_path: Path, base: Path, day: Path | list[Path], rate: float) -> dict[str, dict]:
    cfg = parse_config({"state_dir": str(tmp_path / "state"),
                        "sources": [{"name": "traces", "format": "otlp-json"}],
                        "model": {"false_alarm_rate": rate}})
    baseline, _, pipeline = fit_files(cfg, [("traces", base)])
    assert not pipeline.rejected  # the SDK's exports are read without a single reject
    verdicts: dict[str, dict] = {}
    days = day if isinstance(day, list) else [day]
    score_files(cfg, [("traces", d) for d in days], baseline,
                lambda v: verdicts.__setitem__(v["session_key"], v), score_all=True)
    return verdicts


def test_sdk_traces_faulty_flows_flagged_normal_ones_not(tmp_path):
    base, base_labels = run_app(tmp_path, "baseline", "--normal", "160", "--seed", "1")
    day, day_labels = run_app(tmp_path, "day", "--normal", "60", "--faulty", "4", "--seed", "2")
    # the file holds what the SDK's OTLP/JSON file exporter wrote: one export per line
    first = json.loads(base.read_text().splitlines()[0])
    assert first["resourceSpans"][0]["scopeSpans"][0]["spans"][0]["traceId"] in {x["trace_id"] for x in base_labels}
    # 160 baseline traces leave 40 for calibration: a false-alarm rate of 0.05 needs at least
    # 1/0.05 - 1 = 19 of them (split-conformal), the default 0.005 would need 199
    verdicts = fit_and_score(tmp_path, base, day, rate=0.05)
    flagged = Counter((x["label"], verdicts[x["trace_id"]]["alert"]) for x in day_labels)
    for kind in ("reserve_error", "notify_skipped", "door_loop", "unexpected_call"):
        assert flagged[(kind, True)] == 4, (kind, flagged)
    # normal flows repeat a handful of shapes the baseline holds many times: none is flagged
    assert flagged[("normal", True)] == 0, flagged
    errors = [verdicts[x["trace_id"]] for x in day_labels if x["label"] == "reserve_error"]
    assert all("unseen_event" in v["reasons"] for v in errors)  # the ":ERROR" span types are new


def test_sdk_traces_straddling_exports_and_files_are_assembled_whole(tmp_path):
    """The SDK's exporters in batches of 7 spans cut anywhere in a request, one file per
    service: a trace's children are exported before its root, and its spans sit in up to four
    files. Each trace is still one session in start-time order, judged like the baseline's."""
    base, _ = run_app(tmp_path, "baseline", "--normal", "160", "--seed", "1")
    day, day_labels = run_app(tmp_path, "day", "--normal", "60", "--faulty", "4", "--seed", "2",
                              "--straddle", "7")
    files = sorted(tmp_path.glob("day.*.jsonl"))
    assert len(files) == 4
    exports: dict[str, set] = {}  # trace id -> (file, line) of the exports holding its spans
    for path in files:
        for n, line in enumerate(path.read_text().splitlines()):
            for rs in json.loads(line)["resourceSpans"]:
                for ss in rs["scopeSpans"]:
                    for span in ss["spans"]:
                        exports.setdefault(span["traceId"], set()).add((path.name, n))
    in_one_file = [{n for f, n in where if f == name} for where in exports.values() for name in
                   {f for f, _ in where}]
    assert sum(len(lines) > 1 for lines in in_one_file) >= 20, "the exports must cut through traces"
    verdicts = fit_and_score(tmp_path, base, files, rate=0.05)
    assert len(verdicts) == len(day_labels) == 76  # every trace whole: one session each
    flagged = Counter((x["label"], verdicts[x["trace_id"]]["alert"]) for x in day_labels)
    for kind in ("reserve_error", "notify_skipped", "door_loop", "unexpected_call"):
        assert flagged[(kind, True)] == 4, (kind, flagged)
    assert flagged[("normal", True)] == 0, flagged  # straddling raises nothing


def test_the_daemon_following_services_files_as_they_grow_alerts_as_score_on_the_finished_files(tmp_path):
    """Four services each write their own OTLP/JSON file with the SDK's file exporter (exports
    of 7 spans cut anywhere in a request) while the daemon follows the files as they grow; then
    `score` reads the same finished files in one batch. The daemon's alerts are score's: the
    same sessions (alert ids, trace ids, start and end), the same reasons and scores — whichever
    file's piece of a trace the daemon happened to read first."""
    logs = tmp_path / "logs"
    logs.mkdir()
    cfg = tmp_path / "tracewatch.toml"
    cfg.write_text(f"""state_dir = "{tmp_path / 'state'}"
[[sources]]
name = "traces"
format = "otlp-json"
paths = ["{logs}/day.*.jsonl"]
[sessions]
idle_timeout_s = 10
[model]
false_alarm_rate = 0.05
[server]
listen = "127.0.0.1:{free_port()}"
[daemon]
poll_interval_s = 0.2
checkpoint_interval_s = 0.5
""")
    # an exporter holds a service's spans until it has 7 (the payment service's few until the
    # run ends, about half a second here): the idle timeout must outlast that, live as in any
    # deployment, or the daemon closes a trace before its last piece comes
    base, _ = run_app(tmp_path, "baseline", "--normal", "160", "--seed", "1")
    subprocess.run([sys.executable, "-m", "tracewatch", "fit", "--config", str(cfg), str(base)], check=True,
                   timeout=300, capture_output=True, env={**os.environ, "PYTHONPATH": str(HERE.parent)})
    daemon = DaemonProcess(cfg).ready()
    _, day_labels = run_app(logs, "day", "--normal", "60", "--faulty", "4", "--seed", "2", "--straddle", "7")
    files = sorted(logs.glob("day.*.jsonl"))
    assert len(files) == 4
    n_spans = sum(len(ss["spans"]) for f in files for line in f.read_text().splitlines()
                  for rs in json.loads(line)["resourceSpans"] for ss in rs["scopeSpans"])

    def done() -> bool:
        status = daemon.status()
        src = status["sources"][0]
        return src["records"] == n_spans and src["sessions_scored"] == len(day_labels) and status["sessions_open"] == 0

    daemon.until(done, f"{n_spans} spans read and {len(day_labels)} traces scored", timeout=90)
    assert daemon.terminate() == 0
    live = [json.loads(x) for x in (tmp_path / "state" / "alerts.jsonl").read_text().splitlines()]
    batch = subprocess.run([sys.executable, "-m", "tracewatch", "score", "--config", str(cfg), *map(str, files)],
                           check=True, timeout=300, capture_output=True, text=True,
                           env={**os.environ, "PYTHONPATH": str(HERE.parent)}).stdout
    scored = [json.loads(x) for x in batch.splitlines()]

    def comparable(alerts: list[dict]) -> list[tuple]:
        return sorted((a["alert_id"], a["session_key"], tuple(a["reasons"]), round(a["score"], 9), a["events"],
                       a["start"], a["end"]) for a in alerts)

    assert len(scored) >= 16  # the four faulty kinds, four each, at least
    assert comparable(live) == comparable(scored)
    faulty = {x["trace_id"] for x in day_labels if x["label"] != "normal"}
    assert faulty <= {a["session_key"] for a in live}


# -- the demo's trace source ---------------------------------------------------------------------
def test_demo_traces_parse_and_their_anomalies_are_caught(tmp_path):
    from tracewatch.demo.run import tally
    from tracewatch.demo.scenario import ANOMALY_KINDS
    from tracewatch.demo.traces import write_trace_scenario

    base, day, labels = write_trace_scenario(tmp_path, seed=7, n_baseline=600, n_normal=300, per_kind=5)
    verdicts = fit_and_score(tmp_path, base, day, rate=0.02)
    truth = [orjson.loads(x) for x in labels.read_bytes().splitlines()]
    assert {t["session_key"] for t in truth} == set(verdicts)  # every generated trace became a session
    result = tally(verdicts, truth)
    for kind in ANOMALY_KINDS:
        assert result[kind]["share"] >= 0.8, (kind, result[kind])
    # 600 baseline sessions leave 150 for calibration; false alarms stay a small share (the
    # model's own tests check the rate itself on larger samples)
    assert result["normal"]["share"] <= 0.08, result["normal"]
