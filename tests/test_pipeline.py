"""The pipeline's input half: one path from lines to sessions, whatever the format gives.

A text source whose ``message`` group is optional: a line where that group takes no part has
the message "" by the per-line rule; read as a block it once came out as None, and `fit` died in
the template stage while `tracewatch run` stopped with an internal error on every restart."""

from __future__ import annotations

import json
import re

from tracewatch.config import parse_config
from tracewatch.demo.scenario import parcel_lockers
from tracewatch.formats import make_format
from tracewatch.pipeline import Pipeline

from .conftest import run_cli
from .daemon_helpers import CONFIG, DaemonProcess, free_port, no_daemon_left, scaled_lines  # noqa: F401

# the demo's pattern with the message made optional: "... req=KEY" alone is a line too
OPTIONAL_MESSAGE = parcel_lockers().line_pattern.replace(r"req=(?P<key>\S+) (?P<message>.*)$",
                                                         r"req=(?P<key>\S+)(?: (?P<message>.*))?$")


def _lines(n_sessions: int, seed: int) -> list[str]:
    """Demo lines; every session's first line is followed by one without a message."""
    out, seen = [], set()
    for line in scaled_lines(n_sessions, 0, seed=seed, span_s=n_sessions):
        out.append(line)
        key = re.search(r"req=(\S+)", line).group(1)
        if key not in seen:
            seen.add(key)
            out.append(line[:line.index("req=")] + f"req={key}")
    return out


def test_optional_message_group_fits_and_templates_through_the_cli(tmp_path):
    cfg = tmp_path / "tracewatch.toml"
    cfg.write_text(f"state_dir = \"state\"\n[[sources]]\nname = \"api\"\nline_pattern = '{OPTIONAL_MESSAGE}'\n")
    log = tmp_path / "day.log"
    lines = _lines(300, seed=5)
    log.write_text("\n".join(lines) + "\n")
    fit = run_cli("fit", "--config", str(cfg), str(log))
    assert fit.returncode == 0, fit.stderr
    assert f"records: {len(lines)} (lines read {len(lines)}, rejected 0)" in fit.stdout
    rows = [json.loads(x) for x in run_cli("templates", "--config", str(cfg), str(log), check=True).stdout.splitlines()]
    assert [r["line"] for r in rows] == list(range(1, len(lines) + 1))
    bare = [r["template"] for r, line in zip(rows, lines) if re.search(r"req=\S+$", line)]
    assert len(bare) == 300 and set(bare) == {""}  # the message-less lines share the empty template


def test_optional_message_group_in_the_daemon(tmp_path):
    """`tracewatch run` reads such lines and keeps running (it stopped with an internal error)."""
    port = free_port()
    cfg = tmp_path / "tracewatch.toml"
    cfg.write_text(CONFIG.format(logs=tmp_path / "logs", pattern=OPTIONAL_MESSAGE, idle=1.5, max_open=1000,
                                 port=port, end="(?!)", checkpoint_s=0.5, rate=0.05))
    (tmp_path / "logs").mkdir()
    base = tmp_path / "baseline.txt"
    base.write_text("\n".join(scaled_lines(300, 0, seed=6, span_s=300)) + "\n")  # every line with a message
    run_cli("fit", "--config", str(cfg), str(base), check=True)
    daemon = DaemonProcess(cfg).ready()
    day = _lines(40, seed=7)
    (tmp_path / "logs" / "day.log").write_text("\n".join(day) + "\n")
    daemon.caught_up(len(day))
    assert daemon.terminate() == 0
    assert "internal error" not in daemon.stderr()


def test_every_format_output_reaches_the_sessions_as_one_value(tmp_path):
    """Lines read one at a time, in one block or in blocks of any size end in the same
    sessions, the same counts and the same rejections."""
    src = {"name": "api", "line_pattern": OPTIONAL_MESSAGE}
    cfg = parse_config({"state_dir": str(tmp_path), "sources": [src]})
    lines = _lines(30, seed=8) + ["", "not a log line", "2026-11-30T10:00:00Z INFO [x] req=q caf\u00e9 \ufffd"]

    def run(step: int) -> Pipeline:
        pipe = Pipeline(cfg, sample_rejects=False)
        for lo in range(0, len(lines), step):
            pipe.feed_block("api", "day", lines[lo:lo + step], list(range(lo, min(lo + step, len(lines)))))
        pipe.flush()
        return pipe

    one, *others = [run(step) for step in (1, len(lines), 7)]
    for pipe in others:
        assert pipe.collected == one.collected and pipe.records == one.records
        assert pipe.rejected == one.rejected == {("api", "empty"): 1, ("api", "no_match"): 1}
        assert [t.id for t in pipe.miner.templates] == [t.id for t in one.miner.templates]
    assert make_format(cfg.sources[0]).feed(lines[1], 0)[0].message == ""


def test_templates_runs_through_the_pipeline_and_leaves_no_state(tmp_path):
    """`tracewatch templates` reads by the pipeline's one path (multi-line records included:
    the line a record starts on), and as a listing tool writes nothing where it runs."""
    cfg = tmp_path / "tracewatch.toml"
    cfg.write_text("state_dir = \"state\"\n[[sources]]\nname = \"api\"\n"
                   "line_pattern = '^(?P<level>[A-Z]+) (?P<message>.*)$'\ncontinuation_pattern = '^\\s'\n")
    log = tmp_path / "x.log"
    log.write_text("ERROR payment 12 failed\n  at gateway.charge\n  at api.fee\nnot a record\n\nINFO payment 13 failed\n")
    rows = [json.loads(x) for x in run_cli("templates", "--config", str(cfg), str(log), cwd=tmp_path,
                                           check=True).stdout.splitlines()]
    assert [(r["line"], r["template"]) for r in rows] == [(1, "payment <var> failed"), (4, "not a record"),
                                                          (6, "payment <var> failed")]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["tracewatch.toml", "x.log"]
