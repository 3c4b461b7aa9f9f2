"""A real PostgreSQL server's own log, read, fitted and judged by the real commands.

The test starts Debian's PostgreSQL in a temporary folder (as the ``postgres`` user when run as
root: the server refuses to run as root), with ``log_line_prefix = '%m [%p] %c %q%u@%d '`` (%c is
the server's session id: one session per connection) and every statement logged. A baseline
day is pgbench's built-in scripts with a new connection per transaction (``-C``) and a small
client of our own (psql); the day to judge is more of the same with real faults caused on the
real server: a unique-constraint error, a deadlock between two sessions, a statement timeout,
a backend terminated by another session, logins to a database and as a role that do not exist.
Sessions are labelled by the application name each client announces (PGAPPNAME), which the
server writes on its ``connection authorized`` line.

``make test`` installs Debian's postgresql when it can; without it the test skips and says why.
"""

from __future__ import annotations

import json
import os
import pwd
import re
import shutil
import subprocess
import tempfile
import time
from collections import Counter
from datetime import datetime, timezone
from pathlib import Path

import pytest

from tracewatch.timestamps import parse_timestamp

from .conftest import run_cli
from .daemon_helpers import free_port

BIN = next(iter(sorted(Path("/usr/lib/postgresql").glob("*/bin"), reverse=True)), None)
PGBENCH = shutil.which("pgbench") or (str(BIN / "pgbench") if BIN else None)
pytestmark = pytest.mark.skipif(
    BIN is None or not (BIN / "postgres").exists() or not PGBENCH or not shutil.which("psql"),
    reason="PostgreSQL server not installed (Debian package postgresql; `make test` installs it with "
           "apt-get when run as root with a package mirror reachable)")

PREFIX = "%m [%p] %c %q%u@%d "
# what that prefix writes (PostgreSQL docs, "log_line_prefix"): %m time with milliseconds and
# zone, %p the pid, %c the session id, %u@%d user and database (client sessions only)
LINE_PATTERN = (r"^(?P<ts>\d{4}-\d\d-\d\d \d\d:\d\d:\d\d\.\d{3} [A-Z]+) \[\d+\] (?P<key>[0-9a-f]+\.[0-9a-f]+) "
                r"\S+@\S+ (?P<level>[A-Z]+):  (?P<message>.*)$")
FAULTS = ("unique_violation", "deadlock", "statement_timeout", "terminated", "terminator", "no_database",
          "no_role")


class Server:
    def __init__(self, root: Path) -> None:
        self.root, self.port = root, free_port()
        self.as_user = os.geteuid() == 0
        if self.as_user:
            try:
                pw = pwd.getpwnam("postgres")
            except KeyError:
                pytest.skip("running as root and no 'postgres' user to run the server as")
            os.chown(root, pw.pw_uid, pw.pw_gid)
        self.log = root / "server.log"
        self.env = dict(os.environ, PGHOST=str(root), PGPORT=str(self.port), PGUSER="postgres",
                        PGDATABASE="postgres")

    def _server_cmd(self, *args: str) -> None:
        cmd = [str(BIN / args[0]), *args[1:]]
        if self.as_user:
            cmd = ["runuser", "-u", "postgres", "--", *cmd]
        subprocess.run(cmd, check=True, capture_output=True, timeout=120)

    def start(self) -> None:
        self._server_cmd("initdb", "-D", str(self.root / "data"), "--auth=trust", "-U", "postgres")
        with open(self.root / "data" / "postgresql.conf", "a") as fh:
            fh.write(f"listen_addresses = ''\nunix_socket_directories = '{self.root}'\nport = {self.port}\n"
                     f"log_line_prefix = '{PREFIX}'\nlog_connections = on\nlog_disconnections = on\n"
                     "log_statement = 'all'\nlog_timezone = 'UTC'\nfsync = off\ndeadlock_timeout = '100ms'\n")
        self._server_cmd("pg_ctl", "-D", str(self.root / "data"), "-l", str(self.log), "-w", "start")
        self.sql("SELECT 1")
        subprocess.run([PGBENCH, "-i", "-s", "1", "-q"], env=self.env, check=True, capture_output=True, timeout=120)

    def stop(self) -> None:
        self._server_cmd("pg_ctl", "-D", str(self.root / "data"), "-m", "fast", "-w", "stop")

    def sql(self, *statements: str, app: str = "locker-report", check: bool = True, **env) -> None:
        args = ["psql", "-X", "-q", "-v", "ON_ERROR_STOP=1"] + [a for s in statements for a in ("-c", s)]
        subprocess.run(args, env=dict(self.env, PGAPPNAME=app, **env), check=check, capture_output=True,
                       timeout=60)

    def bench(self, transactions: int) -> None:
        # pgbench's three built-in scripts, weighted; a new connection per transaction
        subprocess.run([PGBENCH, "-C", "-c", "2", "-t", str(transactions), "-b", "tpcb-like@5",
                        "-b", "select-only@3", "-b", "simple-update@2"], env=self.env, check=True,
                       capture_output=True, timeout=300)

    def own_client(self, n: int) -> None:
        """Our own normal client: a report query, and a teller update in a transaction."""
        for i in range(n):
            self.sql("SELECT count(*) FROM pgbench_branches", "SELECT sum(abalance) FROM pgbench_accounts")
            self.sql("BEGIN", f"UPDATE pgbench_tellers SET tbalance = tbalance + {i % 7 + 1} WHERE tid = {i % 10 + 1}",
                     "COMMIT", app="locker-teller")

    def faults(self, each: int) -> None:
        for _ in range(each):
            self.sql("INSERT INTO pgbench_branches (bid, bbalance) VALUES (1, 0)", app="unique_violation",
                     check=False)
            self.sql("SET statement_timeout = 50", "SELECT pg_sleep(2)", app="statement_timeout", check=False)
            self.sql("SELECT 1", app="no_database", check=False, PGDATABASE="no_such_db")
            self.sql("SELECT 1", app="no_role", check=False, PGUSER="no_such_role")
            self._deadlock()
            self._terminate()

    def _session(self, app: str) -> subprocess.Popen:
        return subprocess.Popen(["psql", "-X", "-q"], stdin=subprocess.PIPE, stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL, text=True, env=dict(self.env, PGAPPNAME=app))

    def _deadlock(self) -> None:
        """Two sessions lock two accounts in opposite orders: the server breaks the deadlock."""
        a, b = self._session("deadlock"), self._session("deadlock")
        for proc, first in ((a, 1), (b, 2)):
            proc.stdin.write(f"BEGIN;\nUPDATE pgbench_accounts SET abalance = abalance + 1 WHERE aid = {first};\n")
            proc.stdin.flush()
        time.sleep(0.3)  # both first updates hold their locks (psql gives no signal to wait on)
        for proc, second in ((a, 2), (b, 1)):
            proc.stdin.write(f"UPDATE pgbench_accounts SET abalance = abalance + 1 WHERE aid = {second};\n")
            proc.stdin.flush()
        for proc in (a, b):
            proc.stdin.write("COMMIT;\n")
            proc.stdin.close()
            proc.wait(timeout=30)

    def _terminate(self) -> None:
        victim = self._session("terminated")
        victim.stdin.write("SELECT pg_sleep(30);\n")
        victim.stdin.flush()
        deadline = time.monotonic() + 20
        query = ("SELECT count(pg_terminate_backend(pid)) FROM pg_stat_activity "
                 "WHERE application_name = 'terminated' AND state = 'active'")
        while True:  # until the victim's statement is running
            out = subprocess.run(["psql", "-X", "-At", "-c", query], env=dict(self.env, PGAPPNAME="terminator"),
                                 capture_output=True, text=True, timeout=30).stdout.strip()
            if out == "1" or time.monotonic() > deadline:
                break
        victim.stdin.close()
        victim.wait(timeout=30)
        assert out == "1", "the victim session never became active"


def _labels(log: Path) -> dict[str, str]:
    """session id -> the application name of its connection (``no_role`` when the role is unknown)."""
    labels = {}
    authorized = re.compile(r" ([0-9a-f]+\.[0-9a-f]+) \S+ LOG:  connection authorized: .*application_name=(\S+)")
    no_role = re.compile(r" ([0-9a-f]+\.[0-9a-f]+) \S+ FATAL:  role \"no_such_role\" does not exist")
    for line in log.read_text().splitlines():
        if m := authorized.search(line):
            labels[m.group(1)] = m.group(2)
        elif m := no_role.search(line):
            labels[m.group(1)] = "no_role"
    return labels


@pytest.fixture(scope="module")
def days():
    root = Path(tempfile.mkdtemp(prefix="tw-pg-", dir="/tmp"))  # the server's user must reach it
    server = Server(root)
    try:
        server.start()
        server.bench(2200)  # about 4,400 sessions: a calibration set large enough for 0.001
        server.own_client(40)
        cut = server.log.stat().st_size
        server.bench(600)
        server.own_client(15)
        server.faults(3)
        server.bench(100)
        server.stop()
        data = server.log.read_bytes()
        base, day = root / "baseline.log", root / "day.log"
        base.write_bytes(data[:cut])
        day.write_bytes(data[cut:])
        yield root, base, day
    finally:
        try:
            server.stop()
        except (subprocess.CalledProcessError, FileNotFoundError):
            pass  # already stopped
        shutil.rmtree(root, ignore_errors=True)


def test_server_log_times_are_read(days):
    _, base, _ = days
    line = base.read_text().splitlines()[-1]
    m = re.match(LINE_PATTERN, line) or re.match(r"^(?P<ts>\S+ \S+ [A-Z]+) ", line)
    stamp = m.group("ts")
    # expected: the same text read by the standard library (%Z takes "UTC")
    expected = datetime.strptime(stamp, "%Y-%m-%d %H:%M:%S.%f %Z").replace(tzinfo=timezone.utc).timestamp()
    assert parse_timestamp(stamp) == pytest.approx(expected, abs=1e-6)


def test_every_fault_caught_and_at_most_one_false_alarm_per_thousand(days, tmp_path):
    root, base, day = days
    cfg = tmp_path / "tracewatch.toml"
    cfg.write_text(f"""state_dir = "{tmp_path / 'state'}"
[[sources]]
name = "postgres"
format = "text"
line_pattern = '''{LINE_PATTERN}'''
[sessions]
idle_timeout_s = 30
[model]
false_alarm_rate = 0.001
""")
    run_cli("fit", "--config", str(cfg), str(base), check=True)
    out = run_cli("score", "--config", str(cfg), str(day)).stdout
    alerts = {a["session_key"]: a for a in map(json.loads, out.splitlines())}
    labels = _labels(day)
    normal = [k for k, app in labels.items() if app not in FAULTS]
    assert len(normal) >= 1200
    caught = Counter(labels[k] for k in alerts if labels.get(k) in FAULTS)
    planted = Counter(app for app in labels.values() if app in FAULTS)
    assert set(planted) == set(FAULTS), planted
    for kind in FAULTS:
        assert caught[kind] == planted[kind], (kind, caught, planted)
    false_alarms = [k for k in alerts if k in labels and labels[k] not in FAULTS]
    assert len(false_alarms) <= len(normal) / 1000, [alerts[k]["reasons"] for k in false_alarms]
