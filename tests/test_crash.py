"""Crash safety: the real `tracewatch run` killed with SIGKILL at random points while a writer
appends a day of the parcel-locker demo and rotates its file, then restarted.

What must hold, for each way of rotating (by rename, by copytruncate, by delete and recreate),
with at least ``KILLS`` kills: every line written is counted once (``tracewatch_records_total``,
the status API, no rejects), and the alerts in ``alerts.jsonl`` are those a batch ``tracewatch
score`` gives for the same lines (their concatenation, in the order written).

Kill points are conditions, never sleeps (seeded choices among them):

- the daemon is starting: it logged that it resumed from the checkpoint, before it attached;
- it has just written its start checkpoint, or the next one;
- the followed file reached a size;
- copytruncate: between the copy and the truncate (the writer waits there), restarted before
  the truncate or after it;
- down across one or two rotations (the writer waits, the daemon is killed, the writer rotates
  once or twice and writes on, the daemon is restarted).

The writer is a process of its own and waits at those points (files in a control folder say
where it is). It also never runs more than one stretch ahead of the kills, so the kills spread
over the whole day. A writer that writes between the copy and the truncate loses those lines by
the method itself (README, Reliability): this writer does not, as logrotate's copytruncate
window is a matter of milliseconds. Delete and recreate has a window of its own: the unread
part of a file deleted while the daemon is down, or before its next checkpoint after it read
the file, is gone with the file; the killer keeps out of that window (and the test says so).

Restarts are cheap: the first daemon of each run is the `python -m tracewatch run` command;
the others are forked, running the same command (``tracewatch.cli.main``), from a process that
imported tracewatch once, so a restart costs a fraction of a second instead of the imports.
Run as ``python -m tests.test_crash zygote`` it is that process (and forks the writer too).
"""

from __future__ import annotations

import json
import os
import random
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families

from .conftest import ROOT
from .daemon_helpers import (DaemonProcess, die_with_parent, fitted, no_daemon_left,  # noqa: F401
                             scaled_lines, scored_day, wait_for, workspace)

KILLS = 20  # at least this many SIGKILLs per rotation mode
IDLE = 2.5  # idle timeout: the writer's pauses (and waits at its stops) stay far below it
CHECKPOINT_S = 0.3
STEP = 0.005  # how often conditions are polled
SEED = int(os.environ.get("TRACEWATCH_CRASH_SEED", "0"))  # another value: other kill points (a longer soak)


# -- the writer (a process of its own) --------------------------------------------------------------
def _shift(logs: Path) -> None:
    """Numbered rotation, as logrotate names it: app.log.N → app.log.N+1, newest first."""
    n = 1
    while (logs / f"app.log.{n}").exists():
        n += 1
    for k in range(n - 1, 0, -1):
        os.rename(logs / f"app.log.{k}", logs / f"app.log.{k + 1}")


class Control:
    """The folder through which the test and the writer talk: ``at-NAME`` (the writer waits
    there), ``go-NAME`` (the test lets it on), ``mark-NAME`` (the writer passed a point),
    ``kills`` (how many kills so far), ``waiting`` (the writer waits for more kills), ``done``."""

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)

    def touch(self, name: str, text: str = "") -> None:
        tmp = self.folder / f".{name}"
        tmp.write_text(text)
        os.replace(tmp, self.folder / name)

    def has(self, name: str) -> bool:
        return (self.folder / name).exists()

    def read(self, name: str, default: str = "") -> str:
        try:
            return (self.folder / name).read_text()
        except FileNotFoundError:
            return default

    def stopped_at(self) -> str | None:
        names = [p.name[3:] for p in self.folder.glob("at-*") if not self.has(f"go-{p.name[3:]}")]
        return names[0] if names else None


def write_plan(ctl: Control, logs: Path, plan: list[list], lines: list[str], seed: int) -> None:
    """Carry out ``plan``: ``["lines", a, b]`` appends lines a..b-1 (in one or two writes, cut
    inside a line), then pauses a few ms; ``["need", n]`` waits for n kills; ``["stop", name]``
    waits for the test; ``["mark", name]``; ``["rename"]``, ``["copy"]``, ``["truncate"]``,
    ``["delete"]`` rotate ``logs/app.log``."""
    rng = random.Random(seed)
    log = logs / "app.log"

    def wait(pred, what: str) -> None:
        deadline = time.monotonic() + 120
        while not pred():
            if time.monotonic() > deadline:
                raise SystemExit(f"writer: gave up waiting for {what}")
            time.sleep(STEP)

    for step in plan:
        op = step[0]
        if op == "lines":
            data = "".join(line + "\n" for line in lines[step[1]:step[2]]).encode()
            cut = rng.randrange(1, len(data))
            fd = os.open(log, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
            try:
                os.write(fd, data[:cut])
                os.write(fd, data[cut:])
            finally:
                os.close(fd)
            time.sleep(rng.uniform(0.005, 0.03))
        elif op == "need":
            if int(ctl.read("kills", "0") or 0) < step[1]:
                ctl.touch("waiting", str(step[1]))
                wait(lambda: int(ctl.read("kills", "0") or 0) >= step[1], f"kill {step[1]}")
                (ctl.folder / "waiting").unlink()
        elif op == "stop":
            ctl.touch(f"at-{step[1]}")
            wait(lambda: ctl.has(f"go-{step[1]}"), f"go-{step[1]}")
        elif op == "mark":
            ctl.touch(f"mark-{step[1]}")
        elif op == "rename":
            _shift(logs)
            os.rename(log, logs / "app.log.1")
        elif op == "copy":  # logrotate copytruncate: cp, then truncate in place
            _shift(logs)
            shutil.copyfile(log, logs / "app.log.1")
        elif op == "truncate":
            os.truncate(log, 0)
        elif op == "delete":
            log.unlink()
    ctl.touch("done")


def make_plan(mode: str, n_lines: int, seed: int) -> list[list]:
    """Chunks of lines in ``KILLS`` stretches (the writer enters stretch i after i kills), with a
    rotation after every other stretch; each rotation is done one way of those ``mode`` has."""
    rng = random.Random(seed)
    bounds = [0]
    while bounds[-1] < n_lines:
        bounds.append(min(n_lines, bounds[-1] + rng.randint(15, 40)))
    chunks = list(zip(bounds, bounds[1:]))
    cuts = [len(chunks) * i // (KILLS + 1) for i in range(KILLS + 2)]  # stretch i: chunks[cuts[i]:cuts[i+1]]
    ways = {"rename": ["up", "down-1", "down-2"], "copytruncate": ["up", "mid-now", "mid-later", "down-1", "down-2"],
            "delete": ["up", "down-1"]}[mode]
    rotate = {"rename": [["rename"]], "copytruncate": [["copy"], ["truncate"]], "delete": [["delete"]]}[mode]
    plan: list[list] = []
    pending: list[str] = []
    n_rot = 0
    for i in range(KILLS + 1):
        stretch = [["lines", a, b] for a, b in chunks[cuts[i]:cuts[i + 1]]]
        if i:
            plan.append(["need", i])
        if i % 2 == 1 and i < KILLS - 1:
            if not pending:
                pending = rng.sample(ways, len(ways))
            way, n_rot = pending.pop(), n_rot + 1
            name = f"{way}-{n_rot}"
            if way == "up":
                plan += [["stop", name], *rotate, ["mark", name]]  # let on while the daemon runs
            elif way.startswith("mid"):
                plan += [["copy"], ["stop", name], ["truncate"], ["mark", name]]
            else:
                plan.append(["stop", name])
                for _ in range(int(way[-1])):
                    plan += [*rotate, *stretch[:2]]
                    stretch = stretch[2:]
                plan.append(["mark", name])
        plan += stretch
    return plan


# -- the forking process -----------------------------------------------------------------------------
def zygote() -> None:
    """Read commands on stdin: ``daemon CONFIG ERRFILE`` and ``writer CTL LOGS PLAN LINES SEED``
    fork a child and print its pid; ``reap PID`` waits for it and prints its exit code."""
    import tracewatch.alerts.sinks  # noqa: F401  (what `run` imports when it starts: forked children start warm)
    import tracewatch.cli
    import tracewatch.service.daemon  # noqa: F401
    import tracewatch.triage  # noqa: F401

    for line in sys.stdin:
        cmd, *args = line.split()
        if cmd == "reap":
            _, status = os.waitpid(int(args[0]), 0)
            print(os.waitstatus_to_exitcode(status), flush=True)
            continue
        err = args[1] if cmd == "daemon" else str(Path(args[0]) / "writer.err")
        pid = os.fork()
        if pid == 0:
            code = 1
            try:
                die_with_parent()
                os.dup2(os.open(os.devnull, os.O_RDWR), 0)
                os.dup2(os.open(os.devnull, os.O_RDWR), 1)
                os.dup2(os.open(err, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644), 2)
                if cmd == "daemon":
                    sys.argv = ["tracewatch", "run", "--config", args[0]]
                    code = tracewatch.cli.main()
                else:
                    ctl, logs, plan, lines, seed = args
                    write_plan(Control(Path(ctl)), Path(logs), json.loads(Path(plan).read_text()),
                               Path(lines).read_text().splitlines(), int(seed))
                    code = 0
            except BaseException:
                import traceback
                traceback.print_exc()
            finally:
                sys.stderr.flush()
                os._exit(code)
        print(pid, flush=True)


class Zygote:
    def __init__(self) -> None:
        env = dict(os.environ, PYTHONPATH=str(ROOT), OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
        self.proc = subprocess.Popen([sys.executable, "-m", "tests.test_crash", "zygote"], cwd=ROOT, env=env,
                                     stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True, bufsize=1,
                                     preexec_fn=die_with_parent)

    def ask(self, *words: str) -> int:
        self.proc.stdin.write(" ".join(words) + "\n")
        self.proc.stdin.flush()
        answer = self.proc.stdout.readline()
        assert answer, "the forking process died"
        return int(answer)

    def close(self) -> None:
        self.proc.stdin.close()
        self.proc.wait(timeout=30)


class Child:
    """A forked child, seen as much like a ``subprocess.Popen`` as :class:`DaemonProcess` needs."""

    def __init__(self, zyg: Zygote, pid: int) -> None:
        self.zygote, self.pid, self.returncode = zyg, pid, None
        self.args = [f"pid {pid}"]

    def poll(self) -> int | None:
        if self.returncode is None:
            try:
                state = Path(f"/proc/{self.pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
            except FileNotFoundError:
                state = "Z"
            if state == "Z":
                self.returncode = self.zygote.ask("reap", str(self.pid))
        return self.returncode

    def send_signal(self, sig: int) -> None:
        if self.returncode is None:
            os.kill(self.pid, sig)

    def kill(self) -> None:
        self.send_signal(signal.SIGKILL)

    def wait(self, timeout: float | None = None) -> int:
        wait_for(lambda: self.poll() is not None, timeout or 30, what=f"{self.args[0]} to exit", step=STEP)
        return self.returncode


class ForkedDaemon(DaemonProcess):
    """`tracewatch run` forked from the :class:`Zygote` (same command, no import time)."""

    def __init__(self, zyg: Zygote, cfg_path: Path) -> None:
        from tracewatch.config import load_config
        self.cfg = load_config(cfg_path)
        self.port = int(self.cfg.server.listen.rsplit(":", 1)[1])
        self.err_path = cfg_path.parent / f"daemon-{time.monotonic_ns()}.err"
        self.err = open(self.err_path, "wb")
        self.proc = Child(zyg, zyg.ask("daemon", str(cfg_path), str(self.err_path)))
        DaemonProcess.started.append(self)


@pytest.fixture(scope="module")
def zyg():
    z = Zygote()
    yield z
    z.close()


@pytest.fixture(scope="module")
def day(fitted, tmp_path_factory):
    """A day of demo lines (with anomalies of every kind) and what `tracewatch score` says of it."""
    folder = tmp_path_factory.mktemp("crash-day")
    cfg_path = workspace(fitted, folder, idle=IDLE, checkpoint_s=CHECKPOINT_S)
    lines = scaled_lines(520, 5, seed=31, span_s=100)
    return folder / "day.txt", lines, scored_day(cfg_path, folder / "day.txt", lines, 20)


# -- the run -----------------------------------------------------------------------------------------
def _comparable(alerts: list[dict]) -> dict[str, dict]:
    """Alerts by id, without what depends on delivery (offsets; idle timeout vs end of input)."""
    return {a["alert_id"]: {k: v for k, v in a.items() if k not in ("closed_by", "first_offset")} for a in alerts}


class Run:
    """One rotation mode: the state folder, the writer and the daemon of the moment."""

    def __init__(self, zyg: Zygote, cfg_path: Path, mode: str, seed: int) -> None:
        self.zyg, self.cfg_path, self.mode = zyg, cfg_path, mode
        self.rng = random.Random(seed)
        self.logs = cfg_path.parent / "logs"
        self.ckpt = cfg_path.parent / "state" / "checkpoint.json"
        self.ctl = Control(cfg_path.parent / "ctl")
        self.kills = 0
        self.kinds: dict[str, int] = {}
        self.history: list[str] = []  # what was done when, shown when the run fails
        self.daemon: DaemonProcess | None = None
        self.down = True  # between a kill and the next start
        self.writer: Child | None = None

    # what the test looks at
    def ckpt_id(self) -> tuple[int, int]:
        try:
            st = self.ckpt.stat()
        except FileNotFoundError:
            return 0, 0
        return st.st_ino, st.st_mtime_ns

    def ckpt_files(self) -> list[dict]:
        try:
            return json.loads(self.ckpt.read_bytes())["files"]
        except (FileNotFoundError, ValueError):
            return []

    def log_stat(self) -> os.stat_result | None:
        try:
            return os.stat(self.logs / "app.log")
        except FileNotFoundError:
            return None

    def log_size(self) -> int:
        st = self.log_stat()
        return 0 if st is None else st.st_size

    def alive(self) -> None:
        assert self.down or self.daemon.proc.poll() is None, f"the daemon exited:\n{self.daemon.stderr()[-3000:]}"
        if self.writer is not None and self.writer.poll() not in (None, 0):
            raise AssertionError(f"the writer failed:\n{self.ctl.read('writer.err')[-3000:]}")

    def wait(self, pred, what: str, timeout: float = 60.0, ignore: tuple[type[BaseException], ...] = ()):
        return wait_for(pred, timeout, what=what, step=STEP, alive=self.alive, ignore=ignore,
                        tail=lambda: f"mode {self.mode}, {self.kills} kills\n{self.daemon.stderr()[-2000:]}")

    def deleted_pending(self) -> bool:
        """Does the checkpoint still name a file that was deleted (delete mode's own window)?"""
        present = set()
        for p in self.logs.iterdir():
            try:
                st = p.stat()
            except FileNotFoundError:
                continue
            present.add((st.st_dev, st.st_ino))
        return any((f["dev"], f["ino"]) not in present for f in self.ckpt_files())

    def covers_current(self, whole: bool) -> bool:
        """The checkpoint names app.log as it is now (and, with ``whole``, up to its end)."""
        st = self.log_stat()
        return st is not None and any(
            (f["dev"], f["ino"]) == (st.st_dev, st.st_ino) and (not whole or f["offset"] == st.st_size)
            for f in self.ckpt_files())

    # what the test does
    def start(self, *, real: bool = False) -> None:
        self.note("start")
        before = self.ckpt_id()
        self.daemon = DaemonProcess(self.cfg_path) if real else ForkedDaemon(self.zyg, self.cfg_path)
        self.started_from = before
        self.down = False

    def started(self) -> bool:
        return self.ckpt_id() != self.started_from

    def wait_started(self) -> None:
        self.wait(self.started, "the start checkpoint")

    def note(self, what: str) -> None:
        st = self.log_stat()
        self.history.append(f"{time.monotonic():.3f} {what} (app.log {st and st.st_ino}:{st and st.st_size}, "
                            f"checkpoint {[(f['ino'], f['offset']) for f in self.ckpt_files()]})")

    def kill(self, kind: str) -> None:
        self.note(f"kill {kind}")
        self.daemon.kill()
        self.down = True
        self.kills += 1
        self.kinds[kind] = self.kinds.get(kind, 0) + 1
        self.ctl.touch("kills", str(self.kills))

    def restart(self) -> None:
        self.start()
        if self.rng.random() < 0.15:  # killed again while starting, after it resumed
            self.wait(lambda: "resumed from the checkpoint" in self.daemon.stderr() or self.started(),
                      "the daemon to resume")
            self.kill("starting")
            self.start()
        self.wait_started()

    def at_stop(self, name: str) -> None:
        way = name.rsplit("-", 1)[0]
        if way == "up":  # rotate while the daemon runs: it must know the file to be rotated
            self.wait(lambda: self.covers_current(whole=False), "a checkpoint naming app.log")
            self.note(f"go {name}")
            self.ctl.touch(f"go-{name}")
            # no kill is decided on before the rotation is done (delete mode's window opens there)
            self.wait(lambda: self.ctl.has(f"mark-{name}"), f"the writer past {name}")
            return
        if way.startswith("down") and self.mode == "delete":
            # a deleted file cannot be read after a restart: killed only once it is checkpointed whole
            self.wait(lambda: self.covers_current(whole=True), "app.log checkpointed to its end")
        self.kill(way)
        if way == "mid-now":  # restarted between the copy and the truncate
            self.restart()
            self.ctl.touch(f"go-{name}")
        else:  # down across the truncate, or across one or two rotations
            self.ctl.touch(f"go-{name}")
            self.wait(lambda: self.ctl.has(f"mark-{name}"), f"the writer past {name}")
            self.restart()

    def free_kill(self) -> bool:
        """Kill at a condition drawn at random; False when the writer finished first."""
        kind = self.rng.choice(["checkpoint", "size", "size"])
        size0 = self.log_size()
        grow = self.rng.randint(2_000, 20_000)
        ckpt0 = self.ckpt_id()

        def due() -> str | None:
            if self.ctl.has("done"):
                return "done"
            stop = self.ctl.stopped_at()
            if stop is not None:
                return "stop:" + stop
            if self.mode == "delete" and self.deleted_pending():
                return None
            if self.ctl.has("waiting"):
                return kind
            if kind == "checkpoint":
                return kind if self.ckpt_id() != ckpt0 else None
            size = self.log_size()
            return kind if size >= size0 + grow or size < size0 else None

        got = self.wait(due, f"a kill point ({kind})")
        if got == "done":
            return False
        if got.startswith("stop:"):
            self.at_stop(got[5:])
            return True
        self.kill(kind)
        if self.rng.random() < 0.3:  # down for a while: a backlog to catch up on
            size1 = self.log_size()
            self.wait(lambda: self.ctl.has("done") or self.ctl.stopped_at() is not None
                      or not size1 <= self.log_size() < size1 + 5_000, "a backlog")
        self.restart()
        return True


@pytest.mark.parametrize("mode", ["rename", "copytruncate", "delete"])
def test_kill_9_at_random_points_loses_and_repeats_no_line(fitted, day, zyg, tmp_path, mode):
    day_path, lines, expected = day
    cfg_path = workspace(fitted, tmp_path, idle=IDLE, checkpoint_s=CHECKPOINT_S)
    seed = {"rename": 1, "copytruncate": 2, "delete": 3}[mode] + 10 * SEED
    run = Run(zyg, cfg_path, mode, seed)
    plan = tmp_path / "plan.json"
    plan.write_text(json.dumps(make_plan(mode, len(lines), seed)))
    run.start(real=True)  # the command itself; the restarts are forked
    run.wait_started()
    run.writer = Child(zyg, zyg.ask("writer", str(run.ctl.folder), str(run.logs), str(plan), str(day_path),
                                    str(seed)))
    while run.free_kill():
        pass
    assert run.writer.wait() == 0, run.ctl.read("writer.err")

    daemon = run.daemon

    def settled() -> dict | None:
        s = daemon.status()
        files = s["sources"][0]["files"]
        done = s["sessions_open"] == 0 and all(f["lag_bytes"] == 0 and f["state"] == "following" for f in files)
        return s if done else None

    status = run.wait(settled, "every file read and every session closed", ignore=(OSError,))
    _, metrics = daemon.get("/metrics")
    records = {s.labels.get("source"): s.value for fam in text_string_to_metric_families(metrics.decode())
               for s in fam.samples if s.name == "tracewatch_records_total"}
    assert daemon.terminate() == 0
    got = [json.loads(x) for x in (cfg_path.parent / "state" / "alerts.jsonl").read_text().splitlines()]
    src = status["sources"][0]
    summary = (f"{mode}: {run.kills} kills {dict(sorted(run.kinds.items()))}, {len(lines)} lines written, "
               f"{int(records.get('api', 0))} counted, {src['rejected']} rejected; alerts {len(got)} live, "
               f"{len(expected)} batch")
    print(summary)
    if records.get("api") != len(lines):
        print("\n".join(run.history))
    assert run.kills >= KILLS, summary
    assert records.get("api") == len(lines), summary
    assert src["records"] == src["lines"] == len(lines) and not src["rejected"], summary
    assert len(got) == len({a["alert_id"] for a in got}), "an alert was journalled twice: " + summary
    live, batch = _comparable(got), _comparable(expected)
    assert live == batch, (f"{summary}; missing {len(batch.keys() - live.keys())}, extra "
                           f"{len(live.keys() - batch.keys())}")


if __name__ == "__main__" and sys.argv[1:] == ["zygote"]:
    zygote()
