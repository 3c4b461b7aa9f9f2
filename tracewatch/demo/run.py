"""``tracewatch demo``: generate the parcel-locker scenario, fit, score, and tally.

Writes a baseline day and a day with labelled injected anomalies, a config and the labels
into a folder, then runs the same fit and score code as the commands and prints the alerts
and what was caught (per anomaly kind) or raised in vain (false alarms).
"""

from __future__ import annotations

import shutil
import sys
import time
from pathlib import Path

import orjson

from ..batch import assign_sources, fit_files, score_files
from ..config import load_config
from .scenario import ANOMALY_KINDS, Scenario, baseline_and_day, labels, parcel_lockers, render_text
from .traces import TRACE_SOURCE, write_trace_scenario

CONFIG = """\
# tracewatch demo config: the parcel-locker backend's API log (and, in the demo, its traces).
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
    base, day = baseline_and_day(scenario, seed=seed, n_baseline=n_baseline, n_normal=n_normal, per_kind=per_kind)
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
    lines.append(f"    nearest normal cluster #{v['cluster']}; its closest normal session is:")
    lines.append("      " + " → ".join(v.get("closest_normal", [])))
    if v.get("diff"):
        lines.append("    step by step, against that session:")
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
    tbase_path, tday_path, tlabel_path = write_trace_scenario(folder, scenario, seed=seed + 100,
                                                              n_normal=1000, per_kind=10)
    cfg_path = folder / "tracewatch.toml"
    cfg_path.write_text(CONFIG.format(pattern=scenario.line_pattern) + "\n" + TRACE_SOURCE)
    cfg = load_config(cfg_path)
    print(f"demo: parcel-locker backend, files in {folder}/")
    print(f"  API log:  baseline {base_path}, day to score {day_path}, labels {label_path}")
    print(f"  traces:   baseline {tbase_path}, day to score {tday_path}, labels {tlabel_path}")

    baseline, path, fit_pipe = fit_files(cfg, assign_sources(cfg, [str(base_path), str(tbase_path)]))
    r = baseline.report
    print(f"\nfit: {r['sessions']} sessions, {r['templates']} templates, {r['ngrams']} n-grams, k={r['k']}; "
          f"baseline {baseline.version} in {path}")
    for c in r["clusters"]:
        steps = c["representative"]
        more = f" … ({len(steps)} steps)" if len(steps) > 9 else ""
        print(f"  cluster #{c['cluster']} ({c['sessions']} sessions): {' → '.join(steps[:9])}{more}")

    verdicts: dict[tuple[str, str], dict] = {}
    score_files(cfg, assign_sources(cfg, [str(day_path), str(tday_path)]), baseline,
                lambda v: verdicts.__setitem__((v["source"], v["session_key"]), v), score_all=True)
    truth = {"locker-api": [orjson.loads(x) for x in label_path.read_bytes().splitlines()],
             "locker-traces": [orjson.loads(x) for x in tlabel_path.read_bytes().splitlines()]}
    label_of = {(src, t["session_key"]): t for src, rows in truth.items() for t in rows}
    alerts = sorted((v for v in verdicts.values() if v["alert"]), key=lambda v: -v["score"])
    print(f"\nscore: {len(verdicts)} sessions, {len(alerts)} alerts. A few, one per kind of problem:\n")
    shown: set[str] = set()
    for v in alerts:
        label = label_of.get((v["source"], v["session_key"]), {})
        kind = label.get("label", "?")
        if kind in shown or len(shown) >= show:
            continue
        shown.add(kind)
        print(describe(v))
        print(f"    (injected: {kind}: {label.get('detail') or 'nothing — a false alarm'})\n")

    for src, rows in truth.items():
        t = tally({k: v for (s, k), v in verdicts.items() if s == src}, rows)
        print(f"tally for {src:<15} sessions  flagged")
        for kind, row in t.items():
            if kind == "_all":
                continue
            what = "false alarms" if kind == "normal" else "caught"
            print(f"  {kind:<24} {row['sessions']:>7}  {row['flagged']:>7}  ({what} {row['share']:.1%})")
        print(f"  precision of alerts: {t['_all']['precision']:.1%}\n")
    print(f"configured false_alarm_rate {cfg.model.false_alarm_rate:.1%}; done in {time.perf_counter() - t0:.1f} s.")
    print(f"Try: {_command()} score --config {cfg_path} {day_path}")
    return 0


def _command() -> str:
    """How to call tracewatch from here: its bare name when on PATH, else the venv's script."""
    exe = Path(sys.executable).with_name("tracewatch")
    on_path = shutil.which("tracewatch")
    if on_path and Path(on_path).resolve() == exe.resolve():
        return "tracewatch"
    return str(exe) if exe.exists() else "tracewatch"
