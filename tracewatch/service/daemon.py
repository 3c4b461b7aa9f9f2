"""The daemon (``tracewatch run``): follows files live and drives the one pipeline.

Stage: wraps the whole pipeline (sources → formats → … → alerts) with file following, a
clock, checkpoints and HTTP; it adds no stage of its own. Alerts are appended to
``<state_dir>/alerts.jsonl`` (the objects ``tracewatch score`` prints), exactly once.

One thread runs the loop: wait for a filesystem notification or the tick → read new lines
(:class:`~tracewatch.sources.follow.Follower`) → close idle sessions
(``pipeline.tick`` with :class:`~tracewatch.sessions.LiveTime`) → switch to a new current
baseline if there is one → checkpoint when due. HTTP answers from its own threads under the
same lock. With ``[refit] enabled``, quiet sessions feed a pool and a candidate baseline is
fitted now and then on a thread of its own (:mod:`tracewatch.refit`); one that passes the gates
is made current, and the hot reload switches to it.

Shutdown (SIGTERM / SIGINT): stop reading, score the sessions already closed, fsync the
journal, write the checkpoint — open sessions included, so they go on after a restart — and
exit 0. After ``kill -9`` the next start resumes from the last checkpoint (see
:mod:`tracewatch.sources.checkpoint`).
"""

from __future__ import annotations

import fcntl
import logging
import os
import signal
import sqlite3
import sys
import threading
import time
from collections import Counter
from collections.abc import Callable
from datetime import datetime, timezone
from pathlib import Path

import orjson
from prometheus_client import CollectorRegistry

from .. import __version__
from ..alerts.incidents import Incidents
from ..baselines import baselines_dir, current_version, load_baseline, load_baseline_dir
from ..config import Config
from ..errors import BaselineError, InputError, StateError, TracewatchError
from ..model.baseline import Baseline
from ..pipeline import Pipeline
from ..refit import (OUTCOMES, POOL_FILE, QuietPool, RefitData, add_incidents, expected_incidents, refit,
                     refit_data, summary_line)
from ..sessions import LiveTime
from ..sources.checkpoint import AlertJournal, capture_chunks, load_checkpoint, restore, save_checkpoint
from ..sources.follow import Follower, Watcher, watch_dirs
from .http import serve
from .metrics import DaemonMetrics

log = logging.getLogger("tracewatch.daemon")

TICK_S = 0.2  # how often idle sessions are looked for
RELOAD_CHECK_S = 1.0  # how often the current baseline and the watched folders are re-checked
READ_CHUNK = 256 << 10  # bytes per file per loop turn: keeps HTTP answers prompt


class Daemon:
    """``start()`` (may raise a TracewatchError with a clear message), then ``run()`` until
    ``stop()``; ``wall`` and ``monotonic`` are the replaceable clocks."""

    def __init__(self, cfg: Config, *, registry: CollectorRegistry | None = None,
                 wall: Callable[[], float] = time.time, monotonic: Callable[[], float] = time.monotonic) -> None:
        self.cfg = cfg
        self.registry = registry if registry is not None else CollectorRegistry()
        self.monotonic = monotonic
        self.wall = wall
        self.lock = threading.Lock()
        self.wake = threading.Event()
        self.stopping = threading.Event()
        self.state_dir = Path(cfg.state_dir)
        self.checkpoint_path = self.state_dir / "checkpoint.json"
        self.journal = AlertJournal(self.state_dir / "alerts.jsonl", cfg.daemon.alerts_kept)
        self.pipe: Pipeline | None = None
        self.live = LiveTime(lambda: self.pipe.watermark if self.pipe is not None else 0.0, wall)
        self.follower = Follower(cfg.sources, _Unready(), rotation_grace_s=cfg.daemon.rotation_grace_s,
                                 rescan_interval_s=cfg.daemon.poll_interval_s, clock=monotonic,
                                 chunk_bytes=READ_CHUNK)
        self.metrics = DaemonMetrics(self.registry, self.snapshot)
        self.incidents = Incidents(cfg)  # grouping, page, notifications (tracewatch/alerts/incidents.py)
        self.watcher: Watcher | None = None
        self.server = self.http_thread = None
        self.started = False
        self.reload_failures = 0
        self.checkpoint_time = 0.0
        self.checkpoint_seconds = 0.0
        self._baseline_sig: tuple | None = None
        self._lock_fd = -1
        # -- refit (tracewatch/refit.py) --
        self.pool: QuietPool | None = None  # quiet sessions for the next refit ([refit] enabled)
        self.pool_path = self.state_dir / POOL_FILE
        self.refits: Counter = Counter()  # outcome -> refits
        self.refit_thread: threading.Thread | None = None
        self._expected: set[int] = set()  # incidents labelled expected: their sessions are pooled

    # -- start -----------------------------------------------------------------------------
    def start(self) -> None:
        try:
            self._start()
        except BaseException:
            self.close(checkpoint=False)
            raise

    def _start(self) -> None:
        cfg = self.cfg
        if not cfg.sources:
            raise InputError("config: no [[sources]] to follow")
        self._take_lock()
        self.incidents.start()  # incidents: opens <state_dir>/incidents.db, starts the notifier
        self.server, self.http_thread = serve(cfg.server.listen, self, self.registry)
        current = load_baseline(self.state_dir)
        self._baseline_sig = self._signature(current.version)
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
                     _iso(ckpt.written), len(ckpt.pipeline.sessions.open), len(ckpt.files))
        if base is not current:
            self.pipe.use_baseline(current)
            log.info("switched from baseline %s (of the checkpoint) to the current %s",
                     base.version, current.version)
        if cfg.refit.enabled:
            self._open_pool()
        self.journal.open(ckpt.alerts if ckpt is not None else None)
        self.follower.sink = self.pipe
        self.follower.attach([f.model_dump() for f in ckpt.files] if ckpt is not None else None)
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

    # -- the loop ----------------------------------------------------------------------------
    def _hint(self, rescan: bool) -> None:
        if rescan:
            self.follower.rescan_wanted = True
        self.wake.set()

    def stop(self) -> None:
        """Ask the loop to finish (safe from signal handlers and other threads)."""
        self.stopping.set()
        self.wake.set()

    def run(self) -> int:
        """Follow until :meth:`stop`; then checkpoint and return 0 (1 after an internal error)."""
        mono = self.monotonic
        interval = self.cfg.daemon.checkpoint_interval_s
        next_tick = next_check = 0.0
        next_checkpoint = mono() + interval
        try:
            while not self.stopping.is_set():
                with self.lock:
                    behind = self.follower.poll()
                    if behind:
                        self.live.hold()
                    now = mono()
                    if now >= next_tick:
                        self.pipe.tick(self.live())
                        self.incidents.tick(self.live())  # incidents: resolve quiet ones
                        next_tick = now + TICK_S
                    if now >= next_checkpoint:
                        self._checkpoint()
                        next_checkpoint = now + interval
                if now >= next_check:
                    self.watcher.refresh()
                    self._check_baseline()
                    self._maybe_refit()
                    next_check = now + RELOAD_CHECK_S
                if behind:
                    time.sleep(0.0005)  # let HTTP threads in between chunks
                else:
                    self.wake.wait(TICK_S)
                    self.wake.clear()
        except Exception:
            log.exception("internal error; stopping without a checkpoint (the next start resumes "
                          "from the previous one)")
            self.close(checkpoint=False)
            return 1
        log.info("stopping: scoring closed sessions and writing the checkpoint")
        self.close(checkpoint=True)
        log.info("stopped")
        return 0

    def _on_verdict(self, verdict: dict) -> None:
        self.metrics.observe_score(verdict["source"], verdict["score"])
        if verdict["alert"]:
            self.journal.append(verdict)
            iid = self.incidents.add(verdict)  # recognises an alert raised again after a restart
            if self.pool is not None and iid in self._expected:
                self.pool.offer_alert(verdict)  # refit: on-call said this pattern is normal

    def _checkpoint(self) -> None:
        """Score what is closed, make the journal durable, then save everything (lock held)."""
        self.pipe.tick(self.live())
        t0 = time.perf_counter()
        mark = self.journal.sync()
        save_checkpoint(self.checkpoint_path,
                        capture_chunks(self.pipe, self.follower.positions(self.pipe.held_from), mark))
        self._save_pool()
        self.checkpoint_time = self.wall()
        self.checkpoint_seconds = time.perf_counter() - t0

    # -- baseline hot reload -----------------------------------------------------------------
    def _signature(self, version: str | None) -> tuple | None:
        if version is None:
            return None
        try:
            st = os.stat(baselines_dir(self.state_dir) / version / "manifest.json")
        except OSError:
            return (version,)
        return version, st.st_ino, st.st_mtime_ns, st.st_size

    def _check_baseline(self) -> None:
        try:
            version = current_version(self.state_dir)
        except BaselineError as exc:
            log.error("%s; still using baseline %s", exc, self.pipe.baseline.version)
            return
        sig = self._signature(version)
        if version is None or sig == self._baseline_sig:
            return
        self._baseline_sig = sig
        try:
            baseline: Baseline = load_baseline_dir(baselines_dir(self.state_dir) / version)
        except BaselineError as exc:
            self.reload_failures += 1
            log.error("new baseline refused: %s; still using %s", exc, self.pipe.baseline.version)
            return
        with self.lock:
            old = self.pipe.baseline.version
            self.pipe.use_baseline(baseline)
            if self.pool is not None:
                self.pool.clear(version)  # what the old baseline called quiet says nothing now
        log.info("switched baseline %s → %s; %d open sessions carried over", old, version,
                 len(self.pipe.sessionizer.open))

    # -- refit (tracewatch/refit.py) ------------------------------------------------------------
    def _open_pool(self) -> None:
        """Load the pool (a corrupt file is moved aside: the pool is a sample, starting afresh
        loses no alert); start afresh when it belongs to another baseline."""
        rcfg = self.cfg.refit
        try:
            self.pool = QuietPool.load(self.pool_path, rcfg.pool_size, rcfg.seed)
        except StateError as exc:
            aside = self.pool_path.with_name(self.pool_path.name + ".corrupt")
            try:
                os.replace(self.pool_path, aside)
                log.error("%s; moved to %s, starting an empty pool", exc, aside)
            except OSError as err:
                log.error("%s; cannot move it aside (%s), starting an empty pool", exc, err.strerror or err)
            self.pool = QuietPool(rcfg.pool_size, rcfg.seed)
        version = self.pipe.baseline.version
        if self.pool.baseline_version != version:
            self.pool.clear(version)
        if self.pool.last_refit is None:
            self.pool.last_refit = self.wall()  # the first refit comes one interval after the first start
        self.pipe.on_quiet = self._on_quiet
        self.refits.update(dict.fromkeys(OUTCOMES, 0))  # every outcome's series exists from the start
        self._refresh_expected()

    def _on_quiet(self, source: str, seq: tuple[int, ...]) -> None:
        self.pool.offer(source, seq, self.pipe.miner.templates)

    def _save_pool(self) -> None:
        if self.pool is not None and self.pool.dirty:
            try:
                self.pool.save(self.pool_path)
            except OSError as exc:
                log.error("%s: cannot save the refit pool: %s", self.pool_path, exc.strerror or exc)

    def _refresh_expected(self) -> None:
        if not self.cfg.refit.learn_expected:
            return
        try:
            ids = expected_incidents(self.incidents.store)
        except (sqlite3.Error, StateError, OSError) as exc:
            log.error("incident store: %s; the labels of expected incidents were not re-read", exc)
            return
        with self.lock:
            self._expected = ids

    def _maybe_refit(self) -> None:
        """Start a refit on its own thread when one is due and none is running."""
        if self.pool is None:
            return
        self._refresh_expected()
        if self.refit_thread is not None and self.refit_thread.is_alive():
            return
        if self.wall() < self.pool.last_refit + self.cfg.refit.interval_s:
            return
        with self.lock:
            data = refit_data(self.pool, self.pipe.miner, self.pipe.baseline.version)
            self.pool.last_refit = self.wall()
            self.pool.dirty = True
        self.refit_thread = threading.Thread(target=self._refit, args=(data,), name="tracewatch-refit")
        self.refit_thread.start()

    def _refit(self, data: RefitData) -> None:
        """Fit, gate, save (and promote): the whole refit, off the ingest thread."""
        outcome = "error"
        try:
            store = self.incidents.store
            try:
                add_incidents(data, store)
            finally:
                store.release()
            report, _ = refit(data, self.cfg, self.state_dir, promote=self.cfg.refit.promote)
            outcome = report["outcome"]
            log.log(logging.WARNING if outcome == "refused" else logging.INFO, "%s", summary_line(report))
        except (TracewatchError, sqlite3.Error, OSError) as exc:
            log.error("refit failed: %s; the baseline in use is kept", exc)
        except Exception:
            log.exception("refit failed; the baseline in use is kept")
        with self.lock:
            self.refits[outcome] += 1

    # -- what HTTP and metrics read ------------------------------------------------------------
    def ready(self) -> tuple[bool, str]:
        if self.stopping.is_set():
            return False, "shutting down"
        if not self.started or self.pipe is None:
            return False, "starting: loading the baseline and attaching the sources"
        with self.lock:
            detached = dict(self.follower.detached)
        if detached:
            name, why = sorted(detached.items())[0]
            return False, f"source {name} is not attached: {why}"
        return True, ""

    def snapshot(self) -> dict:
        with self.lock:
            p = self.pipe
            if p is None:
                return {}
            return {
                "records": dict(p.records), "lines": dict(p.lines), "sessions_scored": dict(p.sessions_scored),
                "rejected": dict(p.rejected), "repaired": dict(p.repaired), "alerts": dict(p.alerts),
                "sessions_open": len(p.sessionizer.open), "sessions_evicted": p.sessionizer.evicted,
                "baseline_reload_failures": self.reload_failures, "alerts_replayed": self.journal.replayed,
                "baseline_version": p.baseline.version, "files": self.follower.status(),
                "sources": [s.name for s in self.cfg.sources], "checkpoint_time": self.checkpoint_time,
                "checkpoint_seconds": self.checkpoint_seconds,
                "refits": dict(self.refits), "refit_pool": self.pool.sizes() if self.pool is not None else {},
            }

    def status(self) -> dict:
        ok, why = self.ready()
        snap = self.snapshot()
        files = snap.get("files", [])
        sources = []
        for src in self.cfg.sources:
            mine = [f for f in files if f["source"] == src.name]
            sources.append({
                "name": src.name, "format": src.format, "paths": src.paths,
                "attached": self.started and src.name not in self.follower.detached,
                "lines": snap.get("lines", {}).get(src.name, 0),
                "records": snap.get("records", {}).get(src.name, 0),
                "rejected": {r: n for (s, r), n in snap.get("rejected", {}).items() if s == src.name},
                "sessions_scored": snap.get("sessions_scored", {}).get(src.name, 0),
                "lag_bytes": sum(f["lag_bytes"] for f in mine),
                "lag_seconds": max((f["lag_seconds"] for f in mine), default=0.0),
                "files": mine,
            })
        return {
            "tracewatch": __version__, "ready": ok, "reason": why,
            "baseline_version": snap.get("baseline_version"),
            "baseline_reload_failures": self.reload_failures,
            "sessions_open": snap.get("sessions_open", 0), "sessions_evicted": snap.get("sessions_evicted", 0),
            "alerts": self.journal.count, "alerts_replayed": self.journal.replayed,
            "event_time": self.pipe.watermark if self.pipe is not None else None,
            "checkpoint": {"path": str(self.checkpoint_path),
                           "written": _iso(self.checkpoint_time) if self.checkpoint_time else None,
                           "seconds": round(self.checkpoint_seconds, 4)},
            "sources": sources,
            "refit": None if self.pool is None else {  # tracewatch/refit.py
                "pool": snap.get("refit_pool", {}), "outcomes": snap.get("refits", {}),
                "last": _iso(self.pool.last_refit) if self.pool.last_refit else None},
        }

    def alerts_since(self, since: int, limit: int) -> dict:
        with self.lock:
            return self.journal.since(since, limit)

    # -- the end -------------------------------------------------------------------------------
    def close(self, *, checkpoint: bool) -> None:
        if self.refit_thread is not None:
            self.refit_thread.join()  # a fit in progress finishes (and saves its candidate)
        if checkpoint and self.started:
            with self.lock:
                self._checkpoint()
        if self.watcher is not None:
            self.watcher.stop()
        if self.server is not None:
            self.server.shutdown()
            self.server.server_close()
            self.http_thread.join(timeout=5)
            self.server = None
        self.follower.close()
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


def _iso(ts: float) -> str:
    return datetime.fromtimestamp(ts, tz=timezone.utc).isoformat(timespec="seconds")


# -- logging and the command -------------------------------------------------------------------
class _JsonLines(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        obj = {"time": datetime.fromtimestamp(record.created, tz=timezone.utc).isoformat(timespec="milliseconds"),
               "level": record.levelname.lower(), "logger": record.name, "message": record.getMessage()}
        if record.exc_info:
            obj["error"] = self.formatException(record.exc_info)
        return orjson.dumps(obj).decode()


def setup_logging(level: str = "info", fmt: str = "plain") -> None:
    """tracewatch's own log: stderr, plain lines or JSON lines."""
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(_JsonLines() if fmt == "json" else
                         logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    root = logging.getLogger("tracewatch")
    root.handlers[:] = [handler]
    root.setLevel(level.upper())
    root.propagate = False


def run_daemon(cfg: Config, *, log_level: str = "info", log_format: str = "plain") -> int:
    """``tracewatch run``: start (clear errors on failure), follow until a signal, exit 0."""
    setup_logging(log_level, log_format)
    daemon = Daemon(cfg)

    def on_signal(signum: int, _frame) -> None:
        log.info("received %s", signal.Signals(signum).name)
        daemon.stop()

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    try:
        daemon.start()
    except OSError as exc:  # a state_dir that cannot be written, for example
        raise StateError(f"cannot start: {exc.strerror or exc}"
                         + (f" ({exc.filename})" if exc.filename else "")) from exc
    return daemon.run()
