"""Three processes of an invented parcel-locker backend, traced with the OpenTelemetry Python
SDK, each exporting its spans over OTLP/HTTP (protobuf, gzip) with the SDK's own exporter
(opentelemetry-exporter-otlp-proto-http) — and the same spans, for reference, to a file with the
SDK's OTLP/JSON file exporter. The services call each other over real HTTP on loopback with the
W3C trace context in the headers, so one request is one trace across three processes.

    python tests/otlp_app.py peer NAME --endpoint URL --out FILE      # prints "ready PORT"
    python tests/otlp_app.py api --endpoint URL --out FILE --peers URL,URL --requests N
                             [--faulty K] [--seed S] [--logs-out FILE]

After each request the api process asks each peer to flush its exporters, then flushes its
own, so every trace reaches tracewatch as three requests in a known order (compartment-svc,
notify-svc, locker-api), which the reference files record. Faulty requests (``--faulty``): the
compartment service fails and the api retries it three times before answering 503. With
``--logs-out`` the api process also logs through the SDK's OTLP/HTTP log exporter: a line inside
each request (with its trace id) and a line outside any trace with the attribute ``locker.id``
(reference copy through the SDK's OTLP/JSON file log exporter).
"""

from __future__ import annotations

import argparse
import json
import logging
import random
import sys
import threading
import urllib.request
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

from opentelemetry import propagate
from opentelemetry.exporter.otlp.json.file import FileSpanExporter
from opentelemetry.exporter.otlp.proto.http import Compression
from opentelemetry.exporter.otlp.proto.http.trace_exporter import OTLPSpanExporter
from opentelemetry.sdk.resources import Resource
from opentelemetry.sdk.trace import TracerProvider
from opentelemetry.sdk.trace.export import BatchSpanProcessor
from opentelemetry.trace import SpanKind, Status, StatusCode

NO_PROXY = urllib.request.build_opener(urllib.request.ProxyHandler({}))


def tracer_provider(service: str, endpoint: str, out: str) -> TracerProvider:
    provider = TracerProvider(resource=Resource.create({"service.name": service}))
    # exported only when flushed (no timer in between): each flush is one request and one line
    quiet = {"schedule_delay_millis": 600_000, "max_export_batch_size": 4096, "max_queue_size": 65536}
    if endpoint != "none":  # "none": the reference files only (a baseline to fit)
        provider.add_span_processor(BatchSpanProcessor(OTLPSpanExporter(endpoint=f"{endpoint}/v1/traces",
                                                                        compression=Compression.Gzip), **quiet))
    provider.add_span_processor(BatchSpanProcessor(FileSpanExporter(out), **quiet))
    return provider


def post(url: str, headers: dict | None = None) -> int:
    req = urllib.request.Request(url, data=b"", headers=headers or {}, method="POST")
    try:
        with NO_PROXY.open(req, timeout=30) as resp:
            return resp.status
    except urllib.error.HTTPError as exc:
        return exc.code


def peer(name: str, endpoint: str, out: str) -> None:
    provider = tracer_provider(name, endpoint, out)
    tracer = provider.get_tracer("parcel-lockers", "1.0")
    done = threading.Event()

    class Handler(BaseHTTPRequestHandler):
        def log_message(self, *args) -> None:
            pass

        def do_POST(self) -> None:  # noqa: N802
            status = 200
            if self.path == "/flush":
                provider.force_flush()
            elif self.path == "/quit":
                done.set()
            else:
                ctx = propagate.extract({k.lower(): v for k, v in self.headers.items()})
                with tracer.start_as_current_span(f"POST {self.path.split('?')[0]}", context=ctx,
                                                  kind=SpanKind.SERVER) as span:
                    with tracer.start_as_current_span("SELECT compartments" if name == "compartment-svc"
                                                      else "INSERT notifications", kind=SpanKind.CLIENT):
                        pass
                    if "fail" in self.path:
                        span.set_status(Status(StatusCode.ERROR, "no free compartment"))
                        status = 503
            self.send_response(status)
            self.send_header("Content-Length", "0")
            self.end_headers()

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    print(f"ready {server.server_address[1]}", flush=True)
    done.wait(600)
    server.shutdown()
    provider.shutdown()


def api(args) -> None:
    provider = tracer_provider("locker-api", args.endpoint, args.out)
    tracer = provider.get_tracer("parcel-lockers", "1.0")
    logger_provider = None
    if args.logs_out:
        from opentelemetry.exporter.otlp.json.file._log_exporter import FileLogExporter
        from opentelemetry.exporter.otlp.proto.http._log_exporter import OTLPLogExporter
        from opentelemetry.sdk._logs import LoggerProvider, LoggingHandler
        from opentelemetry.sdk._logs.export import BatchLogRecordProcessor

        logger_provider = LoggerProvider(resource=Resource.create({"service.name": "locker-api"}))
        if args.endpoint != "none":
            logger_provider.add_log_record_processor(BatchLogRecordProcessor(OTLPLogExporter(
                endpoint=f"{args.endpoint}/v1/logs", compression=Compression.Gzip)))
        logger_provider.add_log_record_processor(BatchLogRecordProcessor(FileLogExporter(args.logs_out)))
        logging.getLogger("lockers").addHandler(LoggingHandler(logger_provider=logger_provider))
        logging.getLogger("lockers").setLevel(logging.INFO)
    log = logging.getLogger("lockers")
    compartment, notify = args.peers.split(",")
    rng = random.Random(args.seed)
    faulty = set(rng.sample(range(args.requests), args.faulty)) if args.faulty else set()
    for i in range(args.requests):
        with tracer.start_as_current_span("POST /deposits", kind=SpanKind.SERVER) as root:
            fail = i in faulty
            for attempt in range(4 if fail else 1):
                with tracer.start_as_current_span("reserve compartment", kind=SpanKind.CLIENT) as span:
                    headers: dict = {}
                    propagate.inject(headers)
                    if post(f"{compartment}/reserve{'?fail' if fail else ''}", headers) != 200:
                        span.set_status(Status(StatusCode.ERROR, "503 from compartment-svc"))
            if fail:
                root.set_status(Status(StatusCode.ERROR, "503"))
            else:
                with tracer.start_as_current_span("notify recipient", kind=SpanKind.CLIENT):
                    headers = {}
                    propagate.inject(headers)
                    post(f"{notify}/notify", headers)
            log.info("deposit %d stored in compartment %d", i, rng.randrange(1, 40))
        log.warning("door %d slow to close", rng.randrange(1, 40), extra={"locker.id": f"LK-{i % 5}"})
        post(f"{compartment}/flush")
        post(f"{notify}/flush")
        provider.force_flush()
    if logger_provider is not None:
        logger_provider.shutdown()
    provider.shutdown()
    for url in (compartment, notify):
        post(f"{url}/quit")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("role", choices=["peer", "api"])
    ap.add_argument("name", nargs="?")
    ap.add_argument("--endpoint", required=True)
    ap.add_argument("--out", required=True)
    ap.add_argument("--peers")
    ap.add_argument("--requests", type=int, default=10)
    ap.add_argument("--faulty", type=int, default=0)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--logs-out")
    args = ap.parse_args()
    if args.role == "peer":
        peer(args.name, args.endpoint, args.out)
    else:
        api(args)
    json.dump({"done": True}, sys.stdout)


if __name__ == "__main__":
    main()
