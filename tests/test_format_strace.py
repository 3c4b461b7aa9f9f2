"""Format ``strace``: line forms of ``strace -f`` output, then real traces of real commands
recorded with strace, fitted and scored."""

from __future__ import annotations

import math
import os
import shutil
import subprocess
from collections import Counter
from datetime import datetime, timedelta
from pathlib import Path

import pytest

from tracewatch.batch import fit_files, score_files
from tracewatch.config import SourceConfig, parse_config
from tracewatch.formats import feed_lines
from tracewatch.formats.strace import StraceFormat
from tracewatch.records import Record, Rejection

CLOCK = datetime(2026, 11, 30, 15, 0).timestamp()  # local time, as strace -t/-tt print it


def fmt(**kw) -> StraceFormat:
    f = StraceFormat(SourceConfig(name="st", format="strace", **kw))
    f.dated_by(lambda: CLOCK)
    return f


def feed_all(f: StraceFormat, text: str) -> list:
    return feed_lines(f, text.strip("\n").splitlines())


# -- line forms (the shapes below are what strace 6 prints; see strace(1), options -f -t -tt
# -ttt -T and the "<unfinished ...>" / "<... resumed>" convention) ------------------------------
def test_calls_errors_signals_and_exits():
    out = feed_all(fmt(), """\
4703  access("/etc/ld.so.preload", R_OK) = -1 ENOENT (No such file or directory)
4703  openat(AT_FDCWD, "/etc/ld.so.cache", O_RDONLY|O_CLOEXEC) = 3
4703  write(1, "f(x) = 3\\n", 9)           = 9
4703  rt_sigsuspend([], 8)              = ? ERESTARTNOHAND (To be restarted if no handler)
4703  --- SIGCHLD {si_signo=SIGCHLD, si_code=CLD_EXITED, si_pid=4706, si_uid=0, si_status=0} ---
4703  exit_group(0)                     = ?
4703  +++ exited with 0 +++
4704  +++ killed by SIGSEGV (core dumped) +++
""")
    assert [r.event for r in out] == ["access:ENOENT", "openat", "write", "rt_sigsuspend:ERESTARTNOHAND",
                                      "signal:SIGCHLD", "exit_group", "exited:0", "killed:SIGSEGV"]
    assert all(isinstance(r, Record) and r.message == r.event for r in out)
    assert [r.key for r in out] == ["4703"] * 7 + ["4704"]


def test_unfinished_and_resumed_are_joined():
    text = """\
4703  1796163445.001985 vfork( <unfinished ...>
4704  1796163445.002356 execve("/usr/bin/cat", ["cat", "/etc/hostname"], 0x55 /* 35 vars */ <unfinished ...>
4703  1796163445.002521 <... vfork resumed>) = 4704 <0.000524>
4703  1796163445.002586 wait4(-1,  <unfinished ...>
4704  1796163445.002694 <... execve resumed>) = 0 <0.000318>
4704  1796163445.023594 exit_group(0)   = ?
4704  1796163445.023934 +++ exited with 0 +++
4703  1796163445.024045 <... wait4 resumed>[{WIFEXITED(s) && WEXITSTATUS(s) == 0}], 0, NULL) = 4704 <0.021402>
"""
    out = feed_all(fmt(), text)
    assert [(r.key, r.event) for r in out] == [("4703", "vfork"), ("4704", "execve"), ("4704", "exit_group"),
                                               ("4704", "exited:0"), ("4703", "wait4")]
    vfork = out[0]
    assert vfork.ts == 1796163445.001985 and vfork.offset == 0  # the time and line the call started
    assert vfork.raw.count("\n") == 1 and "<... vfork resumed>" in vfork.raw


def test_process_tree_sessions_follow_forks():
    text = """\
[pid   100] clone(child_stack=NULL, flags=CLONE_CHILD_CLEARTID|SIGCHLD, child_tidptr=0x7f) = 101
[pid   101] execve("/bin/true", ["true"], 0x55 /* 3 vars */) = 0
[pid   100] vfork( <unfinished ...>
[pid   102] execve("/bin/false", ["false"], 0x55 /* 3 vars */ <unfinished ...>
[pid   100] <... vfork resumed>) = 102
[pid   101] clone3({flags=CLONE_VM|CLONE_THREAD, exit_signal=0}, 88) = 103
[pid   103] futex(0x7f, FUTEX_WAIT_PRIVATE, 2, NULL <unfinished ...>
[pid   103] +++ exited with 0 +++
[pid   102] <... execve resumed>) = 0
[pid   200] getpid() = 200
"""
    tree = feed_all(fmt(strace_session="tree"), text)
    # 102 wrote before vfork returned: it joins the process with a fork in flight; 103 is a
    # thread of 101, a child of 100; 200 started no one's tree
    assert [r.key for r in tree] == ["100"] * 7 + ["200"]
    assert [r.event for r in tree if r.key == "100"][-3:] == ["futex", "exited:0", "execve"]
    by_pid = feed_all(fmt(), text)
    assert Counter(r.key for r in by_pid) == {"100": 2, "101": 2, "102": 1, "103": 2, "200": 1}


@pytest.mark.parametrize("line,ts", [
    ("4703  1796163445.991991 getpid() = 4703", 1796163445.991991),  # -ttt
    ("4703  15:01:02.250000 getpid() = 4703", datetime(2026, 11, 30, 15, 1, 2, 250000).timestamp()),  # -tt
    ("15:01:02 getpid() = 4703", datetime(2026, 11, 30, 15, 1, 2).timestamp()),  # -t, no -f
    ("[pid  4703] getpid() = 4703 <0.000010>", None),  # -T only
], ids=["ttt", "tt", "t-no-pid", "T"])
def test_time_prefixes(line, ts):
    [rec] = fmt().feed(line, 0)
    assert rec.event == "getpid" and rec.ts == (pytest.approx(ts) if ts else None)
    assert rec.key == ("main" if line.startswith("15:") else "4703")


def test_time_of_day_rolls_over_midnight():
    f = fmt()
    [a] = f.feed("1  23:59:59.900000 getpid() = 1", 0)
    [b] = f.feed("1  00:00:00.100000 getpid() = 1", 1)
    assert b.ts - a.ts == pytest.approx(0.2)


def test_a_replayed_file_is_dated_by_its_modification_time(tmp_path):
    """``strace -f -tt`` prints the local time of day and no date: a file replayed in batch is
    dated by its modification time (written after its last line), whatever the wall clock says.
    The trace runs from 23:45 to 00:15 and was last written at 00:20: its first lines belong to
    the day before the file's date, its last to the file's date."""
    first = datetime(2025, 3, 13, 23, 45)  # local time, as strace prints it
    lines = []
    for n in range(120):  # a process every 15 s: three calls and its exit, a second in all
        t = first + timedelta(seconds=15 * n)
        lines += [f"{1000 + n}  {t + timedelta(seconds=0.25 * i):%H:%M:%S.%f} {call}"
                  for i, call in enumerate(('openat(AT_FDCWD, "/srv/lockers.db", O_RDONLY) = 3',
                                            'read(3, "PX1", 3) = 3', "close(3) = 0", "+++ exited with 0 +++"))]
    trace = tmp_path / "day.strace"
    trace.write_text("\n".join(lines) + "\n")
    written = datetime(2025, 3, 14, 0, 20).timestamp()
    os.utime(trace, (written, written))
    assert datetime.now().date() not in (first.date(), first.date() + timedelta(days=1))  # else the clock would do
    cfg = parse_config({"state_dir": str(tmp_path / "state"), "sources": [{"name": "st", "format": "strace"}],
                        "model": {"false_alarm_rate": 0.05}})
    baseline, _, _ = fit_files(cfg, [("st", trace)])
    verdicts: list[dict] = []
    score_files(cfg, [("st", trace)], baseline, verdicts.append, score_all=True)
    got = sorted((v["session_key"], v["start"], v["end"]) for v in verdicts)
    t0 = first.timestamp()
    assert got == [(str(1000 + n), pytest.approx(t0 + 15 * n), pytest.approx(t0 + 15 * n + 0.75)) for n in range(120)]


def test_a_call_left_unfinished_at_exit_or_end_is_kept():
    out = feed_all(fmt(), """\
7  futex(0x7f, FUTEX_WAIT_PRIVATE, 2, NULL <unfinished ...>
7  +++ exited with 0 +++
8  read(0,  <unfinished ...>
""")
    assert [(r.key, r.event) for r in out] == [("7", "futex"), ("7", "exited:0"), ("8", "read")]


def test_state_kept_per_process_is_bounded(monkeypatch):
    import tracewatch.formats.strace as strace_format

    monkeypatch.setattr(strace_format, "MAX_TRACKED", 4)
    f = fmt(strace_session="tree")
    out = []
    for pid in range(10):  # calls that never resume, from processes that never exit
        out += f.feed(f"{pid}  read(0,  <unfinished ...>", pid)
    assert len(f._unfinished) <= 4 and len(f._root) <= 4
    assert len(out) + len(f.flush()) == 10  # the oldest were handed on early, none lost


@pytest.mark.parametrize("line", [
    "strace: Process 4704 attached",
    "cat: /nonexist: No such file or directory",
    '4703  openat(AT_FDCWD, "/etc/ld.so.cache", O_RDONL',  # cut by the line limit
    "   0.000117 getpid() = 1",  # -r relative times are not read
], ids=["strace-notice", "program-stderr", "cut-line", "relative-time"])
def test_other_lines_are_rejected_and_kept_out_of_sequences(line):
    [out] = fmt().feed(line, 0)
    assert isinstance(out, Rejection) and out.reason == "not_strace" and out.record is None


# -- real strace output of real commands ---------------------------------------------------------
NORMAL = "cat data.txt >/dev/null; wc -l data.txt >/dev/null"
MISSING_FILE = "cat missing.txt >/dev/null; wc -l data.txt >/dev/null"
EXTRA_CHILD = "cat data.txt >/dev/null; id >/dev/null; wc -l data.txt >/dev/null"


@pytest.fixture(scope="module")
def recorded(tmp_path_factory) -> dict[str, list[Path]]:
    """``strace -f -ttt -T`` of a small shell program: 60 normal runs for the baseline, then 20
    normal runs, 5 reading a missing file and 5 spawning an unexpected child."""
    strace = shutil.which("strace")
    if strace is None:
        pytest.skip("strace is not installed (make test installs it with apt-get when it can)")
    folder = tmp_path_factory.mktemp("strace")
    (folder / "data.txt").write_text("parcel PX1 compartment 7\n")
    probe = subprocess.run([strace, "-f", "-o", "/dev/null", "true"], capture_output=True, text=True)
    if probe.returncode != 0:
        pytest.skip(f"strace cannot trace here: {probe.stderr.strip()[:200]}")
    runs: dict[str, list[Path]] = {"baseline": [], "normal": [], "missing_file": [], "extra_child": []}
    plan = [("baseline", NORMAL)] * 60 + [("normal", NORMAL)] * 20 + [("missing_file", MISSING_FILE)] * 5 \
        + [("extra_child", EXTRA_CHILD)] * 5
    for i, (kind, script) in enumerate(plan):
        out = folder / f"{kind}-{i:03d}.strace"
        subprocess.run([strace, "-f", "-ttt", "-T", "-o", str(out), "sh", "-c", script], cwd=folder,
                       timeout=60, env={"PATH": "/usr/bin:/bin", "LC_ALL": "C"}, stderr=subprocess.DEVNULL)
        runs[kind].append(out)
    return runs


def pids_of(path: Path) -> set[str]:
    return {line.split(None, 1)[0] for line in path.read_text().splitlines() if line[:1].isdigit()}


@pytest.mark.parametrize("mode,rate,ngram_max", [
    # by pid: 60 runs give 180 sessions (sh, cat, wc), 45 of them for calibration, enough for
    # a false-alarm rate of 0.05 (split-conformal needs n >= 1/rate - 1 = 19)
    ("pid", 0.05, 3),
    # by tree: 60 sessions, 15 for calibration: 0.1 is the smallest rate they support (n >= 9).
    # The processes of a tree run at once and their lines interleave as the scheduler pleases,
    # so order across processes is noise: count events (n = 1), as the strace format advises
    ("tree", 0.1, 1),
])
def test_unusual_runs_are_flagged(tmp_path, recorded, mode, rate, ngram_max):
    cfg = parse_config({"state_dir": str(tmp_path / "state"),
                        "sources": [{"name": "st", "format": "strace", "strace_session": mode}],
                        "sessions": {"max_events": 100_000}, "features": {"ngram_max": ngram_max},
                        "model": {"false_alarm_rate": rate}})
    baseline, _, fitted = fit_files(cfg, [("st", p) for p in recorded["baseline"]])
    assert baseline.report["sessions"] == (180 if mode == "pid" else 60)
    assert not fitted.rejected  # every line of real strace output is read
    verdicts: dict[str, dict] = {}
    day = [p for kind in ("normal", "missing_file", "extra_child") for p in recorded[kind]]
    score_files(cfg, [("st", p) for p in day], baseline, lambda v: verdicts.__setitem__(v["session_key"], v),
                score_all=True)
    flagged = Counter()
    for kind in ("normal", "missing_file", "extra_child"):
        for path in recorded[kind]:
            keys = pids_of(path) & set(verdicts)
            assert keys, path
            flagged[kind] += any(verdicts[k]["alert"] for k in keys)
    assert flagged["missing_file"] == 5 and flagged["extra_child"] == 5
    # Normal runs: the false-alarm rate is a rate, not a promise of none. Real processes on a
    # busy machine now and then make a call the baseline never saw (a restarted or interrupted
    # syscall), so allow twice the configured rate over the normal sessions (pid mode: 3
    # processes per run), the bound the detection tests use.
    sessions_per_run = 3 if mode == "pid" else 1
    assert flagged["normal"] <= math.ceil(2 * rate * sessions_per_run * len(recorded["normal"]))
    # a failed read shows as the failed openat and the exit status the baseline never saw
    for path in recorded["missing_file"]:
        unseen = {u["template"] for k in pids_of(path) if k in verdicts for u in verdicts[k]["unseen_events"]}
        assert {"openat:ENOENT", "exited:1"} <= unseen
