"""Reading ahead in a child process (tracewatch/sources/ahead.py): the same items, the same
errors and the same results as reading in the caller's process; no child left behind."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from collections import Counter
from pathlib import Path

import pytest

from tracewatch.baselines import load_baseline
from tracewatch.batch import assign_sources, run_files
from tracewatch.config import load_config
from tracewatch.errors import ConfigError, InputError
from tracewatch.pipeline import Pipeline
from tracewatch.sources.ahead import CAN_FORK, ReaderDied, read_ahead

from .conftest import ROOT, wait_for
from .daemon_helpers import fitted  # noqa: F401

pytestmark = pytest.mark.skipif(not CAN_FORK, reason="reading ahead forks, which tracewatch does on Linux only")


def _children(pid: int | None = None) -> set[int]:
    """A process's (this one's) live or not yet reaped child processes, from /proc."""
    pid = os.getpid() if pid is None else pid
    out: set[int] = set()
    for task in os.listdir(f"/proc/{pid}/task"):
        out.update(int(p) for p in Path(f"/proc/{pid}/task/{task}/children").read_text().split())
    return out


def _blocks(n: int):
    for i in range(n):
        yield [i, "x" * i, [float(i) / 3] * 3, None]


def test_the_child_gives_the_items_the_caller_would():
    before = _children()
    assert list(read_ahead(lambda: _blocks(50), in_child=True)) == list(read_ahead(lambda: _blocks(50), in_child=False))
    assert _children() == before


def test_a_large_item_crosses_whole():
    big = [("line %d " % i) * 20 for i in range(100_000)]  # ~15 MB pickled: many pipe buffers
    assert list(read_ahead(lambda: iter([big, big[:3]]), in_child=True)) == [big, big[:3]]


def test_a_tracewatch_error_in_the_child_reaches_the_caller_as_it_is(tmp_path):
    cfg_path = tmp_path / "tw.toml"
    cfg_path.write_text(f"state_dir = '{tmp_path / 'state'}'\n[[sources]]\nname = 'app'\nformat = 'text'\n")
    cfg = load_config(cfg_path)
    missing = tmp_path / "gone.log"
    with pytest.raises(InputError, match=r"gone\.log: cannot read"):
        run_files(Pipeline(cfg), [("app", missing)], ahead=True)
    with pytest.raises(InputError, match=r"gone\.log: cannot read"):
        run_files(Pipeline(cfg), [("app", missing)], ahead=False)


def _fails():
    yield 1
    raise ZeroDivisionError("a bug in a format")


def _dies():
    yield 1
    os._exit(3)


def test_a_bug_in_the_child_comes_back_with_the_child_traceback():
    items = []
    with pytest.raises(ReaderDied, match=r"(?s)ZeroDivisionError: a bug in a format") as err:
        for item in read_ahead(_fails, in_child=True):
            items.append(item)
    assert items == [1] and "_fails" in str(err.value)  # where in the child it happened


def test_a_child_that_dies_without_a_word_is_an_error_not_the_end_of_the_input():
    before = _children()
    with pytest.raises(ReaderDied, match="ended without a word"):
        list(read_ahead(_dies, in_child=True))
    assert _children() == before


def test_a_caller_that_stops_early_leaves_no_child():
    before = _children()
    items = read_ahead(lambda: _blocks(10_000), in_child=True)
    assert next(items) == [0, "", [0.0] * 3, None]
    items.close()
    assert _children() == before


def test_output_buffered_before_the_fork_is_written_once(tmp_path):
    code = ("import sys; from tracewatch.sources.ahead import read_ahead\n"
            "sys.stdout.write('before '); x = list(read_ahead(lambda: iter([1, 2]), in_child=True))\n"
            "sys.stdout.write(f'after {x}')\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, cwd=ROOT).stdout
    assert out == "before after [1, 2]"


def _scored(cfg, path: Path, ahead: bool) -> tuple[list, Counter]:
    verdicts: list = []
    pipe = Pipeline(cfg, load_baseline(cfg.state_dir, None), on_verdict=verdicts.append, score_all=True)
    run_files(pipe, assign_sources(cfg, [str(path)]), ahead=ahead)
    return verdicts, pipe.lines + pipe.records + Counter(pipe.rejected) + Counter(pipe.repaired)


def test_a_score_read_ahead_is_the_score_read_here(fitted, tmp_path):
    root, cfg_path, _, lines, _ = fitted
    cfg = load_config(cfg_path)
    day = tmp_path / "day.log"
    # the day with what the format and the reader reject or mend: a blank line, a line the
    # pattern does not match, invalid UTF-8
    day.write_bytes(("\n".join(lines[:100]) + "\n\nnot a log line\n").encode() + b"\xff\xfe bad bytes\n"
                    + ("\n".join(lines[100:]) + "\n").encode())
    here, counts_here = _scored(cfg, day, ahead=False)
    there, counts_there = _scored(cfg, day, ahead=True)
    assert len(here) > 50 and here == there
    assert counts_here == counts_there and counts_here[("api", "invalid_utf8")] == 1


def test_files_merged_by_time_read_ahead_score_as_read_here(fitted, tmp_path):
    """Several files are merged by record time (batch.TimeMerge); the order the reader picks
    blocks in comes from the times the format read, so it is the same in the child."""
    root, cfg_path, _, lines, _ = fitted
    cfg = load_config(cfg_path)
    parts = [tmp_path / f"host{i}.log" for i in range(3)]
    for i, path in enumerate(parts):
        path.write_text("\n".join(lines[i::3]) + "\n")
    verdicts = {}
    for ahead in (False, True):
        pipe = Pipeline(cfg, load_baseline(cfg.state_dir, None), on_verdict=verdicts.setdefault(ahead, []).append,
                        score_all=True)
        run_files(pipe, assign_sources(cfg, [str(p) for p in parts]), ahead=ahead)
    assert len(verdicts[False]) > 50 and verdicts[True] == verdicts[False]


def test_line_numbers_read_ahead_are_the_ones_read_here(fitted):
    """``templates`` numbers lines from the offsets of every block read (``on_block``)."""
    root, cfg_path, base, _, _ = fitted
    cfg = load_config(cfg_path)
    seen = {True: [], False: []}
    for ahead in seen:
        run_files(Pipeline(cfg), assign_sources(cfg, [str(base)]), ahead=ahead,
                  on_block=lambda stream, offsets, ahead=ahead: seen[ahead].extend(offsets))
    assert len(seen[True]) == len(base.read_text().splitlines()) and seen[True] == seen[False]


def _gone(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (FileNotFoundError, ProcessLookupError):
        return True
    return state == "Z"  # a zombie: exited, waiting for whoever reaps it


def _as_on_a_terminal() -> None:
    """Ctrl-C as a terminal's foreground command has it: SIGINT neither ignored nor blocked
    (a shell's background job, or a CI runner, may hand either on to its children)."""
    signal.signal(signal.SIGINT, signal.SIG_DFL)
    signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGINT})


def _score(cfg_path, path) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "tracewatch", "score", "--config", str(cfg_path), str(path)],
                            cwd=ROOT, env=dict(os.environ, PYTHONPATH=str(ROOT)), stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, text=True, start_new_session=True,
                            preexec_fn=_as_on_a_terminal)


def test_ctrl_c_ends_a_batch_run_and_its_reader(fitted, tmp_path):
    """A real `tracewatch score` interrupted while its reader runs: Ctrl-C (SIGINT to the
    process group, as a terminal sends it) ends both, and the reader adds no error of its own."""
    root, cfg_path, _, lines, _ = fitted
    big = tmp_path / "big.log"
    big.write_text("\n".join(lines * 600) + "\n")  # long enough to be stopped halfway
    proc = _score(cfg_path, big)
    try:
        reader = next(iter(wait_for(lambda: _children(proc.pid), 120, what="the reader process")))
        os.killpg(proc.pid, signal.SIGINT)
        code, err = proc.wait(timeout=60), proc.stderr.read()
        # 130 (tracewatch's own exit on Ctrl-C) or death by SIGINT, which a shell reports as 130
        # too (seen once under a CI runner, cause not found); never a reader error or exit 0/1
        assert code in (130, -signal.SIGINT), (code, err)
        assert "ReaderDied" not in err and "internal error" not in err, err
        wait_for(lambda: _gone(reader), 60, what="the reader to end")
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()


def test_a_parent_killed_outright_takes_its_reader_with_it(fitted, tmp_path):
    """The input is a pipe whose writer stays quiet after a few lines, so the reader waits on
    it and would never learn by writing that its parent is gone; killed with the parent
    (PR_SET_PDEATHSIG), it ends at once."""
    root, cfg_path, _, lines, _ = fitted
    fifo = tmp_path / "live.log"
    os.mkfifo(fifo)
    proc = _score(cfg_path, fifo)
    writer = open(fifo, "w")  # noqa: SIM115 - held open, quiet, until the end of the test
    try:
        writer.write("\n".join(lines[:50]) + "\n")
        writer.flush()
        reader = next(iter(wait_for(lambda: _children(proc.pid), 120, what="the reader process")))
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=60)
        wait_for(lambda: _gone(reader), 10, what="the reader to end with its parent")
    finally:
        writer.close()
        if proc.poll() is None:
            proc.kill()
            proc.wait()


def test_an_error_crosses_by_name_only_for_tracewatch_errors():
    """The child hands an error over as a class name and a message (plain JSON): only names of
    tracewatch's own errors come back as those errors; anything else is a ReaderDied."""
    from tracewatch.sources.ahead import _error

    err = _error("ConfigError", "config: bad key")
    assert type(err) is ConfigError and str(err) == "config: bad key" and err.exit_code == 2
    for name in ("RuntimeError", "system", "__class__", "ReaderDied"):
        assert type(_error(name, "text")) is ReaderDied
