"""Shared fixtures: configs built in tmp folders, generated scenarios, a demo baseline fitted
once per run, the CLI as a subprocess, and :func:`wait_for`, the one way a test waits."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import NamedTuple

import pytest

from tracewatch.model.baseline import Baseline
from tracewatch.batch import assign_sources, fit_files
from tracewatch.config import Config, parse_config
from tracewatch.demo.run import write_scenario
from tracewatch.demo.scenario import parcel_lockers

ROOT = Path(__file__).resolve().parent.parent


def run_cli(*args: str, cwd: Path | None = None, check: bool = False) -> subprocess.CompletedProcess:
    """Run the real `tracewatch` command (this interpreter's package) and capture its output."""
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.run([sys.executable, "-m", "tracewatch", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=300)
    if check and proc.returncode != 0:
        raise AssertionError(f"tracewatch {' '.join(args)} failed ({proc.returncode}):\n{proc.stderr}")
    return proc


def wait_for(pred: Callable[[], object], timeout: float, *, what: str = "the condition", step: float = 0.05,
             between: Callable[[], None] = lambda: None, alive: Callable[[], None] = lambda: None,
             tail: Callable[[], str] = lambda: "", ignore: tuple[type[BaseException], ...] = ()):
    """Poll ``pred()`` every ``step`` s until it returns something true, and return that; give
    up with an AssertionError after ``timeout`` s. Every test that waits for something waits
    here, on an explicit condition (a counter reached, a file grew, a checkpoint written).

    ``between()`` runs before each poll — a test on a fake clock moves the clock there;
    ``alive()`` fails the test as soon as the program waited on has died; errors in ``ignore``
    count as "not yet" (a server not listening yet); ``tail()`` is shown on giving up."""
    deadline = time.monotonic() + timeout
    while True:
        between()
        alive()
        try:
            got = pred()
            if got:
                return got
        except ignore:
            pass
        if time.monotonic() >= deadline:
            raise AssertionError(f"gave up after {timeout:g} s waiting for {what}\n{tail()}")
        time.sleep(step)  # the poll interval: the one sleep every wait goes through


@pytest.fixture(autouse=True)
def _no_thread_leaks():
    """A test that leaves a thread running fails (the daemon must shut down cleanly)."""
    before = set(threading.enumerate())
    yield
    leaked = [t for t in threading.enumerate() if t not in before and t.is_alive() and not t.daemon]
    assert not leaked, f"threads left running: {leaked}"


class DemoFit(NamedTuple):
    cfg: Config
    baseline: Baseline
    day: Path  # a day to score: 150 normal sessions and 4 anomalies of each kind


@pytest.fixture(scope="session")
def demo_fit(tmp_path_factory) -> DemoFit:
    """A baseline fitted once on 400 sessions of the parcel-locker demo (source "api"). Shared by
    every test that asks: read it, never change it; a test that changes the state takes
    :func:`demo_state`."""
    tmp = tmp_path_factory.mktemp("demo-fit")
    sc = parcel_lockers()
    base, day, _ = write_scenario(tmp, sc, seed=3, n_baseline=400, n_normal=150, per_kind=4)
    cfg = parse_config({"state_dir": str(tmp / "state"),
                        "sources": [{"name": "api", "line_pattern": sc.line_pattern}],
                        "sessions": {"idle_timeout_s": 5}, "model": {"false_alarm_rate": 0.02}})
    baseline, _, _ = fit_files(cfg, assign_sources(cfg, [str(base)]))
    return DemoFit(cfg, baseline, day)


@pytest.fixture
def demo_state(demo_fit, tmp_path) -> Path:
    """This test's own copy of :func:`demo_fit`'s state folder, free to change."""
    return Path(shutil.copytree(demo_fit.cfg.state_dir, tmp_path / "state"))
