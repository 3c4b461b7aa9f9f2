"""Benchmark: batch scoring in every documented config shape — ``tracewatch score`` against a
straightforward scikit-learn script and a bare read-and-split loop, on the same day of records.

The shapes (README, *Config reference* and *Input formats*; ``config/tracewatch.example.toml``):

- ``text, key in line_pattern``: the demo's config, the request id a named group of the pattern;
- ``text, session_key regex``: the same lines, the pattern without the key and the request id
  found by a separate ``session_key`` regex (so it stays in the message, as the README shows);
- ``jsonl``: the same records as JSON lines, ``session_key = "req"``;
- ``syslog``: the same records as RFC 5424 lines, the request id in structured data
  (``session_field = "[req@32473 id]"``);
- ``otlp-json``: the same day's sessions as OTLP/JSON trace exports (a trace a session, a span
  a step plus the request's own), keyed by trace id.

What is timed (the fit is excluded for every detector):

- ``tracewatch score``: the wall time of the whole process, after a ``tracewatch fit`` on the
  baseline day in the same shape — interpreter start, imports, loading the baseline and writing
  the alerts included (its fixed start-up cost is measured on a one-line file and shown);
- the script (``script_baseline.py``): only its scoring pass on the text day, timed inside its
  process after its own fit; its start-up and imports are not counted;
- the bare loop: reading the shape's own file as text and splitting every line, nothing else.

The subjects take turns, round after round (a slow spell of this shared machine then hits all
of them); the fastest run of each counts, and the spread of each ratio over the rounds is shown.
"× script" compares records per second (a text line, a JSON line, a syslog line, a span: one
record each); "× bare loop" compares seconds on the same file. Both detectors' flags are checked
against the day's labels (recall over injected anomalies, false-alarm rate on normal sessions).
"""

from __future__ import annotations

import hashlib
import json
import shutil
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import orjson

from gen import as_jsonl, as_otlp, as_syslog, log_file

from tracewatch.demo.run import CONFIG as DEMO_CONFIG
from tracewatch.demo.scenario import parcel_lockers

HERE = Path(__file__).resolve().parent
TARGET_VS_SCRIPT = 2.0
TARGET_VS_BARE = 0.10
KEY_IN_PATTERN = "text, key in line_pattern"

# the demo's sessions, features and model settings; each shape brings its own [[sources]]
MODEL = DEMO_CONFIG[DEMO_CONFIG.index("[sessions]"):]
_PATTERN = parcel_lockers().line_pattern
SOURCES = {
    KEY_IN_PATTERN: f"format = \"text\"\nline_pattern = '{_PATTERN}'\n",
    "text, session_key regex": ("format = \"text\"\nline_pattern = '"
                                + _PATTERN.replace(r"req=(?P<key>\S+) ", "") + "'\n"
                                "session_key = 'req=(?P<key>[0-9a-f]+)'\n"),
    "jsonl": 'format = "jsonl"\nsession_key = "req"\n',
    "syslog": 'format = "syslog"\nsession_field = "[req@32473 id]"\n',
    "otlp-json": 'format = "otlp-json"\n',
}
# what limits each shape: the slower of the two processes of a batch run (the reader parsing
# ahead, sources/ahead.py, and the main one mining, sessionizing, scoring), by their CPU seconds
# on the 1M-line day (bench/run.py --profile fills this column afresh from py-spy of the main
# process); see bench/README.md
LIMITS = {
    KEY_IN_PATTERN: "the main process (2.5 s CPU: template cache lookups, the sessionizer loop, scoring); "
                    "the reader 1.0 s",
    "text, session_key regex": "the main process (3.3 s CPU: as above plus coarse template keys for every "
                               "message, each holding its request id); the reader 1.4 s",
    "jsonl": "the main process (2.6 s CPU); the reader 1.4 s (orjson.loads: a dict and five strings per line)",
    "syslog": "the main process (2.6 s CPU), the reader close behind (2.1 s: the RFC 5424 regex, structured "
              "data checked)",
    "otlp-json": "the reader (3.3 s CPU: decoding each export, per-span columns, each span's raw text "
                 "re-encoded and sent on as JSON); the main process 2.7 s",
}


@dataclass
class Shape:
    name: str
    base: Path
    scored: Path
    records: int
    key_of: callable  # label session_key -> the key tracewatch reports
    runs: list = field(default_factory=list)
    bare: list = field(default_factory=list)


def bare_loop(path: Path) -> tuple[int, float]:
    """Lines read and seconds taken by a loop that only reads and splits the lines."""
    t0 = time.perf_counter()
    n = 0
    with open(path, encoding="utf-8") as fh:
        for line in fh:
            line.split()
            n += 1
    return n, time.perf_counter() - t0


def detection(flagged: set[str], labels_path: Path, key_of=lambda k: k) -> dict:
    """Recall over injected anomalies and false-alarm rate over normal sessions."""
    anomalies = normal = caught = false_alarms = 0
    for raw in labels_path.read_bytes().splitlines():
        row = orjson.loads(raw)
        hit = key_of(row["session_key"]) in flagged
        if row["label"] == "normal":
            normal += 1
            false_alarms += hit
        else:
            anomalies += 1
            caught += hit
    return {"recall": caught / max(anomalies, 1), "false_alarm_rate": false_alarms / max(normal, 1)}


def _keys(path: Path, want_alert: bool) -> set[str]:
    keys = set()
    for raw in path.read_bytes().splitlines():
        row = orjson.loads(raw)
        if not want_alert or row.get("alert", True):
            keys.add(row["session_key"])
    return keys


def _quality(d: dict) -> str:
    return f"recall {d['recall']:.3f}, false alarms {d['false_alarm_rate']:.4f}"


def _trace_id(key: str) -> str:
    return hashlib.blake2b(key.encode(), digest_size=16).hexdigest()  # tracewatch.demo.traces.trace_id


def shapes(ctx, base, scored) -> list[Shape]:
    otlp_base, _ = as_otlp("baseline", ctx.baseline_lines, base)
    otlp_scored, spans = as_otlp("scored", ctx.lines, scored)
    same = lambda k: k  # noqa: E731
    return [Shape(KEY_IN_PATTERN, base.path, scored.path, scored.lines, same),
            Shape("text, session_key regex", base.path, scored.path, scored.lines, same),
            Shape("jsonl", as_jsonl(base), as_jsonl(scored), scored.lines, same),
            Shape("syslog", as_syslog(base), as_syslog(scored), scored.lines, same),
            Shape("otlp-json", otlp_base, otlp_scored, spans, _trace_id)]


def _config(work: Path, shape: Shape) -> Path:
    folder = work / shape.name.replace(", ", "-").replace(" ", "_")
    folder.mkdir(parents=True, exist_ok=True)
    cfg = folder / "tracewatch.toml"
    cfg.write_text(f'state_dir = "state"\n\n[[sources]]\nname = "locker-api"\n{SOURCES[shape.name]}\n{MODEL}')
    return cfg


def _spread(values: list[float]) -> str:
    return f"{min(values):.2f}–{max(values):.2f}" if len(values) > 1 else f"{values[0]:.2f}"


def run(ctx) -> None:
    """Generate (or reuse) the files, fit every shape, then time the readers round by round."""
    work = ctx.out / f"score-{ctx.lines}"
    shutil.rmtree(work, ignore_errors=True)
    base = log_file("baseline", ctx.baseline_lines, regen=ctx.regen)
    scored = log_file("scored", ctx.lines, regen=ctx.regen)
    tw = [sys.executable, "-m", "tracewatch"]
    todo = shapes(ctx, base, scored)
    if ctx.only_shapes:
        todo = [s for s in todo if s.name in ctx.only_shapes or s.name == KEY_IN_PATTERN]
    cmds = {}
    for shape in todo:
        cfg = _config(work, shape)
        fit = ctx.process([*tw, "fit", "--config", str(cfg), str(shape.base)], stdout=cfg.with_name("fit.txt"))
        if shape.name == KEY_IN_PATTERN:
            ctx.row("fit (not in the ratios)", "tracewatch fit", base.lines, fit.seconds, fit.rss_mb,
                    f"{base.sessions} baseline sessions; whole process")
            tiny = cfg.with_name("tiny.log")
            with open(scored.path, encoding="utf-8") as fh:
                tiny.write_text(fh.readline())
            startup_s = min(ctx.process([*tw, "score", "--config", str(cfg), str(tiny)],
                                        stdout=cfg.with_name("tiny.jsonl")).seconds for _ in range(ctx.repeat))
        cmds[shape.name] = [*tw, "score", "--config", str(cfg), str(shape.scored)]

    flagged = work / "script-flagged.jsonl"
    script_cmd = [sys.executable, str(HERE / "script_baseline.py"), "--baseline", str(base.path),
                  "--score", str(scored.path), "--out", str(flagged)]
    script_runs = []
    for i in range(ctx.repeat):
        script_runs.append(ctx.process(script_cmd, stdout=work / f"script-{i}.json"))
        for shape in todo:
            alerts = Path(cmds[shape.name][5]).with_name("alerts.jsonl")
            shape.runs.append(ctx.process(cmds[shape.name], stdout=alerts))
            shape.bare.append(bare_loop(shape.scored)[1])

    reports = [json.loads(r.stdout_text()) for r in script_runs]
    best = min(reports, key=lambda r: r["score_s"])
    script_rate = best["lines"] / best["score_s"]
    round_rates = [r["lines"] / r["score_s"] for r in reports]
    ctx.row("score", "scikit-learn script", best["lines"], best["score_s"], max(r.rss_mb for r in script_runs),
            f"text, scoring pass only (fit {best['fit_s']:.1f} s excluded); "
            f"{_quality(detection(_keys(flagged, False), scored.labels))}")
    n_bare, bare_s = bare_loop(scored.path)
    for shape in todo:
        seconds = [r.seconds for r in shape.runs]
        alerts = Path(cmds[shape.name][5]).with_name("alerts.jsonl")
        quality = detection(_keys(alerts, True), scored.labels, shape.key_of)
        note = _quality(quality)
        if shape.name == KEY_IN_PATTERN:
            note = f"start-up {startup_s:.2f} s of it; " + note
        ctx.row("score", f"tracewatch: {shape.name}", shape.records, min(seconds), max(r.rss_mb for r in shape.runs),
                note)
        vs_script = [shape.records / s / rate for s, rate in zip(seconds, round_rates)]
        vs_bare = [b / s for s, b in zip(seconds, shape.bare)]
        cpu = min(r.cpu_seconds for r in shape.runs)
        script_cpu = min(r["score_cpu_s"] / r["lines"] for r in reports)  # CPU seconds per record
        ctx.shape(shape.name, shape.records / min(seconds), shape.records / min(seconds) / script_rate,
                  _spread(vs_script), script_cpu * shape.records / cpu, min(shape.bare) / min(seconds), _spread(vs_bare),
                  TARGET_VS_SCRIPT, TARGET_VS_BARE, LIMITS[shape.name], cmds[shape.name])
    ctx.row("score", "bare read+split loop (text)", n_bare, bare_s, None, "in the runner's process")
    ctx.profile_target = cmds[KEY_IN_PATTERN]
