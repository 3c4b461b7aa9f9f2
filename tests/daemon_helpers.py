"""The daemon under test and its real neighbours, shared by the daemon's integration tests.

``tracewatch run`` as a subprocess (:class:`DaemonProcess`) or the same Daemon object on a
thread (:class:`InProcess`), on configs written into tmp folders and the parcel-locker demo's
lines; and the real neighbouring programs (Prometheus, Alertmanager). Every subprocess is bound
to 127.0.0.1 on a free port, killed if the test process dies (PR_SET_PDEATHSIG), waited for with
bounded waits and always stopped by the fixture that started it. A program that is not
installed makes the test skip with the reason."""

from __future__ import annotations

import ctypes
import http.client
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.parse
import urllib.request
from collections.abc import Callable
from pathlib import Path

import pytest
from prometheus_client import CollectorRegistry

from tracewatch.baselines import baselines_dir
from tracewatch.batch import assign_sources, fit_files
from tracewatch.config import load_config
from tracewatch.demo.scenario import generate, parcel_lockers, render_text
from tracewatch.service.daemon import Daemon

from .conftest import ROOT, run_cli, wait_for

IDLE_S = 1.5
TIME_SCALE = 0.2  # the demo's steps are 0.02-1.5 s apart; scaled, at most 0.3 s (< IDLE_S)

# Not built from demo/run.py's CONFIG: the daemon tests change each of its lines, and TOML text cannot be overridden.
CONFIG = """\
state_dir = "state"

[[sources]]
name = "api"
paths = ["{logs}/*.log"]
format = "text"
line_pattern = '{pattern}'
start_at = "beginning"

[sessions]
idle_timeout_s = {idle}
max_open_sessions = {max_open}
end_pattern = '{end}'

[model]
false_alarm_rate = {rate}

[server]
listen = "127.0.0.1:{port}"

[daemon]
poll_interval_s = 0.2
rotation_grace_s = 0.5
checkpoint_interval_s = {checkpoint_s}
"""

def scaled_lines(n: int, per_kind: int, seed: int, span_s: float) -> list[str]:
    """Demo sessions (with ``per_kind`` anomalies of each kind) whose steps are at most 0.3 s apart."""
    sc = parcel_lockers()
    sessions = generate(sc, n, per_kind, seed=seed, span_s=span_s)
    for s in sessions:
        s.times = [s.start + (t - s.start) * TIME_SCALE for t in s.times]
    return render_text(sc, sessions)


def running(name: str, proc: subprocess.Popen, output: Callable[[], str]) -> Callable[[], None]:
    """An ``alive`` check for :func:`~tests.conftest.wait_for`: fails with the program's output
    once it exited."""
    def check() -> None:
        assert proc.poll() is None, f"{name} exited ({proc.returncode}):\n{output()}"
    return check


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def write_config(folder: Path, port: int, *, max_open: int = 100_000, idle: float = IDLE_S,
                 end_pattern: str = "(?!)", checkpoint_s: float = 0.5, false_alarm_rate: float = 0.05) -> Path:
    """A config following ``folder``/logs/*.log (``(?!)``: an end pattern that never matches)."""
    (folder / "logs").mkdir(parents=True, exist_ok=True)
    path = folder / "tracewatch.toml"
    path.write_text(CONFIG.format(logs=folder / "logs", pattern=parcel_lockers().line_pattern, idle=idle,
                                  max_open=max_open, port=port, end=end_pattern, checkpoint_s=checkpoint_s,
                                  rate=false_alarm_rate))
    return path


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    """A baseline fitted once, the day's lines, and what `tracewatch score` says about them."""
    root = tmp_path_factory.mktemp("daemon")
    cfg_path = write_config(root, 1)
    cfg = load_config(cfg_path)
    base = root / "baseline.txt"
    base.write_text("\n".join(scaled_lines(400, 0, seed=11, span_s=400)) + "\n")
    fit_files(cfg, assign_sources(cfg, [str(base)]))
    lines = scaled_lines(260, 4, seed=12, span_s=60)
    return root, cfg_path, base, lines, scored_day(cfg_path, root / "day.txt", lines, 10)


def scored_day(cfg_path: Path, path: Path, lines: list[str], at_least: int) -> list[dict]:
    """Write ``lines`` to ``path``; what `tracewatch score` says of them (``at_least`` alerts)."""
    path.write_text("\n".join(lines) + "\n")
    batch = run_cli("score", "--config", str(cfg_path), str(path), check=True).stdout
    expected = [json.loads(x) for x in batch.splitlines()]
    assert len(expected) >= at_least, "the day needs alerts to compare"
    return expected


def workspace(fitted, tmp_path: Path, **config) -> Path:
    """A fresh state folder holding a copy of the fitted baseline; returns the config path."""
    shutil.copytree(baselines_dir(fitted[0] / "state"), baselines_dir(tmp_path / "state"))
    return write_config(tmp_path, free_port(), **config)


def write_burst(path: Path, lines: list[str]) -> None:
    """One burst, delivered in two writes cut inside a line (the daemon must hold the half line)."""
    data = "".join(line + "\n" for line in lines).encode()
    cut = len(data) // 2 + 3
    with open(path, "ab") as fh:
        fh.write(data[:cut])
        fh.flush()
        time.sleep(0.005)  # the writer's pace inside a line, so a follower may read half of it; nothing waits here
        fh.write(data[cut:])


def die_with_parent() -> None:
    """Linux prctl(PR_SET_PDEATHSIG, SIGKILL): a daemon never outlives the test that started it
    (man 2 prctl)."""
    libc = ctypes.CDLL(None, use_errno=True)
    libc.prctl(1, signal.SIGKILL, 0, 0, 0)  # 1 = PR_SET_PDEATHSIG


class DaemonProcess:
    """`tracewatch run` as a subprocess; every one started is killed at the end of the test
    (:func:`no_daemon_left`) if the test did not stop it."""

    started: list[DaemonProcess] = []

    def __init__(self, cfg_path: Path, *extra: str) -> None:
        self.cfg = load_config(cfg_path)
        self.port = int(self.cfg.server.listen.rsplit(":", 1)[1])
        self.err_path = cfg_path.parent / f"daemon-{time.monotonic_ns()}.err"
        self.err = open(self.err_path, "wb")
        env = dict(os.environ, PYTHONPATH=str(ROOT))
        self.proc = subprocess.Popen([sys.executable, "-m", "tracewatch", "run", "--config", str(cfg_path), *extra],
                                     stdout=subprocess.DEVNULL, stderr=self.err, env=env,
                                     preexec_fn=die_with_parent if sys.platform == "linux" else None)
        DaemonProcess.started.append(self)

    def get(self, path: str) -> tuple[int, bytes]:
        conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=10)
        try:
            conn.request("GET", path)
            resp = conn.getresponse()
            return resp.status, resp.read()
        finally:
            conn.close()

    def status(self) -> dict:
        return json.loads(self.get("/api/status")[1])

    def until(self, pred, what: str, timeout: float = 40.0, step: float = 0.05) -> float:
        """Wait for ``pred()``; returns the perf_counter time it held (bench/daemon.py times with it)."""
        wait_for(pred, timeout, what=what, step=step, alive=running("the daemon", self.proc, self.stderr),
                 tail=lambda: self.stderr()[-3000:], ignore=(OSError, http.client.HTTPException))
        return time.perf_counter()

    def ready(self) -> DaemonProcess:
        self.until(lambda: self.get("/readyz")[0] == 200, "readiness")
        return self

    def caught_up(self, n_lines: int) -> dict:
        def done() -> bool:
            s = self.status()
            return s["sources"][0]["records"] == n_lines and s["sessions_open"] == 0
        self.until(done, f"{n_lines} records and every session closed")
        return self.status()

    def terminate(self) -> int:
        self.proc.send_signal(signal.SIGTERM)
        code = self.proc.wait(timeout=15)
        self.err.close()
        return code

    def kill(self) -> None:
        self.proc.kill()
        self.proc.wait(timeout=15)
        if not self.err.closed:
            self.err.close()

    def stderr(self) -> str:
        if not self.err.closed:
            self.err.flush()
        return self.err_path.read_text(errors="replace")


@pytest.fixture(autouse=True)
def no_daemon_left():
    """Kill every :class:`DaemonProcess` a test left running (autouse where it is imported)."""
    yield
    while DaemonProcess.started:
        daemon = DaemonProcess.started.pop()
        if daemon.proc.poll() is None:
            daemon.kill()


class FakeWall:
    """A wall clock that moves only when a test sets ``t``."""

    def __init__(self) -> None:
        self.t = 5_000.0

    def __call__(self) -> float:
        return self.t


class InProcess:
    """The real Daemon driven from a thread, with a fresh metrics registry; ``wall`` is its wall
    clock (a :class:`FakeWall` to move time by hand with :meth:`advance`); other keywords go to
    the Daemon (``on_state``, for example)."""

    def __init__(self, cfg_path: Path, wall: Callable[[], float] = time.time, **daemon_kw) -> None:
        self.registry = CollectorRegistry()
        self.wall = wall
        self.daemon = Daemon(load_config(cfg_path), registry=self.registry, wall=wall, **daemon_kw)
        self.daemon.start()
        self.thread = threading.Thread(target=self.daemon.run)
        self.thread.start()

    def until(self, pred, what: str, timeout: float = 30.0, *, between: Callable[[], None] = lambda: None) -> None:
        wait_for(pred, timeout, what=what, between=between, tail=lambda: f"status: {self.daemon.status()}")

    def ticked(self) -> Callable[[], bool]:
        """A condition: the daemon's loop has looked for idle sessions twice since now (so once
        wholly after anything the test changed now, such as the fake clock)."""
        start = self.daemon.ticks
        return lambda: self.daemon.ticks >= start + 2

    def advance(self, pred, what: str, step: float = 10.0) -> None:
        """Move the fake wall clock on ``step`` seconds at a time, each move once the daemon has
        acted on the last one, until ``pred()`` holds (the live clock counts quiet time only
        from the moment it has seen the newest record)."""
        turn = {"acted": lambda: True, "looked": True}  # the daemon acted on the last move; pred() seen since

        def move() -> None:
            if turn["looked"] and turn["acted"]():
                self.wall.t += step
                turn.update(acted=self.ticked(), looked=False)

        def holds() -> bool:
            if not turn["acted"]():
                return False
            turn["looked"] = True
            return pred()

        self.until(holds, what, between=move)

    def metric(self, name: str, labels: dict | None = None) -> float | None:
        return self.registry.get_sample_value(name, labels or {})

    def stop(self) -> None:
        self.daemon.stop()
        self.thread.join(15)


# -- real neighbouring programs ----------------------------------------------------------------------
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
                                     preexec_fn=die_with_parent if sys.platform == "linux" else None)

    def request(self, path: str, params: dict | None = None, body: object = None) -> tuple[int, object]:
        return http_json(self.base, path, params, body)

    def until(self, pred, what: str, timeout: float = 20.0, step: float = 0.1):
        """Wait for ``pred()`` to return something true and return it (bounded)."""
        return wait_for(pred, timeout, what=what, step=step, alive=running(self.proc.args[0], self.proc, self.output),
                        tail=lambda: self.output()[-3000:], ignore=(OSError,))  # URLError is an OSError

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
    started: list[Neighbour] = []

    def start(argv: list[str], listen_flag: str, name: str) -> Neighbour:
        port = free_port()
        n = Neighbour([*argv, f"{listen_flag}=127.0.0.1:{port}"], port, tmp_path / f"{name}.log")
        started.append(n)
        return n

    yield start
    for n in started:
        n.stop()
