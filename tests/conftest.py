"""Shared fixtures: configs built in tmp folders, generated scenarios, the CLI as a subprocess."""

from __future__ import annotations

import os
import subprocess
import sys
import threading
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def run_cli(*args: str, cwd: Path | None = None, check: bool = False) -> subprocess.CompletedProcess:
    """Run the real `tracewatch` command (this interpreter's package) and capture its output."""
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.run([sys.executable, "-m", "tracewatch", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, timeout=300)
    if check and proc.returncode != 0:
        raise AssertionError(f"tracewatch {' '.join(args)} failed ({proc.returncode}):\n{proc.stderr}")
    return proc


@pytest.fixture(autouse=True)
def _no_thread_leaks():
    """A test that leaves a thread running fails (the daemon must shut down cleanly)."""
    before = set(threading.enumerate())
    yield
    leaked = [t for t in threading.enumerate() if t not in before and t.is_alive() and not t.daemon]
    assert not leaked, f"threads left running: {leaked}"
