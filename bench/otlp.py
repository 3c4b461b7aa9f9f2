"""Benchmark of the OTLP/HTTP receiver: spans per second from request to record.

    bench/otlp.py [--spans N] [--senders K]

A live `tracewatch run` (subprocess, loopback) with the receiver on; a baseline fitted on the
demo's traces (tracewatch.demo.traces: the parcel-locker sessions as OTLP/JSON). The day's
traces are encoded once, before timing, as OTLP/HTTP requests of about 512 spans (the SDK's
default batch), in protobuf through opentelemetry-proto and, separately, as JSON; ``K`` sender
threads POST them with gzip as fast as they are answered (retrying on 429 after its
Retry-After, as an SDK does). Timed: from the first request until every span is a record in
the pipeline (``/api/status``), so decoding, spooling, reading back, parsing, template lookup,
sessions and scoring all count. Nothing here asserts a timing.
"""

from __future__ import annotations

import argparse
import gzip
import http.client
import json
import shutil
import sys
import tempfile
import threading
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))

import orjson  # noqa: E402

from tests.daemon_helpers import DaemonProcess, free_port  # noqa: E402
from tracewatch.demo.scenario import baseline_and_day, parcel_lockers  # noqa: E402
from tracewatch.demo.traces import render_otlp  # noqa: E402

CONFIG = """\
state_dir = "state"

[[sources]]
name = "traces"
format = "otlp-json"
{paths}

[sessions]
idle_timeout_s = 30

[model]
false_alarm_rate = 0.005

[server]
listen = "127.0.0.1:{port}"

[otlp]
enabled = {enabled}
listen = "127.0.0.1:{otlp_port}"
{traces}

[daemon]
checkpoint_interval_s = 5
"""


def _requests(sessions, per_request: int = 512) -> list[dict]:
    """OTLP/JSON export requests of about ``per_request`` spans each (64 traces a line)."""
    docs = [orjson.loads(line) for line in render_otlp(sessions, seed=7, traces_per_line=64)]
    return docs


def _protobuf(doc: dict) -> bytes:
    import base64

    from google.protobuf.json_format import ParseDict
    from opentelemetry.proto.collector.trace.v1.trace_service_pb2 import ExportTraceServiceRequest

    doc = json.loads(json.dumps(doc))
    for rs in doc["resourceSpans"]:
        for ss in rs["scopeSpans"]:
            for span in ss["spans"]:
                for key in ("traceId", "spanId", "parentSpanId"):
                    if span.get(key):
                        span[key] = base64.b64encode(bytes.fromhex(span[key])).decode()
    return ParseDict(doc, ExportTraceServiceRequest()).SerializeToString()


def _send(port: int, bodies: list[bytes], content_type: str, refused: list[int]) -> None:
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=60)
    for body in bodies:
        while True:
            conn.request("POST", "/v1/traces", body, {"Content-Type": content_type, "Content-Encoding": "gzip"})
            resp = conn.getresponse()
            resp.read()
            if resp.status == 200:
                break
            refused.append(resp.status)
            time.sleep(float(resp.getheader("Retry-After", "1")))
    conn.close()


def measure(n_spans: int, senders: int) -> dict:
    root = Path(tempfile.mkdtemp(prefix="tracewatch-bench-otlp-"))
    try:
        sc = parcel_lockers()
        n_sessions = max(200, n_spans // 11)
        base, day = baseline_and_day(sc, seed=41, n_baseline=3000, n_normal=n_sessions, per_kind=2)
        fit_dir = root / "fit"
        fit_dir.mkdir()
        (fit_dir / "base.jsonl").write_text("\n".join(render_otlp(base, seed=3)) + "\n")
        (fit_dir / "fit.toml").write_text(CONFIG.format(paths=f'paths = ["{fit_dir}/base.jsonl"]', port=1,
                                                        enabled="false", otlp_port=2, traces=""))
        from tracewatch.batch import assign_sources, fit_files
        from tracewatch.config import load_config

        fit_cfg = load_config(fit_dir / "fit.toml")
        fit_files(fit_cfg, assign_sources(fit_cfg, []))
        docs = _requests(day)
        spans = sum(len(ss["spans"]) for d in docs for rs in d["resourceSpans"] for ss in rs["scopeSpans"])
        out = {"spans": spans, "requests": len(docs), "senders": senders}
        for encoding, content_type, encode in (("protobuf", "application/x-protobuf", _protobuf),
                                               ("json", "application/json", orjson.dumps)):
            run = root / encoding
            shutil.copytree(fit_dir / "state" / "baselines", run / "state" / "baselines")
            otlp_port = free_port()
            (run / "tracewatch.toml").write_text(CONFIG.format(paths="", port=free_port(), enabled="true",
                                                               otlp_port=otlp_port, traces='traces_source = "traces"'))
            bodies = [gzip.compress(encode(d), 1) for d in docs]
            daemon = DaemonProcess(run / "tracewatch.toml", "--log-level", "warning").ready()
            refused: list[int] = []
            parts = [bodies[i::senders] for i in range(senders)]
            threads = [threading.Thread(target=_send, args=(otlp_port, p, content_type, refused)) for p in parts]
            t0 = time.perf_counter()
            for t in threads:
                t.start()
            for t in threads:
                t.join()
            t_sent = time.perf_counter()
            t_done = daemon.until(lambda: daemon.status()["sources"][0]["records"] >= spans, "every span", 3600, 0.05)
            daemon.terminate()
            out[encoding] = {"seconds": t_done - t0, "sent_s": t_sent - t0, "spans_per_s": spans / (t_done - t0),
                             "refused": len(refused), "bytes": sum(map(len, bodies))}
        return out
    finally:
        shutil.rmtree(root, ignore_errors=True)


def report(r: dict) -> str:
    lines = [f"OTLP/HTTP ingest: {r['spans']} spans in {r['requests']} gzip requests, {r['senders']} senders"]
    for enc in ("protobuf", "json"):
        m = r[enc]
        lines.append(f"  {enc:>8}: {m['spans_per_s']:.0f} spans/s (all records in {m['seconds']:.2f} s; the senders "
                     f"done in {m['sent_s']:.2f} s; {m['refused']} answers 429, retried)")
    return "\n".join(lines)


def run(ctx) -> None:
    """bench/run.py entry point."""
    r = measure(min(max(ctx.lines // 4, 50_000), 250_000), 4)
    for enc in ("protobuf", "json"):
        m = r[enc]
        ctx.row("otlp", f"OTLP/HTTP {enc} spans", r["spans"], m["seconds"], None,
                f"{r['requests']} gzip requests from 4 senders; {m['refused']} answers 429")
    print(report(r), file=sys.stderr)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--spans", type=int, default=100_000)
    ap.add_argument("--senders", type=int, default=4)
    a = ap.parse_args()
    r = measure(a.spans, a.senders)
    print(report(r))
    (HERE / "out").mkdir(exist_ok=True)
    (HERE / "out" / "otlp.json").write_text(json.dumps(r, indent=2))


if __name__ == "__main__":
    main()
