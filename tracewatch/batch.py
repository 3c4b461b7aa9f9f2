"""Batch driver: feed whole files through the pipeline once (fit, score, templates).

Stage: **sources** (batch). Which source an input file belongs to comes from ``--source``,
from the config's ``paths`` globs, or — with a single source — is that source.
"""

from __future__ import annotations

import fnmatch
from collections.abc import Callable
from itertools import repeat
from pathlib import Path

from .config import Config
from .errors import ConfigError, InputError
from .pipeline import Pipeline
from .sources.files import expand_inputs, read_blocks


def assign_sources(cfg: Config, inputs: list[str], source: str | None = None) -> list[tuple[str, Path]]:
    """``(source name, path)`` for every input; with no inputs, the config's own paths."""
    if not cfg.sources:
        raise ConfigError("config: no [[sources]] defined")
    if source is not None:
        cfg.source(source)
    if not inputs:
        out = []
        for src in cfg.sources:
            if source is None or src.name == source:
                out.extend((src.name, p) for p in expand_inputs(src.paths))
        if not out:
            raise InputError("no input files: give INPUT paths or set paths = [...] in the sources")
        return out
    pairs = []
    for path in expand_inputs(inputs):
        if source is not None:
            pairs.append((source, path))
        elif len(cfg.sources) == 1:
            pairs.append((cfg.sources[0].name, path))
        else:
            hits = [s.name for s in cfg.sources
                    if any(fnmatch.fnmatch(str(path), g) or fnmatch.fnmatch(path.name, Path(g).name)
                           for g in s.paths)]
            if len(hits) != 1:
                why = "matches no source's paths" if not hits else f"matches several sources ({', '.join(hits)})"
                raise InputError(f"{path}: {why}; say which with --source NAME")
            pairs.append((hits[0], path))
    return pairs


def run_files(pipeline: Pipeline, pairs: list[tuple[str, Path]], *,
              on_block: Callable[[str, list[int]], None] | None = None) -> None:
    """Feed every file to the pipeline, in order, then flush it; ``on_block`` sees the stream
    and the line offsets of every block read, before the pipeline does."""
    for source, path in pairs:
        stream = str(path)
        for lines, offsets, repairs in read_blocks(path, pipeline.cfg.source(source).max_line_bytes):
            if on_block is not None:
                on_block(stream, offsets)
            pipeline.feed_block(source, stream, lines, offsets, repairs)
        pipeline.end_stream(source, stream)
    pipeline.flush()


def template_rows(cfg: Config, pairs: list[tuple[str, Path]]) -> tuple[list[tuple[int, int]], Pipeline]:
    """``(line number, template index)`` of every record of the files, in input order (the
    line a record starts on; 0 where it has none), and the pipeline that mined them."""
    numbers: dict[str, dict[int, int]] = {}
    rows: list[tuple[int, int]] = []

    def number(stream: str, offsets: list[int]) -> None:
        of = numbers.setdefault(stream, {})
        of.update(zip(offsets, range(len(of) + 1, len(of) + 1 + len(offsets))))

    def take(source: str, stream: str, cols, idxs: list[int]) -> None:
        rows.extend(zip(map(numbers[stream].get, cols.offsets, repeat(0)), idxs))

    pipeline = Pipeline(cfg, on_records=take, sample_rejects=False)
    run_files(pipeline, pairs, on_block=number)
    return rows, pipeline


def fit_files(cfg: Config, pairs: list[tuple[str, Path]]):
    """Read normal sessions from files, fit a baseline, save it as the current version."""
    from .baselines import check_writable, save_baseline
    from .model.baseline import fit_baseline

    check_writable(cfg.state_dir)
    pipeline = Pipeline(cfg)
    run_files(pipeline, pairs)
    baseline = fit_baseline(pipeline.fit_sessions(), pipeline.miner, cfg, pipeline.fit_keys())
    path = save_baseline(baseline, cfg.state_dir)
    return baseline, path, pipeline


def score_files(cfg: Config, pairs: list[tuple[str, Path]], baseline, on_verdict, *, score_all: bool = False
                ) -> Pipeline:
    pipeline = Pipeline(cfg, baseline, on_verdict=on_verdict, score_all=score_all)
    run_files(pipeline, pairs)
    return pipeline
