"""Life under a service manager: the sd_notify protocol, and the signals that stop and reload
the daemon.

Stage: none of its own. It wraps :class:`~tracewatch.service.daemon.Daemon` (the whole
pipeline, followed live) for systemd's ``Type=notify`` — and for any supervisor that sends
signals — and hands the daemon's state changes on to the service manager:

- :class:`Notifier` speaks the notify protocol of sd_notify(3): one datagram of ``NAME=value``
  lines sent to the AF_UNIX socket named by ``$NOTIFY_SOCKET`` (a file path, or a name in the
  abstract namespace when it starts with ``@``). Without ``$NOTIFY_SOCKET`` it does nothing.
- :class:`Service` sends ``READY=1`` once the baseline is loaded, the sources attached and HTTP
  served; ``WATCHDOG=1`` from the daemon's own loop every half ``$WATCHDOG_USEC`` (so a loop
  that hangs stops the pings and systemd restarts the service); ``STOPPING=1`` on SIGTERM or
  SIGINT; ``RELOADING=1`` (with ``MONOTONIC_USEC``, which ``Type=notify-reload`` needs) and
  then ``READY=1`` around a reload on SIGHUP.

A reload re-reads and validates the config file. A bad one is refused with one log line and
the daemon goes on as it was. An unchanged one reloads in place: the current baseline is read
afresh and the watched folders rescanned (:meth:`Daemon.request_reload`). A changed one replaces
the daemon in the same process: checkpoint,
close, start again with the new config — which loads the current baseline afresh and resumes
from the checkpoint just written, so no line is lost and no session is scored twice. A new
config that validates but cannot start (its port is taken, its state_dir holds no baseline)
is logged in one line and the previous config started again. A reload asked for while a
baseline refit is running waits for the refit to finish (the loop, and the watchdog pings, go
on meanwhile).
"""

from __future__ import annotations

import logging
import math
import os
import signal
import socket
import time
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import TYPE_CHECKING

from ..config import Config, load_config
from ..errors import StateError, TracewatchError

if TYPE_CHECKING:
    from .daemon import Daemon

log = logging.getLogger("tracewatch.daemon")


class Notifier:
    """Messages to the service manager over ``$NOTIFY_SOCKET`` (sd_notify(3)).

    ``environ`` defaults to the process environment; ``clock`` (monotonic seconds) paces the
    watchdog pings. Every method returns whether a message went out; none raises: a service
    manager that went away is logged once, and tracewatch goes on."""

    def __init__(self, environ: Mapping[str, str] | None = None, *,
                 clock: Callable[[], float] = time.monotonic) -> None:
        env = os.environ if environ is None else environ
        self.clock = clock
        self.address = _socket_address(env.get("NOTIFY_SOCKET", ""))
        self.watchdog_interval_s = _watchdog_interval(env) if self.address is not None else None
        self._sock: socket.socket | None = None
        self._last_ping = -math.inf
        self._warned = False

    @property
    def enabled(self) -> bool:
        return self.address is not None

    def send(self, *assignments: str) -> bool:
        """One datagram of ``NAME=value`` lines (a newline inside a value would start a new one,
        so newlines are replaced by spaces)."""
        if self.address is None:
            return False
        data = "\n".join(a.replace("\n", " ") for a in assignments).encode()
        try:
            if self._sock is None:
                self._sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC)
            self._sock.sendto(data, self.address)
        except OSError as exc:
            if not self._warned:
                self._warned = True
                log.warning("cannot notify the service manager at %s: %s (tracewatch goes on; "
                            "this is said once)", _shown(self.address), exc.strerror or exc)
            return False
        return True

    def ready(self, status: str = "") -> bool:
        self._last_ping = self.clock()  # READY starts systemd's watchdog timer afresh
        return self.send("READY=1", *([f"STATUS={status}"] if status else []))

    def reloading(self, status: str = "reloading the config and the baseline") -> bool:
        usec = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
        return self.send("RELOADING=1", f"MONOTONIC_USEC={usec}", f"STATUS={status}")

    def stopping(self, status: str = "stopping: scoring closed sessions, writing the checkpoint") -> bool:
        return self.send("STOPPING=1", f"STATUS={status}")

    def status(self, text: str) -> bool:
        return self.send(f"STATUS={text}")

    def watchdog(self) -> bool:
        """``WATCHDOG=1`` when half the watchdog interval has passed since the last one; call it
        as often as you like (sd_watchdog_enabled(3): ping at half the interval)."""
        if self.watchdog_interval_s is None:
            return False
        now = self.clock()
        if now - self._last_ping < self.watchdog_interval_s / 2:
            return False
        self._last_ping = now
        return self.send("WATCHDOG=1")

    def close(self) -> None:
        if self._sock is not None:
            self._sock.close()
            self._sock = None


def _socket_address(value: str) -> str | bytes | None:
    """``$NOTIFY_SOCKET`` as a socket address: an absolute path, or ``@name`` for the abstract
    namespace (a leading NUL byte, unix(7)); anything else is not for us."""
    if value.startswith("/"):
        return value
    if value.startswith("@") and len(value) > 1:
        return b"\0" + value[1:].encode()
    if value:
        log.warning("NOTIFY_SOCKET=%r is neither a path nor an abstract socket name; the service "
                    "manager is not notified", value)
    return None


def _watchdog_interval(env: Mapping[str, str]) -> float | None:
    """Seconds from ``$WATCHDOG_USEC``, when it is meant for this process (``$WATCHDOG_PID``
    unset or our pid, as sd_watchdog_enabled(3) checks)."""
    usec, pid = env.get("WATCHDOG_USEC", ""), env.get("WATCHDOG_PID", "")
    if not usec.isdigit() or int(usec) == 0:
        return None
    if pid and (not pid.isdigit() or int(pid) != os.getpid()):
        return None
    return int(usec) / 1e6


def _shown(address: str | bytes) -> str:
    return "@" + address[1:].decode(errors="replace") if isinstance(address, bytes) else address


class Service:
    """``tracewatch run``: the daemon from start to exit, with signals, reloads and notifications.

    ``make_daemon(cfg)`` builds a :class:`~tracewatch.service.daemon.Daemon`; ``config_path`` is
    the file a SIGHUP re-reads (without one, a reload only restarts with the same config, which
    still loads the current baseline afresh)."""

    def __init__(self, cfg: Config, make_daemon: Callable[[Config], Daemon], *,
                 config_path: str | Path | None = None, notifier: Notifier | None = None) -> None:
        self.cfg = cfg
        self.make_daemon = make_daemon
        self.config_path = Path(config_path) if config_path is not None else None
        self.notifier = notifier if notifier is not None else Notifier()
        self.daemon: Daemon | None = None
        self.terminating = False
        self._hup = False  # a SIGHUP not yet taken up by the loop
        self._reload_pending = False  # RELOADING=1 sent, the reload not yet done
        self._waiting_for_refit = False
        self._next_cfg: Config | None = None
        self._in_place = False  # an in-place reload (same config) whose READY=1 is still due

    def run(self) -> int:
        """Start (a TracewatchError with a clear message on failure), follow until SIGTERM or
        SIGINT, reload on SIGHUP; return the daemon's exit code (0 after a clean stop)."""
        signal.signal(signal.SIGTERM, self._on_stop)
        signal.signal(signal.SIGINT, self._on_stop)
        signal.signal(signal.SIGHUP, self._on_hup)
        try:
            self.daemon = self._start(self.cfg)
            while True:
                if self.terminating:
                    self.daemon.stop()
                else:
                    self.notifier.ready(self._status_line())
                code = self.daemon.run()
                if code != 0 or self.terminating or self._next_cfg is None:
                    return code
                cfg, self._next_cfg = self._next_cfg, None
                self.daemon = self._restart(cfg)
        finally:
            self.notifier.close()

    # -- signals (run on the main thread, between two steps of the loop) ---------------------------
    def _on_stop(self, signum: int, _frame) -> None:
        log.info("received %s", signal.Signals(signum).name)
        if not self.terminating:
            self.terminating = True
            self.notifier.stopping()
        if self.daemon is not None:
            self.daemon.stop()

    def _on_hup(self, _signum: int, _frame) -> None:
        log.info("received SIGHUP: reloading the config and the baseline")
        self._hup = True
        if self.daemon is not None:
            self.daemon.wake.set()  # the loop takes the request up at once

    # -- the daemon's loop calls this once per turn (Daemon.on_turn) ---------------------------------
    def _on_turn(self) -> None:
        self.notifier.watchdog()
        if self._hup:
            self._hup = False
            if not self._reload_pending:
                self._reload_pending = True
                self.notifier.reloading()
        if self._reload_pending:
            self._reload()

    def _on_state(self, state: str) -> None:
        """The daemon's own announcements: the end of an in-place reload is READY=1 again."""
        if state == "ready" and self._in_place:
            self._in_place = False
            log.info("reloaded: baseline %s (in place, config unchanged)", self.daemon.pipe.baseline.version)
            self.notifier.ready(self._status_line())

    def _reload(self) -> None:
        daemon = self.daemon
        refit = daemon.refit.thread
        if refit is not None and refit.is_alive():  # closing would wait for it, and the watchdog with it
            if not self._waiting_for_refit:
                self._waiting_for_refit = True
                log.info("the reload waits for the baseline refit in progress")
                self.notifier.status("reload waiting for the baseline refit in progress")
            return
        self._reload_pending = self._waiting_for_refit = False
        if self.config_path is None:
            cfg = self.cfg
        else:
            try:
                cfg = load_config(self.config_path)
            except TracewatchError as exc:
                log.error("config reload refused: %s; still running with the previous config", exc)
                self.notifier.ready(f"config reload refused: {exc}")
                return
        if cfg == self.cfg:  # nothing to restart for: re-read the baseline and the folders in place
            log.info("config unchanged: reloading the baseline and the watched folders in place")
            self._in_place = True
            daemon.request_reload()
            return
        log.info("config %s read and valid: restarting the daemon in this process to apply it",
                 self.config_path or "(as given)")
        self._next_cfg = cfg
        daemon.stop()

    # -- starting --------------------------------------------------------------------------------------
    def _start(self, cfg: Config) -> Daemon:
        daemon = self.make_daemon(cfg)
        daemon.on_turn = self._on_turn
        daemon.on_state = self._on_state
        try:
            daemon.start()
        except OSError as exc:  # a state_dir that cannot be written, for example
            raise StateError(f"cannot start: {exc.strerror or exc}"
                             + (f" ({exc.filename})" if exc.filename else "")) from exc
        return daemon

    def _restart(self, cfg: Config) -> Daemon:
        """The reloaded config, or the previous one again when the new one cannot start."""
        self.notifier.watchdog()  # the watchdog runs on through a reload, and a start takes a while
        try:
            daemon = self._start(cfg)
        except TracewatchError as exc:
            log.error("reload failed: %s; starting again with the previous config", exc)
            return self._start(self.cfg)  # when even that fails, the error ends the process
        self.cfg = cfg
        log.info("reloaded: baseline %s, config %s", daemon.pipe.baseline.version,
                 self.config_path or "(as given)")
        return daemon

    def _status_line(self) -> str:
        status = self.daemon.status()
        files = sum(len(s["files"]) for s in status["sources"])
        return (f"baseline {status['baseline_version']}, {files} file(s) followed, "
                f"http://{self.cfg.server.listen}/")
