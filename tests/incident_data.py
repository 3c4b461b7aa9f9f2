"""An alert storm for the incident tests: hundreds of sessions of the parcel-locker scenario hit
by two different faults in the same few minutes, fitted and scored by the real pipeline.

Fault A: the step "door opened" retried 15–40 times in a row. Fault B: an event the baseline
never saw ("latch sensor … reports jammed bolt") inserted at a random place. Both come from
tracewatch.demo.scenario's machinery (generate, Step, the scenario's novel events).
"""

from __future__ import annotations

import functools
import random
import threading
import time
from datetime import datetime, timezone
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import orjson

from tracewatch.batch import assign_sources, fit_files, score_files
from tracewatch.config import Config, parse_config
from tracewatch.demo.scenario import GeneratedSession, generate, parcel_lockers, render_text

RETRY, UNSEEN, NORMAL = "retry", "unseen", "normal"
STORM_START = datetime(2026, 11, 30, 3, 0, tzinfo=timezone.utc)


def _retry(sess: GeneratedSession, rng: random.Random) -> bool:
    doors = [i for i, s in enumerate(sess.steps) if s.name == "door opened"]
    if not doors:
        return False
    i = doors[0]
    sess.steps[i:i + 1] = [sess.steps[i]] * rng.randint(15, 40)
    sess.label = RETRY
    return True


def _unseen(sess: GeneratedSession, rng: random.Random, novel) -> None:
    sess.steps.insert(rng.randrange(1, len(sess.steps) + 1), novel(rng))
    sess.label = UNSEEN


def _retime(sess: GeneratedSession, rng: random.Random) -> None:
    t = sess.start
    sess.times = []
    for _ in sess.steps:
        sess.times.append(t)
        t += rng.uniform(0.02, 1.5)


def config(root: Path, **extra) -> Config:
    return parse_config({
        "state_dir": str(root / "state"),
        "sources": [{"name": "locker-api", "line_pattern": parcel_lockers().line_pattern}],
        "sessions": {"idle_timeout_s": 30},
        "model": {"false_alarm_rate": 0.01},
        **extra,
    })


@functools.cache
def storm(root: Path, n_faulty: int = 400, n_normal: int = 100) -> tuple[Config, list[dict], dict[str, str]]:
    """(config, alerts in the order the pipeline raised them, session key → label)."""
    sc = parcel_lockers()
    root.mkdir(parents=True, exist_ok=True)
    base = generate(sc, 800, 0, seed=31, start=datetime(2026, 11, 29, tzinfo=timezone.utc))
    (root / "baseline.log").write_text("\n".join(render_text(sc, base)) + "\n")
    rng = random.Random(32)
    day = generate(sc, n_faulty + n_normal, 0, seed=33, start=STORM_START, span_s=240)
    jam = sc.novel[0]  # "latch sensor on door N reports jammed bolt"
    for i, sess in enumerate(day[:n_faulty]):
        if not (i % 2 == 0 and _retry(sess, rng)):
            _unseen(sess, rng, jam)
        _retime(sess, rng)
    (root / "storm.log").write_text("\n".join(render_text(sc, day)) + "\n")
    cfg = config(root)
    baseline, _, _ = fit_files(cfg, assign_sources(cfg, [str(root / "baseline.log")]))
    alerts: list[dict] = []
    score_files(cfg, assign_sources(cfg, [str(root / "storm.log")]), baseline, alerts.append)
    return cfg, alerts, {s.key: s.label for s in day}


# -- a receiver on loopback, standing in for a webhook and for Alertmanager ---------------------------
class Receiver:
    """A real HTTP server on 127.0.0.1 that records every POST (path, headers, JSON body) and
    answers ``status`` (settable, e.g. 503 to play a receiver in trouble). ``stop()`` closes the
    port (connection refused, a receiver that is down); ``start()`` opens the same port again."""

    def __init__(self, port: int = 0) -> None:
        self.port = port
        self.requests: list[dict] = []
        self.status = 200
        self.server: ThreadingHTTPServer | None = None
        self.thread: threading.Thread | None = None
        self._lock = threading.Lock()

    def start(self) -> "Receiver":
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802
                body = self.rfile.read(int(self.headers.get("Content-Length") or 0))
                code = outer.status
                if code == 200:
                    with outer._lock:
                        outer.requests.append({"path": self.path, "headers": dict(self.headers),
                                               "body": orjson.loads(body)})
                self.send_response(code)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args) -> None:
                pass

        ThreadingHTTPServer.allow_reuse_address = True
        self.server = ThreadingHTTPServer(("127.0.0.1", self.port), Handler)
        self.server.daemon_threads = True
        self.port = self.server.server_address[1]
        self.thread = threading.Thread(target=self.server.serve_forever, kwargs={"poll_interval": 0.05},
                                       daemon=True)
        self.thread.start()
        return self

    def stop(self) -> None:
        if self.server is not None:
            self.server.shutdown()
            self.server.server_close()
            self.thread.join(5)
            self.server = None

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def bodies(self) -> list:
        with self._lock:
            return [r["body"] for r in self.requests]

    def wait_for(self, n: int, timeout: float = 10.0) -> list:
        """Bodies once at least ``n`` requests arrived (or the timeout passed)."""
        end = time.monotonic() + timeout
        while len(self.requests) < n and time.monotonic() < end:
            time.sleep(0.02)
        return self.bodies()


def toy_alert(alert_id: str, *unseen: str, t: float = 1_800_000_000.0, source: str = "api", **fields) -> dict:
    """A hand-made alert in the shape tracewatch/alerts/alert.py builds, whose vector can be
    worked out on paper: an empty sequence and one never-seen event per name in ``unseen``."""
    alert = {"alert": True, "alert_id": alert_id, "source": source, "session_key": f"k-{alert_id}",
             "score": 9.0, "p_value": 0.001, "reasons": ["unseen_event"] if unseen else ["far_from_baseline"],
             "cluster": 0, "events": 3, "sequence": [], "start": t - 1, "end": t,
             "unseen_events": [{"template_id": u, "template": f"event {u} <*>", "count": 1} for u in unseen],
             "unexpected": [], "missing": [], "diff": [f"not seen before: event {u} <*>" for u in unseen],
             "closest_normal": ["begin <*>", "end <*>"], "samples": [f"line of {alert_id}"]}
    alert.update(fields)
    return alert
