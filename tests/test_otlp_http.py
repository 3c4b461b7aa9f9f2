"""The OTLP/HTTP receiver of `tracewatch run`, fed by the real OpenTelemetry SDK's OTLP/HTTP
exporters (opentelemetry-exporter-otlp-proto-http: protobuf, gzip) from three processes that
call each other over HTTP with the trace context propagated (tests/otlp_app.py), and by its log
exporter; checked against the SDK's own OTLP/JSON file exporters writing the same spans: every
trace assembled whole, and the alerts a batch `tracewatch score` of those files gives. Also the
protocol's edges (opentelemetry-specification, protocol/otlp.md, "OTLP/HTTP"): JSON without the
protobuf library, gzip, size limits, 429 with Retry-After when the spool is full, and what is
acknowledged surviving kill -9."""

from __future__ import annotations

import base64
import gzip
import http.client
import json
import os
import subprocess
import sys
from collections import defaultdict
from pathlib import Path

import orjson
import pytest

from tracewatch.config import parse_config
from tracewatch.service.otlp_http import PROTOBUF, Receiver, RequestError, status_protobuf
from tracewatch.sources.spool import Spool

from .conftest import ROOT, run_cli
from .daemon_helpers import DaemonProcess, die_with_parent, free_port, no_daemon_left  # noqa: F401

HERE = Path(__file__).resolve().parent

CONFIG = """\
state_dir = "state"

[[sources]]
name = "traces"
format = "otlp-json"

[[sources]]
name = "applogs"
format = "otlp-logs-json"
log_key_attribute = "locker.id"

[sessions]
idle_timeout_s = 1.5

[model]
false_alarm_rate = 0.05

[server]
listen = "127.0.0.1:{port}"

[otlp]
enabled = true
listen = "127.0.0.1:{otlp_port}"
traces_source = "traces"
logs_source = "applogs"
max_request_bytes = {max_request}
max_queue_bytes = {max_queue}

[daemon]
poll_interval_s = 0.2
checkpoint_interval_s = 0.5
"""


def write_config(folder: Path, *, max_request: int = 20 << 20, max_queue: int = 64 << 20) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "tracewatch.toml"
    path.write_text(CONFIG.format(port=free_port(), otlp_port=free_port(), max_request=max_request,
                                  max_queue=max_queue))
    return path


def otlp_port(cfg_path: Path) -> int:
    return int(cfg_path.read_text().split('listen = "127.0.0.1:')[2].split('"')[0])


def run_backend(folder: Path, endpoint: str, *, requests: int, faulty: int, seed: int, logs: bool) -> dict:
    """The three services as three processes; returns their reference files (OTLP/JSON lines)."""
    folder.mkdir(parents=True)
    env = dict(os.environ, PYTHONPATH=str(ROOT), OTEL_BSP_EXPORT_TIMEOUT="30000")
    files = {name: folder / f"{name}.jsonl" for name in ("compartment-svc", "notify-svc", "locker-api")}
    peers = []
    for name in ("compartment-svc", "notify-svc"):
        proc = subprocess.Popen([sys.executable, str(HERE / "otlp_app.py"), "peer", name, "--endpoint", endpoint,
                                 "--out", str(files[name])], stdout=subprocess.PIPE, text=True, env=env,
                                preexec_fn=die_with_parent)
        peers.append((proc, f"http://127.0.0.1:{proc.stdout.readline().split()[1]}"))
    args = [sys.executable, str(HERE / "otlp_app.py"), "api", "--endpoint", endpoint, "--out",
            str(files["locker-api"]), "--peers", ",".join(url for _, url in peers), "--requests", str(requests),
            "--faulty", str(faulty), "--seed", str(seed)]
    if logs:
        files["logs"] = folder / "logs.jsonl"
        args += ["--logs-out", str(files["logs"])]
    subprocess.run(args, check=True, env=env, timeout=600, stdout=subprocess.DEVNULL)
    for proc, _ in peers:
        proc.wait(timeout=60)
        assert proc.returncode == 0
    return files


def reference_traces(files: dict, out: Path) -> dict[str, int]:
    """The file exporters' lines in the order the receiver got the same spans (per trace: the
    compartment's, the notifier's, the api's), written to ``out``; spans per trace id."""
    docs: dict[str, list[list[str]]] = defaultdict(lambda: [[], [], []])
    order, spans = [], defaultdict(int)
    for i, name in enumerate(("compartment-svc", "notify-svc", "locker-api")):
        for line in files[name].read_text().splitlines():
            doc = json.loads(line)
            tids = {s["traceId"].lower() for rs in doc["resourceSpans"] for ss in rs["scopeSpans"] for s in ss["spans"]}
            (tid,) = tids  # each flush holds one request's spans
            docs[tid][i].append(line)
            spans[tid] += sum(len(ss["spans"]) for rs in doc["resourceSpans"] for ss in rs["scopeSpans"])
            if name == "locker-api":
                order.append(tid)
    out.write_text("".join(line + "\n" for tid in order for part in docs[tid] for line in part))
    return dict(spans)


def test_spans_from_three_processes_are_assembled_whole_and_alert_as_the_batch(tmp_path):
    pytest.importorskip("opentelemetry.exporter.otlp.proto.http", reason="the test extras bring "
                        "opentelemetry-exporter-otlp-proto-http")
    cfg_path = write_config(tmp_path)
    base = run_backend(tmp_path / "baseline", "none", requests=220, faulty=0, seed=1, logs=True)
    reference_traces(base, tmp_path / "baseline-traces.jsonl")
    both = tmp_path / "fit"
    both.mkdir()
    (both / "traces.jsonl").write_bytes((tmp_path / "baseline-traces.jsonl").read_bytes())
    (both / "applogs.jsonl").write_bytes(base["logs"].read_bytes())
    fit_cfg = tmp_path / "fit.toml"
    fit_cfg.write_text(cfg_path.read_text().replace('format = "otlp-json"\n', f'format = "otlp-json"\npaths = ["{both}/traces.jsonl"]\n')
                       .replace('log_key_attribute', f'paths = ["{both}/applogs.jsonl"]\nlog_key_attribute')
                       .replace("enabled = true", "enabled = false").replace('traces_source = "traces"\n', "")
                       .replace('logs_source = "applogs"\n', ""))
    run_cli("fit", "--config", str(fit_cfg), check=True)

    daemon = DaemonProcess(cfg_path).ready()
    endpoint = f"http://127.0.0.1:{otlp_port(cfg_path)}"
    day = run_backend(tmp_path / "day", endpoint, requests=120, faulty=6, seed=2, logs=True)
    spans = reference_traces(day, tmp_path / "day-traces.jsonl")
    n_logs = sum(len(lr["logRecords"]) for line in day["logs"].read_text().splitlines()
                 for rl in json.loads(line)["resourceLogs"] for lr in rl["scopeLogs"])
    assert len(spans) == 120 and n_logs == 240  # one trace a request, across the three processes
    # a request: 3 spans in the api, 2 in each service it calls; a faulty one calls the compartment 4 times, no notify
    assert sorted(spans.values()) == [7] * 114 + [1 + 4 + 4 * 2] * 6

    def done() -> bool:
        s = {src["name"]: src for src in daemon.status()["sources"]}
        return (s["traces"]["records"] == sum(spans.values()) and s["applogs"]["records"] == n_logs
                and daemon.status()["sessions_open"] == 0)

    daemon.until(done, "every span and log record, every session closed")
    status = daemon.status()
    assert daemon.terminate() == 0
    by_name = {s["name"]: s for s in status["sources"]}
    assert by_name["traces"]["sessions_scored"] == len(spans)  # one session a trace: assembled whole
    assert not by_name["traces"]["rejected"] and not by_name["applogs"]["rejected"]
    got = [json.loads(x) for x in (tmp_path / "state" / "alerts.jsonl").read_text().splitlines()]
    live = sorted((a["session_key"], a["events"], a["score"], tuple(a["reasons"])) for a in got if a["source"] == "traces")
    assert all(events == spans[key] for key, events, _, _ in live)

    batch = run_cli("score", "--config", str(fit_cfg), "--source", "traces", str(tmp_path / "day-traces.jsonl"),
                    check=True).stdout
    expected = sorted((a["session_key"], a["events"], a["score"], tuple(a["reasons"]))
                      for a in map(json.loads, batch.splitlines()))
    assert len(expected) >= 6  # the faulty requests at least
    assert live == expected
    # logs: inside a request keyed by its trace id, outside by the locker.id attribute
    scored_logs = by_name["applogs"]["sessions_scored"]
    assert scored_logs == len(spans) + 5


def _post(port: int, path: str, body: bytes, headers: dict) -> tuple[int, dict, bytes]:
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=10)
    try:
        conn.request("POST", path, body, headers)
        resp = conn.getresponse()
        return resp.status, dict(resp.getheaders()), resp.read()
    finally:
        conn.close()


SPAN_DOC = {"resourceSpans": [{"scopeSpans": [{"spans": [
    {"traceId": "5b8efff798038103d269b633813fc60c", "spanId": "eee19b7ec3c1b174", "name": "POST /pickups",
     "kind": 2, "startTimeUnixNano": "1796032800000000000", "endTimeUnixNano": "1796032800100000000"}]}]}]}


def fit_one_span_traces(cfg_path: Path) -> None:
    """A baseline of 220 one-span traces for the traces source (only so that the daemon starts)."""
    fit_dir = cfg_path.parent / "fit"
    fit_dir.mkdir()
    docs = [{"resourceSpans": [{"scopeSpans": [{"spans": [{**SPAN_DOC["resourceSpans"][0]["scopeSpans"][0]["spans"][0],
             "traceId": f"{i + 1:032x}", "startTimeUnixNano": str(1796032800000000000 + i * 10**10)}]}]}]}
            for i in range(220)]
    (fit_dir / "t.jsonl").write_text("".join(json.dumps(d) + "\n" for d in docs))
    run_cli("fit", "--config", str(cfg_path), "--source", "traces", str(fit_dir / "t.jsonl"), check=True)


class _Sink:
    def __init__(self) -> None:
        self.lines: list[str] = []

    def feed_block(self, source, stream, lines, offsets, repairs) -> None:
        self.lines += lines

    def end_stream(self, source, stream) -> None:
        pass


def _receiver(tmp_path: Path, max_line: int = 20 << 20, **limits) -> tuple[Receiver, Spool, _Sink]:
    cfg = parse_config({"sources": [{"name": "traces", "format": "otlp-json"}],
                        "otlp": {"enabled": True, "traces_source": "traces", **limits}}).otlp
    spool = Spool("traces", tmp_path / "spool", max_queue_bytes=cfg.max_queue_bytes, file_bytes=cfg.spool_file_bytes,
                  max_line_bytes=max_line)
    sink = _Sink()
    spool.attach(None, sink)
    return Receiver(cfg, {"/v1/traces": spool}, accepting=lambda: True, wake=lambda: None), spool, sink


def test_json_gzip_and_protobuf_requests_decode_to_the_same_document(tmp_path):
    from opentelemetry.proto.collector.trace.v1.trace_service_pb2 import ExportTraceServiceRequest
    from google.protobuf.json_format import ParseDict

    receiver, spool, sink = _receiver(tmp_path)
    body = orjson.dumps(SPAN_DOC)
    receiver.take("/v1/traces", "application/json", "", body)
    receiver.take("/v1/traces", "application/json", "gzip", gzip.compress(body))
    as_mapping = json.loads(json.dumps(SPAN_DOC))  # the protobuf JSON mapping writes bytes in base64
    as_mapping["resourceSpans"][0]["scopeSpans"][0]["spans"][0].update(
        traceId=base64.b64encode(bytes.fromhex("5b8efff798038103d269b633813fc60c")).decode(),
        spanId=base64.b64encode(bytes.fromhex("eee19b7ec3c1b174")).decode())
    proto = ParseDict(as_mapping, ExportTraceServiceRequest()).SerializeToString()
    receiver.take("/v1/traces", PROTOBUF, "gzip", gzip.compress(proto))
    while spool.poll():
        pass
    first, second, third = (json.loads(x) for x in sink.lines)
    assert first == second == SPAN_DOC
    span = third["resourceSpans"][0]["scopeSpans"][0]["spans"][0]
    # the protobuf JSON mapping: ids base64, enums by name, 64-bit integers as strings
    assert span["traceId"] == "W47/95gDgQPSabYzgT/GDA==" and span["kind"] == "SPAN_KIND_SERVER"
    for bad, status in [(b"{cut", 400), (b'{"resourceSpans": 3}', 400)]:
        with pytest.raises(RequestError) as err:
            receiver.take("/v1/traces", "application/json", "", bad)
        assert err.value.status == status
    with pytest.raises(RequestError) as err:
        receiver.take("/v1/traces", "text/plain", "", body)
    assert err.value.status == 415
    with pytest.raises(RequestError) as err:
        receiver.take("/v1/logs", "application/json", "", body)
    assert err.value.status == 404
    # google.rpc.Status {code: 8, message: "full"} on the protobuf wire (checked with the library)
    from google.rpc.status_pb2 import Status  # comes with protobuf's googleapis-common-protos, if present
    assert Status.FromString(status_protobuf(8, "full")).message == "full"


def test_size_limits_hold_for_the_body_and_once_decompressed(tmp_path):
    receiver, _, _ = _receiver(tmp_path, max_request_bytes=4096)
    bomb = gzip.compress(b'{"resourceSpans": [' + b" " * 100_000 + b"]}")
    assert len(bomb) < 4096
    with pytest.raises(RequestError) as err:
        receiver.take("/v1/traces", "application/json", "gzip", bomb)
    assert err.value.status == 413


def test_a_request_longer_than_max_document_bytes_as_json_is_refused_not_cut(tmp_path):
    """The spool is read up to the source's max_document_bytes, as its files are: a request
    whose OTLP/JSON line is longer is answered 413 (the sender knows), never spooled to be cut."""
    receiver, spool, sink = _receiver(tmp_path, max_line=4096)
    spans = SPAN_DOC["resourceSpans"][0]["scopeSpans"][0]["spans"] * 40
    big = orjson.dumps({"resourceSpans": [{"scopeSpans": [{"spans": spans}]}]})
    assert len(big) > 4096
    with pytest.raises(RequestError) as err:
        receiver.take("/v1/traces", "application/json", "", big)
    assert err.value.status == 413 and "max_document_bytes" in str(err.value)
    receiver.take("/v1/traces", "application/json", "", orjson.dumps(SPAN_DOC))
    while spool.poll():
        pass
    assert [json.loads(x) for x in sink.lines] == [SPAN_DOC]


def test_a_full_spool_answers_429_with_retry_after_and_kill_9_loses_nothing_acknowledged(tmp_path):
    """With a queue of 64 KiB and the loop busy elsewhere, requests are refused with 429 and
    Retry-After (OTLP/HTTP Throttling); every request answered 200 is read after a kill -9."""
    receiver, spool, _ = _receiver(tmp_path, max_queue_bytes=1 << 16, retry_after_s=2)
    body = orjson.dumps(SPAN_DOC)
    answers = []
    for _ in range(400):  # nobody reads: the queue fills
        try:
            receiver.take("/v1/traces", "application/json", "", body)
            answers.append(200)
        except RequestError as exc:
            answers.append((exc.status, exc.retry_after))
    assert answers.count(200) == (1 << 16) // (len(body) + 1)
    assert set(answers[answers.count(200):]) == {(429, 2)}

    cfg_path = write_config(tmp_path / "live", max_queue=1 << 20)
    fit_one_span_traces(cfg_path)
    daemon = DaemonProcess(cfg_path).ready()
    port = otlp_port(cfg_path)
    acked = 0
    for i in range(300):
        doc = {"resourceSpans": [{"scopeSpans": [{"spans": [{**SPAN_DOC["resourceSpans"][0]["scopeSpans"][0]["spans"][0],
               "traceId": f"{10_000 + i:032x}", "startTimeUnixNano": str(1796040000000000000 + i * 10**9)}]}]}]}
        status, headers, _ = _post(port, "/v1/traces", gzip.compress(orjson.dumps(doc)),
                                   {"Content-Type": "application/json", "Content-Encoding": "gzip"})
        if status == 200:
            acked += 1
        if i == 150:
            daemon.kill()  # whatever was acknowledged is in the spool
            daemon = DaemonProcess(cfg_path).ready()
            port = otlp_port(cfg_path)
    daemon.until(lambda: daemon.status()["sources"][0]["records"] >= acked, f"{acked} spans")
    records = daemon.status()["sources"][0]["records"]
    assert daemon.terminate() == 0
    assert records == acked == 300
    spool_files = os.listdir(tmp_path / "live" / "state" / "otlp" / "traces")
    assert len(spool_files) <= 2  # read files are deleted after the checkpoint past them


def test_a_batch_over_64_kib_from_the_sdk_exporter_is_read_whole_across_a_restart(tmp_path):
    """The SDK's OTLP/HTTP exporter sends one batch of 500 spans (one request, a spool line of
    well over 64 KiB): every span is read, as one session. A restart after a crash left a long
    request cut short at the end of the spool (never acknowledged) reads on from the checkpoint:
    nothing read twice, nothing lost, and the next big batch is read whole too."""
    pytest.importorskip("opentelemetry.exporter.otlp.proto.http", reason="the test extras bring "
                        "opentelemetry-exporter-otlp-proto-http")
    from opentelemetry.exporter.otlp.proto.http import Compression
    from opentelemetry.exporter.otlp.proto.http.trace_exporter import OTLPSpanExporter
    from opentelemetry.sdk.resources import Resource
    from opentelemetry.sdk.trace import TracerProvider
    from opentelemetry.sdk.trace.export import BatchSpanProcessor

    cfg_path = write_config(tmp_path / "live")
    cfg_path.write_text(cfg_path.read_text().replace("[sessions]\n", "[sessions]\nmax_events = 5000\n"))
    fit_one_span_traces(cfg_path)
    spool_dir = tmp_path / "live" / "state" / "otlp" / "traces"

    def send_batch(n_spans: int) -> None:
        provider = TracerProvider(resource=Resource.create({"service.name": "locker-api"}))
        exporter = OTLPSpanExporter(endpoint=f"http://127.0.0.1:{otlp_port(cfg_path)}/v1/traces",
                                    compression=Compression.Gzip)
        provider.add_span_processor(BatchSpanProcessor(exporter, schedule_delay_millis=600_000,
                                                       max_export_batch_size=4096, max_queue_size=8192))
        tracer = provider.get_tracer("parcel-lockers", "1.0")
        with tracer.start_as_current_span("POST /sweeps"):
            for i in range(n_spans - 1):
                with tracer.start_as_current_span("check compartment") as span:
                    span.set_attribute("locker.compartment", f"LK-17/{i:04d}")
                    span.set_attribute("locker.note", "door sensor, lock and camera checked " * 3)
        assert provider.force_flush(30_000)
        provider.shutdown()

    daemon = DaemonProcess(cfg_path).ready()
    send_batch(500)
    daemon.until(lambda: daemon.status()["sources"][0]["sessions_scored"] == 1, "the batch's trace scored")
    first = daemon.status()["sources"][0]
    assert daemon.terminate() == 0
    lines = [line for f in sorted(spool_dir.iterdir()) for line in f.read_bytes().splitlines()]
    assert len(lines) == 1 and len(lines[0]) > 3 * 65536  # one request, one line, far over 64 KiB
    assert first["records"] == 500 and not first["rejected"]

    # a crash in the middle of writing a long request: its first 100 KB, no newline
    with open(sorted(spool_dir.iterdir())[-1], "ab") as fh:
        fh.write(lines[0][:100_000])
    daemon = DaemonProcess(cfg_path).ready()
    send_batch(300)
    # the counts go on from the checkpoint: the first batch's 500 spans are not read again
    daemon.until(lambda: daemon.status()["sources"][0]["sessions_scored"] == 2, "the second batch's trace scored")
    second = daemon.status()["sources"][0]
    assert daemon.terminate() == 0
    assert second["records"] == 500 + 300 and not second["rejected"]
    assert "cut short by a crash" in daemon.stderr()


def test_the_spool_reads_a_line_longer_than_a_read_chunk(tmp_path):
    """A request larger than what one poll reads (4 MiB) is handed on whole, in one block."""
    from tracewatch.sources.spool import READ_CHUNK

    _, spool, sink = _receiver(tmp_path)
    doc = {"resourceSpans": [{"scopeSpans": [{"spans": [SPAN_DOC["resourceSpans"][0]["scopeSpans"][0]["spans"][0]] * 30_000}]}]}
    line = orjson.dumps(doc)
    assert len(line) > READ_CHUNK
    assert spool.append(line) == "accepted" and spool.append(orjson.dumps(SPAN_DOC)) == "accepted"
    while spool.poll():
        pass
    assert [x.encode() for x in sink.lines] == [line, orjson.dumps(SPAN_DOC)]
