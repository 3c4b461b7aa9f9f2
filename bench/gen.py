"""Large generated inputs for the benchmarks, cached under ``bench/out/``.

The lines come from tracewatch's own parcel-locker scenario (``tracewatch.demo.scenario``), so
every line carries realistic variable fields: request ids, parcel and courier ids, UUIDs,
IPs, durations, weights, millisecond timestamps. A file is written once per (kind, size,
seed) and reused by later runs while the scenario's source is unchanged; ``--regen`` on the
runner rewrites it.
"""

from __future__ import annotations

import hashlib
import json
import math
import re
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

from tracewatch.demo import scenario as scenario_module
from tracewatch.demo.run import CONFIG
from tracewatch.demo.scenario import Scenario, generate, labels, parcel_lockers, render_text
from tracewatch.demo.traces import render_otlp

import orjson

OUT = Path(__file__).resolve().parent / "out"
PILOT_SESSIONS = 2000
SPAN_S = 86_400.0  # one day of traffic per file
ANOMALY_SHARE = 0.002  # share of the scored file's sessions injected with each anomaly kind
DEFAULT_SEED = 11


@dataclass(frozen=True)
class LogFile:
    path: Path
    lines: int
    sessions: int
    labels: Path | None = None  # JSON lines {"session_key", "label", ...} for scored files


def scenario_version() -> str:
    """A hash of the scenario's source: a cached file made by another version is rewritten."""
    return hashlib.blake2b(Path(scenario_module.__file__).read_bytes(), digest_size=6).hexdigest()


def _mean_session_length(scenario: Scenario, seed: int) -> float:
    pilot = generate(scenario, PILOT_SESSIONS, 0, seed=seed)
    return sum(len(s.steps) for s in pilot) / len(pilot)


def _sessions(scenario: Scenario, n_lines: int, *, seed: int, day: int, anomalies: bool) -> list:
    """The generated sessions of one day of about ``n_lines`` (never fewer) lines."""
    per_session = _mean_session_length(scenario, seed)
    n_sessions = math.ceil(n_lines * 1.02 / per_session)  # a small margin so the file is never short
    per_kind = max(1, round(n_sessions * ANOMALY_SHARE)) if anomalies else 0
    n_normal = n_sessions - 6 * per_kind if anomalies else n_sessions
    return generate(scenario, n_normal, per_kind, seed=seed, span_s=SPAN_S,
                    start=datetime(2026, 11, day, tzinfo=timezone.utc))


def _write_lines(path: Path, lines) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(".tmp")
    with open(tmp, "w", encoding="utf-8") as fh:
        for line in lines:
            fh.write(line)
            fh.write("\n")
    tmp.replace(path)


def _write(path: Path, scenario: Scenario, n_lines: int, *, seed: int, day: int, anomalies: bool) -> LogFile:
    """Generate about ``n_lines`` (never fewer) lines of one day and write them to ``path``."""
    sessions = _sessions(scenario, n_lines, seed=seed, day=day, anomalies=anomalies)
    lines = render_text(scenario, sessions)
    _write_lines(path, lines)
    label_path = None
    if anomalies:
        label_path = path.with_suffix(".labels.jsonl")
        label_path.write_text("".join(json.dumps(x) + "\n" for x in labels(sessions)))
    meta = {"lines": len(lines), "sessions": len(sessions), "scenario": scenario_version()}
    path.with_suffix(".meta.json").write_text(json.dumps(meta))
    return LogFile(path, len(lines), len(sessions), label_path)


def log_file(kind: str, n_lines: int, *, seed: int = DEFAULT_SEED, regen: bool = False) -> LogFile:
    """A ``baseline`` (normal only) or ``scored`` (normal plus labelled anomalies) text log of
    at least ``n_lines`` lines, generated on first use."""
    if kind not in ("baseline", "scored"):
        raise ValueError(f"unknown log kind {kind!r}")
    path = OUT / "logs" / f"{kind}-{n_lines}-s{seed}.log"
    meta_path = path.with_suffix(".meta.json")
    anomalies = kind == "scored"
    meta = json.loads(meta_path.read_text()) if meta_path.exists() else {}
    if path.exists() and meta.get("scenario") == scenario_version() and not regen:
        return LogFile(path, meta["lines"], meta["sessions"],
                       path.with_suffix(".labels.jsonl") if anomalies else None)
    return _write(path, parcel_lockers(), n_lines, **_day(kind, seed))


def _day(kind: str, seed: int) -> dict:
    # the baseline day and the scored day differ in seed and date, like two real days
    anomalies = kind == "scored"
    return {"seed": seed + (1 if anomalies else 0), "day": 30 if anomalies else 29, "anomalies": anomalies}


# -- the same records in the other input formats ------------------------------------------------
_SEVERITY = {"INFO": 6, "WARN": 4, "ERROR": 3}  # RFC 5424 section 6.2.1, table 2
SYSLOG_FACILITY = 16  # local0


def _fresh(out: Path, source: Path) -> bool:
    return out.exists() and out.stat().st_mtime >= source.stat().st_mtime


def _records(text: LogFile):
    """``(ts, level, service, key, message)`` of every line of a generated text log."""
    pattern = re.compile(parcel_lockers().line_pattern)
    with open(text.path, encoding="utf-8") as fh:
        for line in fh:
            m = pattern.match(line.rstrip("\n"))
            yield m["ts"], m["level"], m["svc"], m["key"], m["message"]


def as_jsonl(text: LogFile) -> Path:
    """The text log's records as JSON lines ``{"time", "level", "service", "req", "message"}``."""
    out = text.path.with_suffix(".jsonl")
    if not _fresh(out, text.path):
        _write_lines(out, (orjson.dumps({"time": ts, "level": lv, "service": svc, "req": key, "message": msg}).decode()
                           for ts, lv, svc, key, msg in _records(text)))
    return out


def as_syslog(text: LogFile) -> Path:
    """The text log's records as RFC 5424 lines, the request id as a structured-data parameter."""
    out = text.path.with_suffix(".syslog")
    if not _fresh(out, text.path):
        _write_lines(out, (f'<{SYSLOG_FACILITY * 8 + _SEVERITY[lv]}>1 {ts} locker-gw-3 {svc} 812 - '
                           f'[req@32473 id="{key}"] {msg}' for ts, lv, svc, key, msg in _records(text)))
    return out


def as_otlp(kind: str, n_lines: int, text: LogFile, seed: int = DEFAULT_SEED) -> tuple[Path, int]:
    """The same day's sessions as OTLP/JSON trace exports (``tracewatch.demo.traces``: one trace a
    session, a span a step plus the request's own), and the number of spans."""
    out = text.path.with_suffix(".otlp.jsonl")
    meta = out.with_suffix(".meta.json")
    if not (_fresh(out, text.path) and meta.exists()):
        sessions = _sessions(parcel_lockers(), n_lines, **_day(kind, seed))
        _write_lines(out, render_otlp(sessions, seed=seed))
        meta.write_text(json.dumps({"spans": sum(len(s.steps) + 1 for s in sessions)}))
    return out, json.loads(meta.read_text())["spans"]


def write_config(folder: Path) -> Path:
    """The demo's config (same sessions, features and model settings) with its state in ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    cfg = folder / "tracewatch.toml"
    cfg.write_text(CONFIG.format(pattern=parcel_lockers().line_pattern))
    return cfg


if __name__ == "__main__":
    import argparse

    ap = argparse.ArgumentParser(description="write a generated benchmark log under bench/out/logs")
    ap.add_argument("kind", choices=["baseline", "scored"])
    ap.add_argument("lines", type=int)
    ap.add_argument("--seed", type=int, default=DEFAULT_SEED)
    ap.add_argument("--regen", action="store_true")
    a = ap.parse_args()
    f = log_file(a.kind, a.lines, seed=a.seed, regen=a.regen)
    print(f"{f.path}: {f.lines} lines, {f.sessions} sessions")
