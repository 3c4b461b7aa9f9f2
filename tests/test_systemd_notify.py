"""tracewatch under a service manager (tracewatch/service/systemd.py): the sd_notify protocol on
real AF_UNIX datagram sockets, and the real daemon as a subprocess — READY after the baseline is
loaded and the sources attached, WATCHDOG pings, STOPPING on SIGTERM, RELOADING/READY around a
SIGHUP reload, a bad config refused and the running one kept.

Outside reference: sd_notify(3) of systemd 252 (the protocol: one datagram of NAME=value lines to
$NOTIFY_SOCKET, "@" for the abstract namespace; WATCHDOG_USEC/WATCHDOG_PID as
sd_watchdog_enabled(3) reads them), and systemd's own ``systemd-notify`` program, whose datagrams
ours must equal byte for byte."""

from __future__ import annotations

import json
import logging
import os
import shutil
import signal
import socket
import subprocess
import tempfile
import threading
import time
import uuid
from pathlib import Path

import pytest

from tracewatch.config import load_config
from tracewatch.service.daemon import Daemon
from tracewatch.service.systemd import Notifier, Service

from .daemon_helpers import DaemonProcess, free_port, no_daemon_left, write_config  # noqa: F401 (autouse)

# -- the service manager's end of the socket -------------------------------------------------------
class ManagerSocket:
    """A real AF_UNIX datagram socket bound where $NOTIFY_SOCKET points; ``messages`` holds every
    datagram received, decoded into its NAME=value assignments."""

    def __init__(self, address: str | bytes) -> None:
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        self.sock.bind(address)
        self.sock.settimeout(0.05)
        self.messages: list[dict[str, str]] = []

    def drain(self) -> None:
        while True:
            try:
                data = self.sock.recv(65536)
            except (socket.timeout, BlockingIOError):
                return
            self.messages.append(dict(line.split("=", 1) for line in data.decode().split("\n")))

    def until(self, name: str, *, after: int = 0, proc: subprocess.Popen | None = None,
              timeout: float = 40.0) -> int:
        """Index of the first message from ``after`` on that sets ``name``, waiting for it."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            self.drain()
            for i in range(after, len(self.messages)):
                if name in self.messages[i]:
                    return i
            if proc is not None and proc.poll() is not None:
                break
        raise AssertionError(f"no {name} after message {after}; got {self.messages[after:]}")

    def count(self, name: str, after: int = 0) -> int:
        self.drain()
        return sum(name in m for m in self.messages[after:])

    def close(self) -> None:
        self.sock.close()


def test_datagrams_equal_those_of_systemd_notify():
    """The same assignments give the same bytes as systemd-notify(1) (systemd 252), on an
    abstract-namespace socket and on a socket file."""
    notify = shutil.which("systemd-notify")
    if notify is None:
        pytest.skip("systemd-notify is not installed (Debian package systemd; `make test` installs it)")
    folder = tempfile.mkdtemp(prefix="tw-", dir="/tmp")  # short: a socket path has at most 107 bytes
    try:
        for env_value, bind in ((f"@tracewatch-test-{uuid.uuid4().hex}", None),
                                (f"{folder}/notify", f"{folder}/notify")):
            manager = ManagerSocket(bind or b"\0" + env_value[1:].encode())
            ours = Notifier({"NOTIFY_SOCKET": env_value})
            try:
                for args, send in ((["--ready", "--status=baseline v0003, 2 file(s) followed"],
                                    lambda: ours.ready("baseline v0003, 2 file(s) followed")),
                                   (["STOPPING=1", "STATUS=stopping now"], lambda: ours.stopping("stopping now")),
                                   (["WATCHDOG=1"], lambda: ours.send("WATCHDOG=1"))):
                    subprocess.run([notify, "--no-block", *args], env=dict(os.environ, NOTIFY_SOCKET=env_value),
                                   check=True, timeout=10)
                    theirs = manager.sock.recv(65536)
                    assert send()
                    assert manager.sock.recv(65536) == theirs, args
            finally:
                ours.close()
                manager.close()
    finally:
        shutil.rmtree(folder)


def test_reloading_carries_the_monotonic_clock():
    name = f"tracewatch-test-{uuid.uuid4().hex}"
    manager = ManagerSocket(b"\0" + name.encode())
    notifier = Notifier({"NOTIFY_SOCKET": "@" + name})
    try:
        before = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
        assert notifier.reloading("reading the new config")
        after = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
        manager.drain()
        (msg,) = manager.messages
        assert msg["RELOADING"] == "1" and msg["STATUS"] == "reading the new config"
        assert before <= int(msg["MONOTONIC_USEC"]) <= after  # CLOCK_MONOTONIC in µs (sd_notify(3))
    finally:
        notifier.close()
        manager.close()


def test_without_notify_socket_nothing_is_sent():
    notifier = Notifier({"WATCHDOG_USEC": "1000000"})
    assert not notifier.enabled
    assert notifier.watchdog_interval_s is None
    assert not notifier.ready("x") and not notifier.watchdog() and not notifier.stopping()


def test_an_address_that_is_not_a_unix_socket_is_refused_in_one_line(caplog):
    with caplog.at_level(logging.WARNING, logger="tracewatch"):
        notifier = Notifier({"NOTIFY_SOCKET": "vsock:2:9999"})
    assert not notifier.enabled and not notifier.ready()
    assert [r.getMessage() for r in caplog.records] == [
        "NOTIFY_SOCKET='vsock:2:9999' is neither a path nor an abstract socket name; the service "
        "manager is not notified"]


def test_a_manager_gone_away_is_logged_once_and_nothing_raises(caplog, tmp_path):
    folder = tempfile.mkdtemp(prefix="tw-", dir="/tmp")
    path = f"{folder}/notify"
    manager = ManagerSocket(path)
    notifier = Notifier({"NOTIFY_SOCKET": path})
    try:
        assert notifier.ready()
        manager.close()
        os.unlink(path)
        with caplog.at_level(logging.WARNING, logger="tracewatch"):
            assert not notifier.status("one")
            assert not notifier.status("two")
        assert len(caplog.records) == 1 and "cannot notify the service manager" in caplog.records[0].getMessage()
    finally:
        notifier.close()
        shutil.rmtree(folder)


@pytest.mark.parametrize("pid, expected", [("", 2.0), ("own", 2.0), ("1", None), ("x", None)],
                         ids=["no-pid", "our-pid", "another-pid", "not-a-number"])
def test_watchdog_interval_is_for_this_process_only(pid, expected):
    env = {"NOTIFY_SOCKET": "@unused", "WATCHDOG_USEC": "2000000"}
    if pid:
        env["WATCHDOG_PID"] = str(os.getpid()) if pid == "own" else pid
    assert Notifier(env).watchdog_interval_s == expected


def test_watchdog_pings_at_half_the_interval():
    name = f"tracewatch-test-{uuid.uuid4().hex}"
    manager = ManagerSocket(b"\0" + name.encode())
    clock = [100.0]
    notifier = Notifier({"NOTIFY_SOCKET": "@" + name, "WATCHDOG_USEC": "1000000"}, clock=lambda: clock[0])
    try:
        sent = []
        for t in (100.0, 100.2, 100.49, 100.5, 100.9, 101.0, 101.2):
            clock[0] = t
            if notifier.watchdog():
                sent.append(t)
        assert sent == [100.0, 100.5, 101.0]  # every 0.5 s of a 1 s WatchdogSec
        assert manager.count("WATCHDOG") == 3
        clock[0] = 101.3
        notifier.ready()  # READY restarts the manager's watchdog timer: the next ping is due 0.5 s later
        clock[0] = 101.7
        assert not notifier.watchdog()
    finally:
        notifier.close()
        manager.close()


def test_a_newline_cannot_start_another_assignment():
    name = f"tracewatch-test-{uuid.uuid4().hex}"
    manager = ManagerSocket(b"\0" + name.encode())
    notifier = Notifier({"NOTIFY_SOCKET": "@" + name})
    try:
        notifier.status("refused: line one\nREADY=1")
        manager.drain()
        assert manager.messages == [{"STATUS": "refused: line one READY=1"}]
    finally:
        notifier.close()
        manager.close()


# -- the real daemon under a pretend service manager ----------------------------------------------
@pytest.fixture
def managed(tmp_path, demo_state, monkeypatch):
    """``start(notify_socket, watchdog_usec)`` → (the daemon as a subprocess on a copy of the demo
    baseline, following <tmp>/logs/*.log, its config path), with $NOTIFY_SOCKET and $WATCHDOG_USEC
    set as systemd sets them."""
    for name in ("NOTIFY_SOCKET", "WATCHDOG_USEC", "WATCHDOG_PID"):
        monkeypatch.delenv(name, raising=False)

    def start(notify_socket: str, watchdog_usec: int) -> tuple[DaemonProcess, Path]:
        cfg_path = write_config(tmp_path, free_port(), idle=1.0)  # state_dir: demo_state; logs/*.log
        monkeypatch.setenv("NOTIFY_SOCKET", notify_socket)
        monkeypatch.setenv("WATCHDOG_USEC", str(watchdog_usec))
        return DaemonProcess(cfg_path), cfg_path

    return start


def day_lines(demo_fit) -> list[str]:
    return demo_fit.day.read_text().splitlines()


def append(path: Path, lines: list[str]) -> None:
    with open(path, "a") as fh:
        fh.write("".join(line + "\n" for line in lines))


def test_ready_after_the_baseline_and_sources_then_watchdog_then_stopping(managed, tmp_path, demo_fit):
    lines = day_lines(demo_fit)
    name = f"tracewatch-test-{uuid.uuid4().hex}"
    manager = ManagerSocket(b"\0" + name.encode())
    try:
        (tmp_path / "logs").mkdir()
        append(tmp_path / "logs" / "api.log", lines)  # there before the start: READY must see it attached
        daemon, _ = managed("@" + name, watchdog_usec=1_000_000)
        ready = manager.until("READY", proc=daemon.proc)
        # READY comes only once the daemon can answer for itself: baseline loaded, source attached
        assert daemon.get("/readyz")[0] == 200
        status = daemon.status()
        assert status["baseline_version"] == demo_fit.baseline.version
        assert [(s["name"], s["attached"], len(s["files"])) for s in status["sources"]] == [("api", True, 1)]
        assert manager.messages[ready]["STATUS"].startswith(f"baseline {demo_fit.baseline.version}, 1 file(s) followed")
        assert not any("WATCHDOG" in m for m in manager.messages[:ready])  # the timer starts at READY
        # pings keep coming, every half WatchdogSec: 2 s hold about 4, not one per loop turn (~10+)
        time.sleep(2.0)
        pings = manager.count("WATCHDOG", after=ready)
        assert 2 <= pings <= 6, pings
        daemon.until(lambda: daemon.status()["sources"][0]["records"] == len(lines), "every line read")
        assert daemon.terminate() == 0  # SIGTERM
        stopping = manager.until("STOPPING", after=ready)
        assert "READY" not in json.dumps(manager.messages[stopping:])  # stopping is the last word
        assert "stopped" in daemon.stderr()
    finally:
        manager.close()


def test_sighup_reloads_a_good_config_and_refuses_a_bad_one(managed, tmp_path, demo_fit):
    logs, logs2 = tmp_path / "logs", tmp_path / "logs2"
    logs2.mkdir()
    lines = day_lines(demo_fit)
    third = len(lines) // 3
    folder = tempfile.mkdtemp(prefix="tw-", dir="/tmp")  # a socket file this time (short path)
    manager = ManagerSocket(f"{folder}/notify")
    blocker = socket.socket()  # holds a port so that one new config cannot start
    try:
        daemon, cfg_path = managed(f"{folder}/notify", watchdog_usec=1_000_000)
        at = manager.until("READY", proc=daemon.proc)
        pid = daemon.proc.pid
        append(logs / "api.log", lines[:third])
        daemon.until(lambda: daemon.status()["sources"][0]["records"] == third, "the first lines")
        good = cfg_path.read_text()

        # 1. a config that fails validation: one log line, the running config kept
        cfg_path.write_text(good.replace("[sessions]", "[sessions]\nidle_timeout = 5"))
        usec = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
        daemon.proc.send_signal(signal.SIGHUP)
        at = manager.until("RELOADING", after=at + 1, proc=daemon.proc)
        assert int(manager.messages[at]["MONOTONIC_USEC"]) >= usec
        at = manager.until("READY", after=at + 1, proc=daemon.proc)
        assert manager.messages[at]["STATUS"].startswith("config reload refused: ")
        refused = [x for x in daemon.stderr().splitlines() if "reload" in x and "refused" in x]
        assert len(refused) == 1 and "sessions.idle_timeout: unknown key" in refused[0], refused
        assert "still running with the previous config" in refused[0]
        append(logs / "api.log", lines[third:2 * third])  # it goes on reading
        daemon.until(lambda: daemon.status()["sources"][0]["records"] == 2 * third, "lines after the refusal")
        assert daemon.status()["sources"][0]["paths"] == [f"{logs}/*.log"]

        # 2. a good config: applied in the same process, nothing read twice or lost
        cfg_path.write_text(good.replace(json.dumps([f"{logs}/*.log"]), json.dumps([f"{logs}/*.log", f"{logs2}/*.log"])))
        daemon.proc.send_signal(signal.SIGHUP)
        at = manager.until("RELOADING", after=at + 1, proc=daemon.proc)
        at = manager.until("READY", after=at + 1, proc=daemon.proc)
        assert daemon.proc.pid == pid and daemon.proc.poll() is None
        assert daemon.status()["sources"][0]["paths"] == [f"{logs}/*.log", f"{logs2}/*.log"]
        append(logs2 / "more.log", lines[2 * third:])
        daemon.until(lambda: daemon.status()["sources"][0]["records"] == len(lines), "every line, once")
        assert "reloaded: baseline " + demo_fit.baseline.version in daemon.stderr()

        # 3. a config that validates but cannot start (its port is taken): the previous one again
        blocker.bind(("127.0.0.1", 0))
        blocker.listen()
        taken = blocker.getsockname()[1]
        cfg_path.write_text(cfg_path.read_text().replace(f"127.0.0.1:{daemon.port}", f"127.0.0.1:{taken}"))
        daemon.proc.send_signal(signal.SIGHUP)
        at = manager.until("RELOADING", after=at + 1, proc=daemon.proc)
        at = manager.until("READY", after=at + 1, proc=daemon.proc)
        failed = [x for x in daemon.stderr().splitlines() if "reload failed" in x]
        assert len(failed) == 1 and "starting again with the previous config" in failed[0], failed
        assert daemon.get("/readyz")[0] == 200
        assert daemon.status()["sources"][0]["paths"] == [f"{logs}/*.log", f"{logs2}/*.log"]
        assert daemon.status()["sources"][0]["records"] == len(lines)

        # the watchdog goes on after the reloads; SIGTERM ends it all with STOPPING and exit 0
        manager.until("WATCHDOG", after=at + 1, proc=daemon.proc)
        assert daemon.terminate() == 0  # SIGTERM
        manager.until("STOPPING", after=at + 1)
        alerts = [json.loads(x) for x in (tmp_path / "state" / "alerts.jsonl").read_text().splitlines()]
        assert alerts and len({a["alert_id"] for a in alerts}) == len(alerts)  # no session scored twice
    finally:
        blocker.close()
        manager.close()
        shutil.rmtree(folder)


def test_a_reload_during_a_refit_waits_for_it(tmp_path, demo_state):
    """The reload is taken up at once (RELOADING=1) but the daemon stops only once the refit in
    progress has ended: closing would wait for the refit, and the watchdog with it. The refit is
    stood for by a thread that runs until the test lets it end; the Service and Daemon are real."""
    cfg_path = write_config(tmp_path, free_port())
    name = f"tracewatch-test-{uuid.uuid4().hex}"
    manager = ManagerSocket(b"\0" + name.encode())
    service = Service(load_config(cfg_path), Daemon, config_path=cfg_path, notifier=Notifier({"NOTIFY_SOCKET": "@" + name}))
    service.daemon = daemon = service._start(service.cfg)
    release = threading.Event()
    daemon.refit.thread = threading.Thread(target=release.wait, name="stands-for-a-refit")
    daemon.refit.thread.start()
    try:
        service._on_hup(signal.SIGHUP, None)
        service._on_turn()
        service._on_turn()
        assert not daemon.stopping.is_set()
        manager.drain()
        assert [list(m) for m in manager.messages] == [["RELOADING", "MONOTONIC_USEC", "STATUS"], ["STATUS"]]
        assert manager.messages[1]["STATUS"] == "reload waiting for the baseline refit in progress"
        release.set()
        daemon.refit.thread.join()
        service._on_turn()
        # the config did not change: the reload happens in place, in the daemon's next turn
        assert daemon._reload.is_set() and service._in_place and service._next_cfg is None
    finally:
        release.set()
        daemon.close(checkpoint=True)
        service.notifier.close()
        manager.close()
