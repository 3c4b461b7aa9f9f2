"""Batch runs of several files: read merged by record time (tracewatch/batch.py TimeMerge)."""

from __future__ import annotations

import json

from tracewatch.batch import assign_sources, run_files
from tracewatch.config import load_config
from tracewatch.pipeline import Pipeline

from .conftest import run_cli
from .daemon_helpers import fitted  # noqa: F401


def _files(folder, lines: list[str], n: int):
    """The day as one file, and as ``n`` files where line i goes to file i % n: each file stays
    in time order, as each host's log is, and every session's records are spread over all."""
    whole = folder / "whole.log"
    whole.write_text("\n".join(lines) + "\n")
    parts = [folder / f"host{i}.log" for i in range(n)]
    for i, path in enumerate(parts):
        path.write_text("\n".join(lines[i::n]) + "\n")
    return whole, parts


def _alerts(cfg_path, *paths) -> list[tuple[str, tuple[str, ...], float]]:
    out = run_cli("score", "--config", str(cfg_path), *map(str, paths), check=True).stdout
    return sorted((a["session_key"], tuple(a["reasons"]), round(a["score"], 9)) for a in map(json.loads, out.splitlines()))


def test_sessions_spread_over_three_files_score_as_the_one_file(fitted, tmp_path):
    root, cfg_path, _, lines, _ = fitted
    whole, parts = _files(tmp_path, lines, 3)
    expected = _alerts(cfg_path, whole)
    assert len(expected) >= 10
    # the files given in reverse order too: the merge, not the order of the arguments, decides
    assert _alerts(cfg_path, *parts) == expected
    assert _alerts(cfg_path, *reversed(parts)) == expected


def test_a_fit_over_split_files_collects_whole_sessions(fitted, tmp_path):
    root, cfg_path, _, lines, _ = fitted
    cfg = load_config(cfg_path)
    whole, parts = _files(tmp_path, lines, 4)
    one, many = Pipeline(cfg), Pipeline(cfg)
    run_files(one, assign_sources(cfg, [str(whole)]))
    run_files(many, assign_sources(cfg, [str(p) for p in parts]))
    sessions = sorted((key, len(seq)) for _, key, seq in one.collected)
    assert len(sessions) > 200
    assert sorted((key, len(seq)) for _, key, seq in many.collected) == sessions
    assert many.records == one.records
