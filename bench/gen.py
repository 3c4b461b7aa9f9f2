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
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

from tracewatch.demo import scenario as scenario_module
from tracewatch.demo.run import CONFIG
from tracewatch.demo.scenario import Scenario, generate, labels, parcel_lockers, render_text

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


def _write(path: Path, scenario: Scenario, n_lines: int, *, seed: int, day: int, anomalies: bool) -> LogFile:
    """Generate about ``n_lines`` (never fewer) lines of one day and write them to ``path``."""
    per_session = _mean_session_length(scenario, seed)
    n_sessions = math.ceil(n_lines * 1.02 / per_session)  # a small margin so the file is never short
    per_kind = max(1, round(n_sessions * ANOMALY_SHARE)) if anomalies else 0
    n_normal = n_sessions - 6 * per_kind if anomalies else n_sessions
    sessions = generate(scenario, n_normal, per_kind, seed=seed, span_s=SPAN_S,
                        start=datetime(2026, 11, day, tzinfo=timezone.utc))
    lines = render_text(scenario, sessions)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(".tmp")
    with open(tmp, "w", encoding="utf-8") as fh:
        for line in lines:
            fh.write(line)
            fh.write("\n")
    tmp.replace(path)
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
    # the baseline day and the scored day differ in seed and date, like two real days
    return _write(path, parcel_lockers(), n_lines, seed=seed + (1 if anomalies else 0),
                  day=30 if anomalies else 29, anomalies=anomalies)


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
