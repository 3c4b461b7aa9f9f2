"""The README's Quick start, run literally (first ```sh block under "## Quick start") in a fresh clone."""

from __future__ import annotations

import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def quick_start_commands() -> list[str]:
    text = (ROOT / "README.md").read_text()
    section = text[text.index("## Quick start"):]
    block = re.search(r"```sh\n(.*?)```", section, re.S).group(1)
    return [line.split("  #")[0].strip() for line in block.splitlines() if line.strip()]


@pytest.mark.skipif(shutil.which("git") is None, reason="git is not installed")
def test_quick_start_runs_from_a_fresh_clone(tmp_path):
    clone = tmp_path / "clone"
    subprocess.run(["git", "clone", "-q", str(ROOT), str(clone)], check=True)
    cmds = quick_start_commands()
    assert cmds[0] == "make install" and all(c.startswith(".venv/bin/tracewatch ") for c in cmds[1:])
    # Substitution (documented): `make install` would build a venv for minutes; instead the clone's
    # .venv/bin/tracewatch is this interpreter running the clone's own package (PYTHONPATH=clone).
    (clone / ".venv" / "bin").mkdir(parents=True)
    env = {"PYTHONPATH": str(clone), "PATH": "/usr/bin:/bin"}
    for cmd in cmds[1:]:
        argv = [sys.executable, "-m", "tracewatch", *shlex.split(cmd)[1:]]
        proc = subprocess.run(argv, cwd=clone, env=env, capture_output=True, text=True, timeout=60)
        assert proc.returncode == 0, f"{cmd}: rc {proc.returncode}\n{proc.stderr[-2000:]}"
    hint = proc.stdout.strip().splitlines()[-1]
    assert hint.startswith("Try: ")
    # the demo's closing hint runs as printed too (here the interpreter stands in for the script)
    parts = shlex.split(hint[len("Try: "):])
    proc = subprocess.run([sys.executable, "-m", "tracewatch", *parts[1:]], cwd=clone, env=env,
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert proc.stdout.count("\n") > 0  # the demo day has alerts
