"""Real neighbouring programs (Prometheus, Alertmanager) started by tests on loopback.

Each is a subprocess bound to 127.0.0.1 on a free port, killed if the test process dies
(PR_SET_PDEATHSIG), waited for with bounded waits and always stopped by the fixture that
started it. A program that is not installed makes the test skip with the reason."""

from __future__ import annotations

import json
import shutil
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.parse
import urllib.request
from pathlib import Path

import pytest

from .conftest import ROOT
from .test_daemon import _die_with_parent

DEPLOY = ROOT / "deploy"
NO_PROXY = urllib.request.build_opener(urllib.request.ProxyHandler({}))  # loopback only


def need_program(name: str, package: str) -> str:
    """The program's path, or skip: `make test` installs it with apt-get where it can."""
    path = shutil.which(name) or (f"/usr/bin/{name}" if Path(f"/usr/bin/{name}").exists() else None)
    if path is None:
        pytest.skip(f"{name} is not installed (Debian package {package}; `make test` installs it "
                    "with apt-get when run as root with a package mirror reachable)")
    return path


def http_json(base: str, path: str, params: dict | None = None, body: object = None,
              headers: dict[str, str] | None = None) -> tuple[int, object]:
    """GET (or POST ``body`` as JSON) on loopback; returns the status and the decoded answer."""
    url = base + path + (("?" + urllib.parse.urlencode(params)) if params else "")
    data = None if body is None else json.dumps(body).encode()
    req = urllib.request.Request(url, data=data, headers={"Content-Type": "application/json", **(headers or {})})
    try:
        with NO_PROXY.open(req, timeout=10) as resp:
            raw, status = resp.read(), resp.status
    except urllib.error.HTTPError as exc:
        raw, status = exc.read(), exc.code
    try:
        return status, json.loads(raw) if raw else None
    except ValueError:
        return status, raw.decode(errors="replace")


class Neighbour:
    """A real program listening on ``127.0.0.1:port``; output goes to ``log_path``."""

    def __init__(self, argv: list[str], port: int, log_path: Path) -> None:
        self.port = port
        self.base = f"http://127.0.0.1:{port}"
        self.log_path = log_path
        self.log = open(log_path, "wb")
        self.proc = subprocess.Popen(argv, stdout=self.log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                                     preexec_fn=_die_with_parent if sys.platform == "linux" else None)

    def request(self, path: str, params: dict | None = None, body: object = None) -> tuple[int, object]:
        return http_json(self.base, path, params, body)

    def until(self, pred, what: str, timeout: float = 20.0, step: float = 0.1):
        """Wait for ``pred()`` to return something true and return it (bounded)."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            assert self.proc.poll() is None, f"{self.proc.args[0]} exited ({self.proc.returncode}):\n{self.output()}"
            try:
                got = pred()
                if got:
                    return got
            except (OSError, urllib.error.URLError):
                pass  # not listening yet
            time.sleep(step)
        raise AssertionError(f"gave up waiting for {what}:\n{self.output()[-3000:]}")

    def ready(self, path: str) -> Neighbour:
        self.until(lambda: self.request(path)[0] == 200, f"{self.proc.args[0]} to answer {path}")
        return self

    def output(self) -> str:
        self.log.flush()
        return self.log_path.read_text(errors="replace")

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout=10)
        self.log.close()


@pytest.fixture
def neighbours(tmp_path):
    """``start(argv_without_port_flag, name)`` → a ready-to-wait :class:`Neighbour` on a free port;
    every one started is stopped at the end of the test."""
    from .test_daemon import free_port

    started: list[Neighbour] = []

    def start(argv: list[str], listen_flag: str, name: str) -> Neighbour:
        port = free_port()
        n = Neighbour([*argv, f"{listen_flag}=127.0.0.1:{port}"], port, tmp_path / f"{name}.log")
        started.append(n)
        return n

    yield start
    for n in started:
        n.stop()
