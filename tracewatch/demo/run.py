"""``tracewatch demo``: generate the parcel-locker scenario, fit, score, and tally.

Writes a baseline day and a day with labelled injected anomalies, a config and the labels
into a folder, then runs the same fit and score code as the commands and prints the alerts
and what was caught (per anomaly kind) or raised in vain (false alarms).
"""

from __future__ import annotations

import time
from collections import Counter
from datetime import datetime, timezone
from pathlib import Path

import orjson

from ..batch import assign_sources, fit_files, score_files
from ..config import load_config
from .scenario import ANOMALY_KINDS, Scenario, generate, labels, parcel_lockers, render_text

CONFIG = """\
# tracewatch demo config: the parcel-locker backend's API log.
state_dir = "state"

[[sources]]
name = "locker-api"
paths = ["logs/*.log"]
format = "text"
line_pattern = '{pattern}'

[sessions]
idle_timeout_s = 30

[features]
ngram_max = 3

[model]
k = "auto"
false_alarm_rate = 0.005
"""


def write_scenario(folder: Path, scenario: Scenario, *, seed: int, n_baseline: int = 3000,
                   n_normal: int = 2000, per_kind: int = 25) -> tuple[Path, Path, Path]:
    """Baseline log, day-to-score log and labels; returns their paths."""
    logs = folder / "logs"
    logs.mkdir(parents=True, exist_ok=True)
    base = generate(scenario, n_baseline, 0, seed=seed, start=datetime(2026, 11, 29, tzinfo=timezone.utc))
    day = generate(scenario, n_normal, per_kind, seed=seed + 1, start=datetime(2026, 11, 30, tzinfo=timezone.utc))
    base_path, day_path = logs / "baseline.log", folder / "today" / "today.log"
    day_path.parent.mkdir(exist_ok=True)
    base_path.write_text("\n".join(render_text(scenario, base)) + "\n")
    day_path.write_text("\n".join(render_text(scenario, day)) + "\n")
    label_path = folder / "labels.jsonl"
    label_path.write_bytes(b"".join(orjson.dumps(x) + b"\n" for x in labels(day)))
    return base_path, day_path, label_path


def tally(verdicts: dict[str, dict], truth: list[dict]) -> dict[str, dict]:
    """Per label: sessions, flagged; for anomalies recall, for normal the false-alarm rate."""
    out: dict[str, dict] = {}
    for kind in ("normal", *ANOMALY_KINDS):
        keys = [t["session_key"] for t in truth if t["label"] == kind]
        if not keys:
            continue
        flagged = sum(1 for k in keys if verdicts.get(k, {}).get("alert"))
        out[kind] = {"sessions": len(keys), "flagged": flagged, "share": flagged / len(keys)}
    alerts = sum(1 for v in verdicts.values() if v["alert"])
    true_alerts = sum(v["flagged"] for k, v in out.items() if k != "normal")
    out["_all"] = {"alerts": alerts, "precision": true_alerts / alerts if alerts else 1.0}
    return out


def describe(v: dict) -> str:
    lines = [f"ALERT {v['alert_id']}  {v['source']} session {v['session_key']}  score {v['score']:.2f}  "
             f"p={v['p_value']:.4f}  reasons: {', '.join(v['reasons'])}"]
    for u in v["unseen_events"]:
        lines.append(f"    never seen before: {u['template']}")
    lines.append(f"    compared with normal cluster #{v['cluster']}, whose representative session is:")
    lines.append("      " + " → ".join(v.get("representative", [])))
    if v.get("diff"):
        lines.append("    step by step:")
        lines.extend(f"      {d}" for d in v["diff"][:8])
    if v.get("missing"):
        lines.append("    expected but missing: " + "; ".join(m["ngram"] for m in v["missing"][:3]))
    if v.get("unexpected"):
        lines.append("    unexpected: " + "; ".join(u["ngram"] for u in v["unexpected"][:3]))
    return "\n".join(lines)


def run_demo(folder: Path, *, seed: int = 7, show: int = 6) -> int:
    t0 = time.perf_counter()
    folder.mkdir(parents=True, exist_ok=True)
    scenario = parcel_lockers()
    base_path, day_path, label_path = write_scenario(folder, scenario, seed=seed)
    cfg_path = folder / "tracewatch.toml"
    cfg_path.write_text(CONFIG.format(pattern=scenario.line_pattern))
    cfg = load_config(cfg_path)
    print(f"demo: parcel-locker backend, files in {folder}/")
    print(f"  baseline day: {base_path}   day to score: {day_path}   labels: {label_path}")

    baseline, path, fit_pipe = fit_files(cfg, assign_sources(cfg, [str(base_path)]))
    r = baseline.report
    print(f"\nfit: {r['sessions']} sessions, {r['templates']} templates, {r['ngrams']} n-grams, k={r['k']}, "
          f"threshold {r['threshold']:.3f}; baseline {baseline.version} in {path}")
    for c in r["clusters"]:
        print(f"  cluster #{c['cluster']} ({c['sessions']} sessions): {' → '.join(c['representative'])}")

    verdicts: dict[str, dict] = {}
    score_files(cfg, assign_sources(cfg, [str(day_path)]), baseline,
                lambda v: verdicts.__setitem__(v["session_key"], v), score_all=True)
    truth = [orjson.loads(line) for line in label_path.read_bytes().splitlines()]
    label_of = {t["session_key"]: t for t in truth}
    alerts = [v for v in verdicts.values() if v["alert"]]
    alerts.sort(key=lambda v: -v["score"])
    print(f"\nscore: {len(verdicts)} sessions, {len(alerts)} alerts. A few, one per kind of problem:\n")
    shown: set[str] = set()
    for v in alerts:
        kind = label_of.get(v["session_key"], {}).get("label", "?")
        if kind in shown or len(shown) >= show:
            continue
        shown.add(kind)
        print(describe(v))
        print(f"    (injected: {kind}: {label_of[v['session_key']]['detail'] or 'nothing — a false alarm'})\n")

    t = tally(verdicts, truth)
    print("tally                 sessions  flagged")
    for kind, row in t.items():
        if kind == "_all":
            continue
        what = "false alarms" if kind == "normal" else "caught"
        print(f"  {kind:<18} {row['sessions']:>9}  {row['flagged']:>7}  ({what} {row['share']:.1%})")
    print(f"  precision of alerts: {t['_all']['precision']:.1%}; configured false_alarm_rate "
          f"{cfg.model.false_alarm_rate:.1%}")
    print(f"\ndone in {time.perf_counter() - t0:.1f} s. Try: tracewatch score --config {cfg_path} {day_path}")
    return 0
