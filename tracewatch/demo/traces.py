"""The parcel-locker demo as OpenTelemetry traces: the same generated sessions (with the same
labelled anomalies) rendered as OTLP/JSON trace exports of the backend's API calls.

Stage: demo input for **formats** (``otlp-json``). Every session becomes one trace: a SERVER
span on ``locker-api`` for the request (``POST /deposits``, ``POST /pickups``, ...) and one
child span per step, on the service that does the work (``compartment-svc``, ``notify-svc``,
``payment-svc`` or the API itself). Steps logged at ERROR become spans with an error status.
Traces are written in time order, a few per line, one ``ExportTraceServiceRequest`` per line
with one ``resourceSpans`` entry per service, as an SDK's batching file exporter writes them.
Every name, id and number here is invented.
"""

from __future__ import annotations

import hashlib
import random
from pathlib import Path

import orjson

from .scenario import GeneratedSession, Scenario, Step, baseline_and_day, labels, parcel_lockers

INTERNAL, SERVER, CLIENT, PRODUCER, CONSUMER = 1, 2, 3, 4, 5  # OTLP Span.SpanKind values
STATUS_ERROR = 2  # OTLP Status.StatusCode
API = "locker-api"

TRACE_SOURCE = """\
[[sources]]
name = "locker-traces"
paths = ["traces/*.jsonl"]
format = "otlp-json"
"""

ROUTES = {"deposit": "POST /deposits", "pickup": "POST /pickups", "return": "POST /returns",
          "health": "GET /lockers/health"}

# step name -> (service, span kind, span name)
SPANS: dict[str, tuple[str, int, str]] = {
    "courier authenticated": (API, INTERNAL, "authenticate courier"),
    "route synced": (API, CLIENT, "GET /routes/manifest"),
    "compartment requested": ("compartment-svc", SERVER, "POST /compartments/reserve"),
    "size fallback": ("compartment-svc", INTERNAL, "try a larger size"),
    "compartment reserved": ("compartment-svc", CLIENT, "UPDATE compartments"),
    "door opened": ("compartment-svc", SERVER, "POST /doors/open"),
    "door closed": ("compartment-svc", CONSUMER, "door closed event"),
    "deposit recorded": (API, CLIENT, "INSERT deposits"),
    "photo stored": (API, CLIENT, "PUT /photos"),
    "notification queued": ("notify-svc", SERVER, "POST /notifications"),
    "quiet hours": ("notify-svc", INTERNAL, "defer for quiet hours"),
    "delivery retry": ("notify-svc", INTERNAL, "retry delivery"),
    "notification delivered": ("notify-svc", PRODUCER, "deliver notification"),
    "courier signed off": (API, INTERNAL, "sign off courier"),
    "code checked": (API, INTERNAL, "check pickup code"),
    "code rejected": (API, INTERNAL, "reject pickup code"),
    "fee due": ("payment-svc", SERVER, "POST /fees/quote"),
    "fee paid": ("payment-svc", SERVER, "POST /fees/charge"),
    "parcel collected": (API, CLIENT, "UPDATE parcels SET collected"),
    "compartment released": ("compartment-svc", SERVER, "POST /compartments/release"),
    "pickup rated": (API, CLIENT, "INSERT ratings"),
    "expired listed": (API, CLIENT, "SELECT expired parcels"),
    "damage noted": (API, INTERNAL, "note damage"),
    "parcel returned": (API, CLIENT, "UPDATE parcels SET returned"),
    "manifest signed": (API, INTERNAL, "sign return manifest"),
    "health probe": (API, INTERNAL, "accept probe"),
    "environment read": (API, CLIENT, "GET /sensors/environment"),
    "battery read": (API, CLIENT, "GET /sensors/battery"),
    "battery low": (API, INTERNAL, "open maintenance ticket"),
    "firmware checked": (API, CLIENT, "GET /firmware/current"),
    "update scheduled": (API, INTERNAL, "schedule firmware update"),
    "health report": (API, INTERNAL, "send health report"),
    # the scenario's novel errors
    "latch jammed": ("compartment-svc", INTERNAL, "read latch sensor"),
    "fee gateway timeout": ("payment-svc", CLIENT, "POST /gateway/charge"),
    "token invalid": (API, INTERNAL, "verify courier token"),
    "ledger deadlock": (API, CLIENT, "INSERT deposits"),
}


def trace_id(session: GeneratedSession) -> str:
    """The trace id of a generated session (32 hex digits, derived from its key)."""
    return hashlib.blake2b(session.key.encode(), digest_size=16).hexdigest()


def _attr(key: str, value: str) -> dict:
    return {"key": key, "value": {"stringValue": value}}


def _span(tid: str, sid: str, parent: str | None, name: str, kind: int, start: float, end: float,
          error: bool, detail: str | None) -> dict:
    span = {"traceId": tid, "spanId": sid, "name": name, "kind": kind,
            "startTimeUnixNano": str(int(start * 1e9)), "endTimeUnixNano": str(int(end * 1e9)),
            "status": {"code": STATUS_ERROR, "message": detail} if error else {}}
    if parent:
        span["parentSpanId"] = parent
    if detail and not error:
        span["attributes"] = [_attr("app.detail", detail)]
    return span


def trace_spans(session: GeneratedSession, rng: random.Random) -> list[tuple[str, dict]]:
    """``(service, span)`` pairs of one session's trace."""
    tid = trace_id(session)
    root_id = f"{rng.getrandbits(64):016x}"
    times = session.times or [session.start] * len(session.steps)
    end = (times[-1] if times else session.start) + 0.05
    route = ROUTES.get(session.workflow, f"POST /{session.workflow}")
    out = [(API, _span(tid, root_id, None, route, SERVER, session.start - 0.01, end,
                       any(s.level == "ERROR" for s in session.steps), None))]
    for step, t in zip(session.steps, times):
        service, kind, name = _span_of(step)
        out.append((service, _span(tid, f"{rng.getrandbits(64):016x}", root_id, name, kind, t,
                                   t + rng.uniform(0.001, 0.015), step.level == "ERROR", step.message)))
    return out


def _span_of(step: Step) -> tuple[str, int, str]:
    return SPANS.get(step.name, (API, INTERNAL, step.name))


def render_otlp(sessions: list[GeneratedSession], *, seed: int = 0, traces_per_line: int = 8) -> list[str]:
    """OTLP/JSON lines for all sessions, in time order, ``traces_per_line`` traces a line."""
    rng = random.Random(seed)
    ordered = sorted(sessions, key=lambda s: s.start)
    lines = []
    for i in range(0, len(ordered), traces_per_line):
        by_service: dict[str, list[dict]] = {}
        for sess in ordered[i:i + traces_per_line]:
            for service, span in trace_spans(sess, rng):
                by_service.setdefault(service, []).append(span)
        doc = {"resourceSpans": [
            {"resource": {"attributes": [_attr("service.name", service), _attr("deployment.environment", "demo")]},
             "scopeSpans": [{"scope": {"name": "parcel-lockers", "version": "1.0"}, "spans": spans}]}
            for service, spans in by_service.items()]}
        lines.append(orjson.dumps(doc).decode())
    return lines


def write_trace_scenario(folder: Path, scenario: Scenario | None = None, *, seed: int, n_baseline: int = 3000,
                         n_normal: int = 2000, per_kind: int = 25) -> tuple[Path, Path, Path]:
    """A baseline day and a day to score as OTLP/JSON, and the labels; returns their paths
    (``traces/baseline.jsonl``, ``today/traces.jsonl``, ``trace-labels.jsonl``)."""
    scenario = scenario or parcel_lockers()
    base, day = baseline_and_day(scenario, seed=seed, n_baseline=n_baseline, n_normal=n_normal, per_kind=per_kind)
    base_path, day_path = folder / "traces" / "baseline.jsonl", folder / "today" / "traces.jsonl"
    for path, sessions, s in ((base_path, base, seed), (day_path, day, seed + 1)):
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text("\n".join(render_otlp(sessions, seed=s)) + "\n")
    label_path = folder / "trace-labels.jsonl"
    label_path.write_bytes(b"".join(orjson.dumps(x) + b"\n" for x in labels(day, key=trace_id)))
    return base_path, day_path, label_path
