"""A small instrumented program for the tests: an invented parcel-locker backend of three
services whose request flows are traced with the OpenTelemetry Python SDK and written as
OTLP/JSON lines by the SDK's own file exporter (``opentelemetry-exporter-otlp-json-file``).

Each service has its own tracer provider (its own ``service.name``); calls between them carry
the W3C trace context in headers, as over HTTP, so one request is one trace across services.
After each request every provider is flushed, so each line holds one service's spans of it;
with ``--straddle N`` each service writes its own file in exports of N spans that cut requests
anywhere, so traces straddle exports and files.

    python tests/otel_app.py OUT.jsonl LABELS.jsonl --normal 150 [--faulty 5] [--seed 1] [--straddle 7]

Faulty flows (``--faulty`` of each kind, labelled in LABELS.jsonl with the trace id):
    reserve_error    the compartment service fails; the API retries, then answers 503
    notify_skipped   a deposit whose recipient is never notified (a step skipped)
    door_loop        the API opens the same door again and again
    unexpected_call  a pickup that calls a payment service the backend never used before
"""

from __future__ import annotations

import argparse
import json
import random
from contextlib import contextmanager

from opentelemetry import propagate
from opentelemetry.exporter.otlp.json.file import FileSpanExporter
from opentelemetry.sdk.resources import Resource
from opentelemetry.sdk.trace import TracerProvider
from opentelemetry.sdk.trace.export import BatchSpanProcessor
from opentelemetry.trace import SpanKind, Status, StatusCode

FAULTS = ("reserve_error", "notify_skipped", "door_loop", "unexpected_call")
SERVICES = ("locker-api", "compartment-svc", "notify-svc", "payment-svc")


class NoCompartment(RuntimeError):
    pass


class Backend:
    def __init__(self, streams: dict, seed: int, batch: int | None = None) -> None:
        self.rng = random.Random(seed)
        self.providers = {}
        self.tracers = {}
        for name in SERVICES:
            provider = TracerProvider(resource=Resource.create({"service.name": name}))
            # batch: exports of at most that many spans, whenever that many are queued, so
            # a request's spans straddle exports (its children, ending first, go out first)
            processor = (BatchSpanProcessor(FileSpanExporter(stream=streams[name])) if batch is None else
                         BatchSpanProcessor(FileSpanExporter(stream=streams[name]), max_export_batch_size=batch,
                                            schedule_delay_millis=60_000))
            provider.add_span_processor(processor)
            self.providers[name] = provider
            self.tracers[name] = provider.get_tracer("parcel-lockers", "1.0")

    def flush(self) -> None:
        for provider in self.providers.values():
            provider.force_flush()

    def shutdown(self) -> None:
        for provider in self.providers.values():
            provider.shutdown()

    # -- calls between services, with trace context in headers ------------------------------
    @contextmanager
    def server(self, service: str, route: str, headers: dict | None):
        ctx = propagate.extract(headers) if headers else None
        with self.tracers[service].start_as_current_span(route, context=ctx, kind=SpanKind.SERVER) as span:
            span.set_attribute("http.route", route)
            yield span

    def call(self, caller: str, service: str, route: str, handler, *args):
        with self.tracers[caller].start_as_current_span(route, kind=SpanKind.CLIENT) as span:
            span.set_attribute("peer.service", service)
            headers: dict = {}
            propagate.inject(headers)
            try:
                return handler(headers, *args)
            except NoCompartment as exc:
                span.set_status(Status(StatusCode.ERROR, "503 from " + service))
                raise exc

    def db(self, service: str, statement: str) -> None:
        with self.tracers[service].start_as_current_span(statement, kind=SpanKind.CLIENT) as span:
            span.set_attribute("db.system", "postgresql")

    # -- the services ------------------------------------------------------------------------
    def reserve(self, headers: dict, size: str, fail: bool) -> int:
        with self.server("compartment-svc", "POST /compartments/reserve", headers) as span:
            with self.tracers["compartment-svc"].start_as_current_span("pick compartment"):
                box = self.rng.randint(1, 64)
            if fail:
                exc = NoCompartment(f"no free compartment of size {size}")
                span.record_exception(exc)
                span.set_status(Status(StatusCode.ERROR, str(exc)))
                raise exc
            self.db("compartment-svc", "UPDATE compartments")
            return box

    def open_door(self, headers: dict, box: int) -> None:
        with self.server("compartment-svc", "POST /doors/open", headers):
            self.db("compartment-svc", "INSERT door_events")

    def release(self, headers: dict, box: int) -> None:
        with self.server("compartment-svc", "POST /compartments/release", headers):
            self.db("compartment-svc", "UPDATE compartments")

    def notify(self, headers: dict, channel: str) -> None:
        with self.server("notify-svc", "POST /notifications", headers):
            with self.tracers["notify-svc"].start_as_current_span(f"{channel} send", kind=SpanKind.PRODUCER):
                pass

    def charge(self, headers: dict) -> None:
        with self.server("payment-svc", "POST /payments/charge", headers):
            pass

    # -- the API's request flows -------------------------------------------------------------
    def deposit(self, fault: str | None) -> str:
        api = "locker-api"
        with self.server(api, "POST /deposits", None) as root:
            with self.tracers[api].start_as_current_span("authenticate courier"):
                channel = self.rng.choice(["sms", "email"])  # the recipients' preference
            for i in range(self.rng.choice([1, 1, 2, 3])):
                fail = fault == "reserve_error" and i == 0
                try:
                    for attempt in range(3 if fail else 1):
                        try:
                            box = self.call(api, "compartment-svc", "POST /compartments/reserve", self.reserve,
                                            self.rng.choice("SML"), fail)
                            break
                        except NoCompartment:
                            if attempt == 2:
                                raise
                except NoCompartment as exc:
                    root.set_status(Status(StatusCode.ERROR, "503 Service Unavailable"))
                    root.record_exception(exc)
                    break
                for _ in range(12 if fault == "door_loop" else 1):
                    self.call(api, "compartment-svc", "POST /doors/open", self.open_door, box)
                self.db(api, "INSERT deposits")
                if fault != "notify_skipped":
                    self.call(api, "notify-svc", "POST /notifications", self.notify, channel)
            return format(root.get_span_context().trace_id, "032x")

    def pickup(self, fault: str | None) -> str:
        api = "locker-api"
        with self.server(api, "POST /pickups", None) as root:
            with self.tracers[api].start_as_current_span("check pickup code"):
                pass
            if fault == "unexpected_call":
                self.call(api, "payment-svc", "POST /payments/charge", self.charge)
            self.call(api, "compartment-svc", "POST /doors/open", self.open_door, 7)
            self.db(api, "UPDATE parcels")
            self.call(api, "compartment-svc", "POST /compartments/release", self.release, 7)
            return format(root.get_span_context().trace_id, "032x")

    def health(self, fault: str | None) -> str:
        with self.server("locker-api", "GET /health", None) as root:
            with self.tracers["locker-api"].start_as_current_span("read sensors"):
                pass
            return format(root.get_span_context().trace_id, "032x")


FLOW_OF_FAULT = {"reserve_error": "deposit", "notify_skipped": "deposit", "door_loop": "deposit",
                 "unexpected_call": "pickup"}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out")
    ap.add_argument("labels")
    ap.add_argument("--normal", type=int, default=100)
    ap.add_argument("--faulty", type=int, default=0, help="requests of each faulty kind")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--straddle", type=int, metavar="N",
                    help="each service writes its own file (OUT with .SERVICE before the suffix) in "
                         "exports of N spans cut anywhere in a request, flushed only at the end")
    args = ap.parse_args(argv)
    rng = random.Random(args.seed)
    plan = [(rng.choices(["deposit", "pickup", "health"], [5, 4, 1])[0], None) for _ in range(args.normal)]
    plan += [(FLOW_OF_FAULT[f], f) for f in FAULTS for _ in range(args.faulty)]
    rng.shuffle(plan)
    labels = []
    root, dot, suffix = args.out.rpartition(".")
    names = {name: f"{root}.{name}.{suffix}" if args.straddle else args.out for name in SERVICES}
    streams = {path: open(path, "w", encoding="utf-8") for path in set(names.values())}
    backend = Backend({name: streams[path] for name, path in names.items()}, args.seed, args.straddle)
    for flow, fault in plan:
        trace_id = getattr(backend, flow)(fault)
        if not args.straddle:
            backend.flush()  # one export per service per request, as a busy exporter would batch
        labels.append({"trace_id": trace_id, "flow": flow, "label": fault or "normal"})
    backend.shutdown()
    for stream in streams.values():
        stream.close()
    with open(args.labels, "w", encoding="utf-8") as fh:
        fh.writelines(json.dumps(x) + "\n" for x in labels)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
