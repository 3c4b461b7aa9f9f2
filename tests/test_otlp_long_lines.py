"""otlp-json: an exporter file with one very long line per export batch is read whole, up to
max_document_bytes, not cut at max_line_bytes."""

from __future__ import annotations

import json

from opentelemetry.exporter.otlp.json.file import FileSpanExporter
from opentelemetry.sdk.resources import Resource
from opentelemetry.sdk.trace import TracerProvider
from opentelemetry.sdk.trace.export import BatchSpanProcessor

from tracewatch.config import parse_config
from tracewatch.batch import run_files, unread_lines
from tracewatch.pipeline import Pipeline


def _export(path, traces: int) -> None:
    """``traces`` locker requests of four spans each, written by the SDK's OTLP/JSON file
    exporter as one export batch: one line."""
    with path.open("w") as stream:
        provider = TracerProvider(resource=Resource.create({"service.name": "locker-api"}))
        provider.add_span_processor(BatchSpanProcessor(FileSpanExporter(stream=stream), max_queue_size=8192,
                                                       max_export_batch_size=8192, schedule_delay_millis=600_000))
        tracer = provider.get_tracer("lockers")
        for n in range(traces):
            with tracer.start_as_current_span("POST /pickup", attributes={"parcel": f"PX{n}"}):
                for step in ("check code", "open door", "close door"):
                    with tracer.start_as_current_span(step):
                        pass
        provider.force_flush()
        provider.shutdown()


def test_one_export_batch_per_line_over_max_line_bytes(tmp_path):
    path = tmp_path / "spans.jsonl"
    _export(path, 500)
    sizes = [len(line) for line in path.read_bytes().splitlines()]
    assert len(sizes) == 1 and sizes[0] > 300_000  # one line, far above the 64 KiB max_line_bytes
    spans = sum(len(s["spans"]) for r in json.loads(path.read_text())["resourceSpans"] for s in r["scopeSpans"])
    assert spans == 2000
    cfg = parse_config({"state_dir": str(tmp_path / "state"), "sources": [{"name": "traces", "format": "otlp-json"}]})
    pipeline = Pipeline(cfg)
    run_files(pipeline, [("traces", path)])
    assert not pipeline.rejected and not pipeline.repaired
    assert pipeline.records["traces"] == 2000
    assert len(pipeline.collected) == 500 and all(len(seq) == 4 for _, _, seq in pipeline.collected)


def test_a_line_over_max_document_bytes_is_still_cut_and_reported(tmp_path):
    path = tmp_path / "spans.jsonl"
    _export(path, 500)
    cfg = parse_config({"state_dir": str(tmp_path / "state"),
                        "sources": [{"name": "traces", "format": "otlp-json", "max_document_bytes": 100_000}]})
    pipeline = Pipeline(cfg)
    run_files(pipeline, [("traces", path)])
    assert pipeline.repaired == {("traces", "line_too_long"): 1}
    assert pipeline.rejected == {("traces", "document_too_large"): 1}
    assert unread_lines(pipeline, refuse=True) == [
        "fit refused: source 'traces': 1 of 1 lines rejected (document_too_large=1), above max_unread_share 0.5; "
        "no baseline written (check format and line_pattern)"]
