"""Benchmark: batch ``score`` throughput on JSON lines — the same records as the text benchmark.

The ``score`` benchmark's generated text logs (``gen.py``: the parcel-locker scenario, realistic
variable fields) are rewritten once as JSON lines, one object per line with the same fields
(``time``, ``level``, ``service``, ``req``, ``message``), and cached next to them. tracewatch
is fitted on the baseline file and then runs ``tracewatch score`` on the scored file with a
``jsonl`` source (``session_key = "req"``); the wall time of the whole process counts, as for
text, with its fixed start-up cost shown in the note. Recall and false alarms against the
labels show that the same sessions are found. Nothing here asserts a timing.
"""

from __future__ import annotations

import re
import shutil
import sys
from pathlib import Path

import orjson

from gen import log_file
from score_vs_script import _keys, _quality, detection

from tracewatch.demo.run import CONFIG as DEMO_CONFIG
from tracewatch.demo.scenario import parcel_lockers

TARGET_RECORDS_S = 300_000  # issue 6

# the demo's sessions, features and model settings (as the text benchmark), with a jsonl source
CONFIG = """\
state_dir = "state"

[[sources]]
name = "locker-api"
format = "jsonl"
session_key = "req"
time_field = "time"
level_field = "level"
message_field = "message"

""" + DEMO_CONFIG[DEMO_CONFIG.index("[sessions]"):]


def as_jsonl(text_path: Path) -> Path:
    """The text log's records as JSON lines (written once, next to it)."""
    out = text_path.with_suffix(".jsonl")
    if out.exists() and out.stat().st_mtime >= text_path.stat().st_mtime:
        return out
    pattern = re.compile(parcel_lockers().line_pattern)
    tmp = out.with_suffix(".jsonl.tmp")
    with open(text_path, encoding="utf-8") as src, open(tmp, "wb") as dst:
        for line in src:
            m = pattern.match(line.rstrip("\n"))
            dst.write(orjson.dumps({"time": m["ts"], "level": m["level"], "service": m["svc"], "req": m["key"],
                                    "message": m["message"]}))
            dst.write(b"\n")
    tmp.replace(out)
    return out


def run(ctx) -> None:
    work = ctx.out / f"jsonl-{ctx.lines}"
    shutil.rmtree(work, ignore_errors=True)
    work.mkdir(parents=True)
    base = log_file("baseline", ctx.baseline_lines, regen=ctx.regen)
    scored = log_file("scored", ctx.lines, regen=ctx.regen)
    base_json, scored_json = as_jsonl(base.path), as_jsonl(scored.path)
    cfg = work / "tracewatch.toml"
    cfg.write_text(CONFIG)
    tw = [sys.executable, "-m", "tracewatch"]

    fit = ctx.process([*tw, "fit", "--config", str(cfg), str(base_json)], stdout=work / "fit.txt")
    ctx.row("fit (not in the ratios)", "tracewatch fit (jsonl)", base.lines, fit.seconds, fit.rss_mb,
            f"{base.sessions} baseline sessions; whole process")

    tiny = work / "tiny.jsonl"
    with open(scored_json, encoding="utf-8") as fh:
        tiny.write_text(fh.readline())
    startup_s = min(ctx.process([*tw, "score", "--config", str(cfg), str(tiny)], stdout=work / "tiny.out").seconds
                    for _ in range(ctx.repeat))

    alerts = work / "alerts.jsonl"
    runs = [ctx.process([*tw, "score", "--config", str(cfg), str(scored_json)], stdout=alerts)
            for _ in range(ctx.repeat)]
    seconds = min(r.seconds for r in runs)
    quality = detection(_keys(alerts, True), scored.labels)
    rate = scored.lines / seconds
    rate_warm = scored.lines / max(seconds - startup_s, 1e-9)
    ctx.row("jsonl score", "tracewatch score (jsonl)", scored.lines, seconds, max(r.rss_mb for r in runs),
            f"whole process, start-up {startup_s:.2f} s of it ({rate_warm:,.0f} records/s without); "
            f"{_quality(quality)}")
    ctx.check(f"jsonl score: records/s ÷ {TARGET_RECORDS_S // 1000}k", rate / TARGET_RECORDS_S, 1.0)
