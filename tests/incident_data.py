"""An alert storm for the incident tests: hundreds of sessions of the parcel-locker scenario hit
by two different faults in the same few minutes, fitted and scored by the real pipeline.

Fault A: the step "door opened" retried 15–40 times in a row. Fault B: an event the baseline
never saw ("latch sensor … reports jammed bolt") inserted at a random place. Both come from
tracewatch.demo.scenario's machinery (generate, Step, the scenario's novel events).
"""

from __future__ import annotations

import functools
import http.client
import random
import threading
from datetime import datetime, timezone
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import orjson

from tracewatch.batch import assign_sources, fit_files, score_files
from tracewatch.config import Config, parse_config
from tracewatch.demo.scenario import GeneratedSession, generate, parcel_lockers, render_text

from .conftest import wait_for

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


def storm_sessions(n_faulty: int, n_normal: int, *, seed: int, span_s: float) -> list[GeneratedSession]:
    """``n_faulty`` sessions hit by the two faults (alternately, where the retry applies) and
    ``n_normal`` untouched ones, all starting within ``span_s`` seconds of STORM_START."""
    sc = parcel_lockers()
    rng = random.Random(seed)
    day = generate(sc, n_faulty + n_normal, 0, seed=seed + 1, start=STORM_START, span_s=span_s)
    jam = sc.novel[0]  # "latch sensor on door N reports jammed bolt"
    for i, sess in enumerate(day[:n_faulty]):
        if not (i % 2 == 0 and _retry(sess, rng)):
            _unseen(sess, rng, jam)
        _retime(sess, rng)
    return day


@functools.cache
def storm(root: Path, n_faulty: int = 400, n_normal: int = 100) -> tuple[Config, list[dict], dict[str, str]]:
    """(config, alerts in the order the pipeline raised them, session key → label)."""
    sc = parcel_lockers()
    root.mkdir(parents=True, exist_ok=True)
    base = generate(sc, 800, 0, seed=31, start=datetime(2026, 11, 29, tzinfo=timezone.utc))
    (root / "baseline.log").write_text("\n".join(render_text(sc, base)) + "\n")
    day = storm_sessions(n_faulty, n_normal, seed=32, span_s=240)
    (root / "storm.log").write_text("\n".join(render_text(sc, day)) + "\n")
    cfg = config(root)
    baseline, _, _ = fit_files(cfg, assign_sources(cfg, [str(root / "baseline.log")]))
    alerts: list[dict] = []
    score_files(cfg, assign_sources(cfg, [str(root / "storm.log")]), baseline, alerts.append)
    return cfg, alerts, {s.key: s.label for s in day}


@functools.cache
def storm_verdicts(root: Path) -> list[dict]:
    """Every session's verdict of :func:`storm` (alert or not), scored again with its baseline."""
    from tracewatch.baselines import load_baseline

    cfg, _, _ = storm(root)
    verdicts: list[dict] = []
    score_files(cfg, assign_sources(cfg, [str(root / "storm.log")]), load_baseline(cfg.state_dir), verdicts.append,
                score_all=True)
    return verdicts


# -- a receiver on loopback, standing in for a webhook and for Alertmanager ---------------------------
class Receiver:
    """A real HTTP server on 127.0.0.1 that records every POST (path, headers, JSON body, the
    status it answered) and answers ``status`` (settable, e.g. 503 to play a receiver in trouble). ``stop()`` closes the
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
                with outer._lock:
                    outer.requests.append({"path": self.path, "headers": dict(self.headers), "status": code,
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
        """The bodies of the requests it accepted (answered 200)."""
        with self._lock:
            return [r["body"] for r in self.requests if r["status"] == 200]

    def wait_for(self, n: int, timeout: float = 10.0) -> list:
        """Accepted bodies once there are at least ``n``."""
        wait_for(lambda: len(self.bodies()) >= n, timeout, what=f"{n} notifications", step=0.02)
        return self.bodies()


def toy_alert(alert_id: str, *unseen: str, t: float = 1_800_000_000.0, source: str = "api", **fields) -> dict:
    """A hand-made alert in the shape tracewatch/alerts/alert.py builds, whose vector can be
    worked out on paper: an empty sequence and one never-seen event per name in ``unseen``."""
    alert = {"alert": True, "alert_id": alert_id, "source": source, "session_key": f"k-{alert_id}",
             "score": 9.0, "p_value": 0.001, "reasons": ["unseen_event"] if unseen else ["far_from_baseline"],
             "cluster": 0, "events": 3, "sequence": [], "start": t - 1, "end": t,
             "unseen_events": [{"template_id": u, "template": f"event {u} <var>", "count": 1} for u in unseen],
             "unexpected": [], "missing": [], "diff": [f"not seen before: event {u} <var>" for u in unseen],
             "closest_normal": ["begin <var>", "end <var>"], "samples": [f"line of {alert_id}"]}
    alert.update(fields)
    return alert


# -- the daemon's HTTP server, answering for a real (not started) daemon ---------------------------------

def request(port: int, method: str, path: str, *, headers: dict | None = None, body: bytes | None = None
            ) -> tuple[int, dict, bytes]:
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=10)
    conn.request(method, path, body=body, headers=headers or {})
    resp = conn.getresponse()
    data = resp.read()
    conn.close()
    return resp.status, dict(resp.getheaders()), data


class Served:
    """``tracewatch.service.http.serve`` on 127.0.0.1 for a Daemon built from ``cfg`` (not started:
    no files are followed); alerts go to ``daemon.incidents`` directly."""

    def __init__(self, cfg: Config) -> None:
        from prometheus_client import CollectorRegistry

        from tracewatch.service.daemon import Daemon
        from tracewatch.service.http import serve

        self.daemon = Daemon(cfg, registry=CollectorRegistry())
        self.server, self.thread = serve("127.0.0.1:0", self.daemon, self.daemon.registry)
        self.port = self.server.server_address[1]
        self.incidents = self.daemon.incidents

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()
        self.thread.join(5)
        self.daemon.incidents.close()
        self.daemon.journal.close()


# -- a daemon following a real log file (the browser test, the restart test) ------------------------------
LIVE_CONFIG = """\
state_dir = "state"
{top}
[[sources]]
name = "locker-api"
paths = ["{logs}/*.log"]
line_pattern = '{pattern}'
start_at = "beginning"

[sessions]
idle_timeout_s = 1.0

[model]
false_alarm_rate = 0.01

[server]
listen = "127.0.0.1:{port}"

[daemon]
poll_interval_s = 0.1
checkpoint_interval_s = 0.5
{tail}"""


def free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def scaled(sessions: list[GeneratedSession]) -> list[str]:
    """Log lines whose steps are at most 0.3 s apart: far below the live configs' 1 s idle timeout."""
    for s in sessions:
        s.times = [s.start + 0.2 * (t - s.start) for t in s.times]
    return render_text(parcel_lockers(), sessions)


def live_setup(root: Path, *, seed: int, top: str = "", tail: str = "") -> tuple[Path, int]:
    """A config following ``root``/logs/*.log on a free loopback port, with a baseline fitted
    from 400 generated sessions; returns the config's path and the port."""
    from tracewatch.config import load_config

    port = free_port()
    (root / "logs").mkdir(parents=True, exist_ok=True)
    cfg_path = root / "tw.toml"
    cfg_path.write_text(LIVE_CONFIG.format(top=top, tail=tail, logs=root / "logs", port=port,
                                           pattern=parcel_lockers().line_pattern))
    cfg = load_config(cfg_path)
    base = root / "baseline.txt"
    base.write_text("\n".join(scaled(generate(parcel_lockers(), 400, 0, seed=seed, span_s=400))) + "\n")
    fit_files(cfg, assign_sources(cfg, [str(base)]))
    return cfg_path, port


# -- a day with six kinds of fault, each about one named step -------------------------------------------
# kind → (workflows, what is done to the session, the step, a phrase of its template the title must quote);
# a kind spread over several workflows has a different context in each
KINDS = {
    "missing_auth": (("deposit", "returns"), "drop", "courier authenticated", "authenticated at locker"),
    "missing_release": (("pickup",), "drop", "compartment released", "released on locker"),
    "retry_door": (("deposit",), "retry", "door opened", "opened on locker"),
    "retry_battery": (("health",), "retry", "battery read", "battery at"),
    "unseen_jam": (("pickup", "deposit", "returns", "health"), "insert", 0, "reports jammed bolt"),
    "unseen_ledger": (("deposit", "pickup", "returns", "health"), "insert", 3, "ledger write deadlock"),
}


def _apply(kind: str, sess: GeneratedSession, rng: random.Random) -> bool:
    workflows, how, step, _ = KINDS[kind]
    if sess.workflow not in workflows:
        return False
    if how == "drop":
        kept = [s for s in sess.steps if s.name != step]
        if len(kept) == len(sess.steps):
            return False
        sess.steps = kept
    elif how == "retry":
        at = [i for i, s in enumerate(sess.steps) if s.name == step]
        if not at:
            return False
        sess.steps[at[0]:at[0] + 1] = [sess.steps[at[0]]] * rng.randint(15, 40)
    else:
        sess.steps.insert(rng.randrange(1, len(sess.steps)), parcel_lockers().novel[step](rng))
    sess.label = kind
    return True


@functools.cache
def six_kinds_day(root: Path, per_kind: int = 32, n_normal: int = 300, span_s: float = 3 * 3600, *,
                  every_session: bool = False) -> tuple[Config, list[dict], dict[str, str]]:
    """A baseline and a day of ``n_normal`` untouched sessions plus ``per_kind`` sessions of each
    kind in :data:`KINDS`, fitted and scored by the real pipeline: (config, alerts in the order
    raised — with ``every_session``, every session's verdict —, session key → kind or "normal").
    The day is ``root``/day.log, the baseline is fitted in ``root``/state."""
    sc = parcel_lockers()
    root.mkdir(parents=True, exist_ok=True)
    base = generate(sc, 800, 0, seed=41, start=datetime(2026, 11, 29, tzinfo=timezone.utc))
    (root / "baseline.log").write_text("\n".join(render_text(sc, base)) + "\n")
    rng = random.Random(42)
    day = generate(sc, n_normal + 20 * per_kind, 0, seed=43, start=STORM_START, span_s=span_s)
    counts = dict.fromkeys(KINDS, 0)
    for sess in day[n_normal:]:
        for kind in sorted(KINDS, key=counts.get):
            if counts[kind] < per_kind and _apply(kind, sess, rng):
                counts[kind] += 1
                _retime(sess, rng)
                break
    assert min(counts.values()) == per_kind, counts
    day = day[:n_normal] + [s for s in day[n_normal:] if s.label != NORMAL]
    (root / "day.log").write_text("\n".join(render_text(sc, day)) + "\n")
    cfg = config(root)
    baseline, _, _ = fit_files(cfg, assign_sources(cfg, [str(root / "baseline.log")]))
    alerts: list[dict] = []
    score_files(cfg, assign_sources(cfg, [str(root / "day.log")]), baseline, alerts.append, score_all=every_session)
    return cfg, [a for a in alerts if every_session or a.get("alert")], {s.key: s.label for s in day}
