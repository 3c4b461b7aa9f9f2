"""The daemon (``tracewatch run``): follows files live and drives the one pipeline.

Stage: wraps the whole pipeline (sources → formats → … → alerts) with file following, a
clock, checkpoints and HTTP; it adds no stage of its own. Alerts are appended to
``<state_dir>/alerts.jsonl`` (the objects ``tracewatch score`` prints), exactly once.

This module is the main loop and the wiring. One thread runs the loop: wait for a filesystem
notification or the tick → read new lines (:class:`~tracewatch.sources.follow.Follower`) →
close idle sessions (``pipeline.tick`` with :class:`~tracewatch.sessions.LiveTime`) → switch
to a new current baseline if there is one (:mod:`.baseline_watch`) → start a refit when one is
due (:mod:`.refit_job`) → checkpoint when due. HTTP answers from its own threads under the
same lock, from :mod:`.status`; incidents are :mod:`.incidents`; the log is :mod:`.logs`.

Its life, in one place each: :meth:`Daemon.start` ends in "ready"; :meth:`Daemon.request_reload`
(safe from a signal handler) makes the loop re-read what can change without a restart
("reloading", then "ready" again); :meth:`Daemon.stop` makes the loop finish ("stopping").
Each is announced through ``on_state`` (a service manager's notification goes there).

Shutdown (SIGTERM / SIGINT): stop reading, score the sessions already closed, fsync the
journal, write the checkpoint — open sessions included, so they go on after a restart — and
exit 0. After ``kill -9`` the next start resumes from the last checkpoint (see
:mod:`tracewatch.sources.checkpoint`). Signals, SIGHUP reloads and systemd's notifications are
:mod:`tracewatch.service.systemd`'s; the loop calls its ``on_turn`` hook once per turn.
"""

from __future__ import annotations

import fcntl
import logging
import os
import threading
import time
from collections.abc import Callable
from pathlib import Path

from prometheus_client import CollectorRegistry

from .. import __version__
from ..baselines import baselines_dir, load_baseline, load_baseline_dir
from ..model.baseline import drift_warning
from ..config import Config
from ..errors import BaselineError, InputError, StateError
from ..pipeline import Pipeline, Problem, problem_line
from ..sessions import LiveTime
from ..sources.checkpoint import AlertJournal, capture_chunks, load_checkpoint, restore, save_checkpoint
from ..sources.follow import Follower, Watcher, watch_dirs
from ..sources.streams import StreamSource, is_file_source, stream_sources
from .baseline_watch import BaselineWatch
from .http import serve
from .incidents import Incidents
from .logs import setup_logging
from .metrics import DaemonMetrics
from .otlp_http import Receiver, serve_otlp
from .refit_job import RefitJob
from .status import DaemonStatus, iso
from .systemd import Service

log = logging.getLogger("tracewatch.daemon")

TICK_S = 0.2  # how often idle sessions are looked for
RELOAD_CHECK_S = 1.0  # how often the current baseline and the watched folders are re-checked
UNTIMED_WARN_S = 600.0  # a source's untimed records are logged at most this often (one line)
READ_CHUNK = 256 << 10  # bytes per file per loop turn: keeps HTTP answers prompt
STATES = ("ready", "reloading", "stopping")  # what on_state is told


class Daemon:
    """``start()`` (may raise a TracewatchError with a clear message), then ``run()`` until
    ``stop()``; ``wall`` and ``monotonic`` are the replaceable clocks; ``on_state`` is told each
    of :data:`STATES` as it happens."""

    def __init__(self, cfg: Config, *, registry: CollectorRegistry | None = None,
                 wall: Callable[[], float] = time.time, monotonic: Callable[[], float] = time.monotonic,
                 on_state: Callable[[str], None] | None = None) -> None:
        self.cfg = cfg
        self.registry = registry if registry is not None else CollectorRegistry()
        self.monotonic = monotonic
        self.wall = wall
        self.on_state = on_state or (lambda state: None)
        self.lock = threading.Lock()
        self.wake = threading.Event()
        self.stopping = threading.Event()
        self._reload = threading.Event()
        self.state_dir = Path(cfg.state_dir)
        self.checkpoint_path = self.state_dir / "checkpoint.json"
        self.journal = AlertJournal(self.state_dir / "alerts.jsonl", cfg.daemon.alerts_kept)
        self.pipe: Pipeline | None = None
        self.live = LiveTime(lambda: self.pipe.watermark if self.pipe is not None else 0.0, wall)
        self.follower = Follower([s for s in cfg.sources if is_file_source(cfg, s.name)], _Unready(),
                                 rotation_grace_s=cfg.daemon.rotation_grace_s,
                                 rescan_interval_s=cfg.daemon.poll_interval_s, clock=monotonic,
                                 chunk_bytes=READ_CHUNK)
        # sources that are not file globs: the journal, the OTLP receiver's spools (sources/streams.py)
        self.streams: list[StreamSource] = stream_sources(cfg, self.state_dir)
        self.otlp = self.otlp_thread = None
        self.incidents = Incidents(cfg, clock=wall)  # grouping, page, notifications (tracewatch/service/incidents.py)
        self.watch = BaselineWatch(self.state_dir)
        self.refit = RefitJob(cfg, self.state_dir, lock=self.lock, store=lambda: self.incidents.store, wall=wall)
        self.report = DaemonStatus(self)
        self.metrics = DaemonMetrics(self.registry, self.report.snapshot, [s.name for s in cfg.sources])
        self.watcher: Watcher | None = None
        self.server = self.http_thread = None
        self.started = False
        self.checkpoint_time = 0.0
        self.checkpoint_seconds = 0.0
        self.ticks = 0  # idle-session checks done (tests wait on it, not on the clock)
        self._untimed_warned: dict[str, tuple[float, int]] = {}  # source -> (monotonic time, count) of its last warning
        self._lock_fd = -1
        # called once per loop turn, outside the lock: the service manager's watchdog and reload
        # requests (tracewatch/service/systemd.py)
        self.on_turn: Callable[[], None] = lambda: None

    # -- start -----------------------------------------------------------------------------
    def start(self) -> None:
        try:
            self._start()
        except BaseException:
            self.close(checkpoint=False)
            raise
        self._announce("ready")

    def _start(self) -> None:
        cfg = self.cfg
        if not cfg.sources:
            raise InputError("config: no [[sources]] to follow")
        self._take_lock()
        self.incidents.start()  # incidents: opens <state_dir>/incidents.db, starts the notifier
        self.server, self.http_thread = serve(cfg.server.listen, self, self.registry)
        current = load_baseline(self.state_dir)
        self.watch.loaded(current.version)
        self.follower.check_paths()
        ckpt = load_checkpoint(self.checkpoint_path)
        base = current
        if ckpt is not None and ckpt.baseline_version != current.version:
            try:
                base = load_baseline_dir(baselines_dir(self.state_dir) / ckpt.baseline_version)
            except BaselineError as exc:
                raise StateError(f"{self.checkpoint_path} was written with baseline {ckpt.baseline_version}, "
                                 f"which cannot be loaded ({exc}); move the checkpoint away to start afresh"
                                 ) from exc
        self.pipe = Pipeline(cfg, base, on_verdict=self._on_verdict, score_all=True, clock=self.live)
        if ckpt is not None:
            restore(self.pipe, ckpt)
            log.info("resumed from the checkpoint of %s: %d open sessions, %d files",
                     iso(ckpt.written), len(ckpt.pipeline.sessions.open), len(ckpt.files))
        if base is not current:
            self.pipe.use_baseline(current)
            log.info("switched from baseline %s (of the checkpoint) to the current %s",
                     base.version, current.version)
        self._check_settings(current)
        if cfg.refit.enabled:
            self.refit.attach(self.pipe)
        self.journal.open(ckpt.alerts if ckpt is not None else None)
        self.follower.sink = self.pipe
        self.follower.attach([f.model_dump() for f in ckpt.files] if ckpt is not None else None)
        saved = {p.source: p.position for p in ckpt.streams} if ckpt is not None else {}
        for stream in self.streams:
            stream.attach(saved.get(stream.source), self.pipe)
        if cfg.otlp.enabled:  # the OTLP/HTTP receiver (tracewatch/service/otlp_http.py)
            by_name = {s.source: s for s in self.streams}
            spools = {path: by_name[name] for path, name in (("/v1/traces", cfg.otlp.traces_source),
                                                              ("/v1/logs", cfg.otlp.logs_source)) if name}
            self.otlp, self.otlp_thread = serve_otlp(Receiver(
                cfg.otlp, spools, accepting=lambda: self.started and not self.stopping.is_set(), wake=self.wake.set))
        folders: dict[str, bool] = {}
        for src in cfg.sources:
            for pattern in src.paths:
                folder, recursive = watch_dirs(pattern)
                folders[folder] = folders.get(folder, False) or recursive
        self.watcher = Watcher(folders, self._hint, polling=cfg.daemon.watcher == "polling",
                               interval=cfg.daemon.poll_interval_s)
        self.watcher.start()
        with self.lock:
            self._checkpoint()  # a crash before the next one must not start_at = "end" again
        self.started = True
        log.info("tracewatch %s running: baseline %s, %d file(s) followed, http://%s/ (metrics, "
                 "healthz, readyz, api/status, api/alerts)", __version__, current.version,
                 len(self.follower.tails), cfg.server.listen)

    def _take_lock(self) -> None:
        self.state_dir.mkdir(parents=True, exist_ok=True)
        path = self.state_dir / "daemon.lock"
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o600)
        except OSError as exc:
            raise StateError(f"{path}: cannot open: {exc.strerror or exc}") from exc
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            os.close(fd)
            raise StateError(f"another tracewatch daemon is running with state_dir {self.state_dir}; "
                             "stop it first, or give this one its own state_dir") from exc
        os.ftruncate(fd, 0)
        os.write(fd, f"{os.getpid()}\n".encode())
        self._lock_fd = fd

    # -- life: the one place each state is announced ------------------------------------------
    def _announce(self, state: str) -> None:
        log.debug("daemon %s", state)
        try:
            self.on_state(state)
        except Exception:  # a notification that fails must not stop the daemon
            log.exception("telling the daemon's state (%s) failed", state)

    def stop(self) -> None:
        """Ask the loop to finish (safe from signal handlers and other threads)."""
        self.stopping.set()
        self.wake.set()

    def request_reload(self) -> None:
        """Ask the loop to re-read what can change without a restart (safe from signal handlers
        and other threads); the loop does it between two turns, in :meth:`_reload_now`."""
        self._reload.set()
        self.wake.set()

    def _reload_now(self) -> None:
        """Re-read now: the current baseline (even when its files look unchanged) and the
        watched folders. Everything a reload re-reads belongs here."""
        self._check_baseline(force=True)
        self.watcher.refresh()

    # -- the loop ----------------------------------------------------------------------------
    def _hint(self, rescan: bool) -> None:
        if rescan:
            self.follower.rescan_wanted = True
        self.wake.set()

    def run(self) -> int:
        """Follow until :meth:`stop`; then checkpoint and return 0 (1 after an internal error)."""
        mono = self.monotonic
        interval = self.cfg.daemon.checkpoint_interval_s
        next_tick = next_check = 0.0
        next_checkpoint = mono() + interval
        try:
            while not self.stopping.is_set():
                self.on_turn()
                with self.lock:
                    behind = self.follower.poll()
                    for stream in self.streams:
                        behind |= stream.poll()
                    if behind:
                        self.live.hold()
                    now = mono()
                    if now >= next_tick:
                        self.pipe.tick(self.live())
                        self.incidents.tick(self.live())  # incidents: resolve quiet ones
                        self.ticks += 1
                        next_tick = now + TICK_S
                    if now >= next_checkpoint:
                        self._checkpoint()
                        next_checkpoint = now + interval
                if self._reload.is_set():
                    self._reload.clear()
                    self._announce("reloading")
                    self._reload_now()
                    self._announce("ready")
                if now >= next_check:
                    self.watcher.refresh()
                    self._check_baseline()
                    self.refit.maybe_start()
                    next_check = now + RELOAD_CHECK_S
                if behind:
                    time.sleep(0.0005)  # let HTTP threads in between chunks
                else:
                    self.wake.wait(TICK_S)
                    self.wake.clear()
        except Exception:
            log.exception("internal error; stopping without a checkpoint (the next start resumes "
                          "from the previous one)")
            self._announce("stopping")
            self.close(checkpoint=False)
            return 1
        self._announce("stopping")
        log.info("stopping: scoring closed sessions and writing the checkpoint")
        self.close(checkpoint=True)
        log.info("stopped")
        return 0

    def _on_verdict(self, verdict: dict) -> None:
        self.metrics.observe_score(verdict["source"], verdict["score"])
        if verdict["alert"]:
            self.journal.append(verdict)
        # every session is counted (incidents' rate and reach); an alert is grouped, and one
        # raised again after a restart is recognised
        iid = self.incidents.add(verdict)
        if verdict["alert"]:
            self.refit.offer_alert(verdict, iid)  # refit: on-call may have said this pattern is normal

    def _warn_untimed(self) -> None:
        """One warning line per source whose keyed records came without a usable time since its
        last warning, at most every ``UNTIMED_WARN_S`` (the line ``score`` prints at its end)."""
        now = self.monotonic()
        for problem in self.pipe.input_problems():
            when, before = self._untimed_warned.get(problem.source, (None, 0))
            if (problem.kind is Problem.UNTIMED and problem.count > before
                    and (when is None or now - when >= UNTIMED_WARN_S)):
                log.warning("%s", problem_line(self.pipe, problem))
                self._untimed_warned[problem.source] = (now, problem.count)

    def _checkpoint(self) -> None:
        """Score what is closed, make the journal durable, then save everything (lock held)."""
        self.pipe.tick(self.live())
        self._warn_untimed()
        t0 = time.perf_counter()
        mark = self.journal.sync()
        streams = [{"source": s.source, "position": p} for s in self.streams if (p := s.position()) is not None]
        save_checkpoint(self.checkpoint_path,
                        capture_chunks(self.pipe, self.follower.positions(self.pipe.held_from), mark, streams))
        for stream in self.streams:
            stream.saved()
        self.refit.save()
        self.checkpoint_time = self.wall()
        self.checkpoint_seconds = time.perf_counter() - t0

    def _check_baseline(self, *, force: bool = False) -> None:
        """Switch to a new current baseline (hot reload), keeping the open sessions."""
        baseline = self.watch.check(self.pipe.baseline.version, force=force)
        if baseline is None:
            return
        with self.lock:
            old = self.pipe.baseline.version
            self.pipe.use_baseline(baseline)
            self.refit.baseline_changed(baseline.version)
        log.info("switched baseline %s → %s; %d open sessions carried over", old, baseline.version,
                 len(self.pipe.sessionizer.open))
        self._check_settings(baseline)

    def _check_settings(self, baseline) -> None:
        """One warning line when the config's model settings differ from the baseline's."""
        drift = drift_warning(baseline, self.cfg)
        if drift:
            log.warning("%s", drift)

    # -- what HTTP and metrics read (tracewatch/service/status.py) ---------------------------------
    def ready(self) -> tuple[bool, str]:
        return self.report.ready()

    def snapshot(self) -> dict:
        return self.report.snapshot()

    def status(self) -> dict:
        return self.report.status()

    def detached(self) -> dict[str, str]:
        """Sources not reading now, and why (files, the journal, the OTLP spools); lock held."""
        return {**self.follower.detached, **{s.source: s.detached for s in self.streams if s.detached}}

    def inputs(self) -> list[dict]:
        """One row per followed file and per source that is not a file glob; lock held."""
        return self.follower.status() + [s.status() for s in self.streams]

    def alerts_since(self, since: int, limit: int) -> dict:
        with self.lock:
            return self.journal.since(since, limit)

    # -- the end -------------------------------------------------------------------------------
    def close(self, *, checkpoint: bool) -> None:
        self.refit.join()  # a fit in progress finishes (and saves its candidate)
        if checkpoint and self.started:
            with self.lock:
                self._checkpoint()
        if self.otlp is not None:
            self.otlp.shutdown()
            self.otlp.server_close()
            self.otlp_thread.join(timeout=5)
            self.otlp = None
        if self.watcher is not None:
            self.watcher.stop()
        if self.server is not None:
            self.server.shutdown()
            self.server.server_close()
            self.http_thread.join(timeout=5)
            self.server = None
        self.follower.close()
        for stream in self.streams:
            stream.close()
        self.journal.close()
        self.incidents.close()  # incidents: stop the notifier, close the store
        if self._lock_fd >= 0:
            os.close(self._lock_fd)
            self._lock_fd = -1


class _Unready:
    """The follower's sink until the pipeline exists (nothing is read before that)."""

    def feed_block(self, *args) -> None:
        raise RuntimeError("the follower read before the pipeline was ready")

    end_stream = feed_block


def run_daemon(cfg: Config, *, config_path: str | Path | None = None, log_level: str = "info",
               log_format: str = "plain") -> int:
    """``tracewatch run``: start (clear errors on failure), follow until SIGTERM, reload on SIGHUP
    (re-reading ``config_path``), tell systemd each step (:mod:`tracewatch.service.systemd`)."""
    setup_logging(log_level, log_format)
    return Service(cfg, Daemon, config_path=config_path).run()
