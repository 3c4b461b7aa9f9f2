"""Following files: new lines, partial lines, rotation, copytruncate, deletion, restarts.

Real files in a tmp folder; a fake monotonic clock drives the rotation grace, so no test sleeps
(except the two that wait for real filesystem notifications)."""

from __future__ import annotations

import os
import shutil
import threading
from pathlib import Path

import pytest

from tracewatch.config import parse_config
from tracewatch.errors import InputError
from tracewatch.sources.files import INVALID_UTF8, LINE_TOO_LONG, read_lines
from tracewatch.sources.follow import Follower, Watcher, watch_dirs

GRACE = 2.0


class Recorder:
    """The follower's sink: keeps what it was handed, in order."""

    def __init__(self) -> None:
        self.lines: list[tuple[str, str, str, int, str | None]] = []
        self.ended: list[tuple[str, str]] = []

    def feed_block(self, source, stream, lines, offsets, repairs) -> None:
        self.lines.extend((source, stream, line, offset, repair)
                          for line, offset, repair in zip(lines, offsets, repairs or [None] * len(lines)))

    def end_stream(self, source, stream) -> None:
        self.ended.append((source, stream))

    def texts(self) -> list[str]:
        return [x[2] for x in self.lines]


class Clock:
    def __init__(self) -> None:
        self.t = 1000.0

    def __call__(self) -> float:
        return self.t


def _follower(tmp_path: Path, *, start_at: str = "beginning", pattern: str = "logs/*.log",
              max_line_bytes: int = 65536, sink=None) -> tuple[Follower, Recorder, Clock]:
    (tmp_path / "logs").mkdir(exist_ok=True)
    cfg = parse_config({"sources": [{"name": "app", "paths": [str(tmp_path / pattern)], "start_at": start_at,
                                     "max_line_bytes": max_line_bytes}]})
    sink = sink or Recorder()
    clock = Clock()
    return Follower(cfg.sources, sink, rotation_grace_s=GRACE, rescan_interval_s=0.0, clock=clock), sink, clock


def _append(path: Path, text: str | bytes) -> None:
    with open(path, "ab") as fh:
        fh.write(text.encode() if isinstance(text, str) else text)


def _started(tmp_path: Path, text: str, **kw) -> tuple[Follower, Recorder, Clock, Path]:
    """A follower that has read ``text`` from logs/a.log (written before it started)."""
    f, sink, clock = _follower(tmp_path, **kw)
    log = tmp_path / "logs" / "a.log"
    _append(log, text)
    f.attach(None)
    f.poll()
    return f, sink, clock, log


def _stopped(tmp_path: Path, text: str) -> tuple[list[str], list[dict]]:
    """What a follower read of ``text`` before it stopped, and the positions it saved."""
    f, sink, _, _ = _started(tmp_path, text)
    saved = f.positions()
    f.close()
    return sink.texts(), saved


def _restarted(tmp_path: Path, saved: list[dict]) -> tuple[Follower, Recorder, Clock]:
    g, sink, clock = _follower(tmp_path)
    g.attach(saved)
    g.poll()
    return g, sink, clock


def test_complete_lines_with_offsets_and_a_held_partial_line(tmp_path):
    f, sink, _, log = _started(tmp_path, "one\ntwo\nthr")
    assert [(x[2], x[3]) for x in sink.lines] == [("one", 0), ("two", 4)]
    assert f.positions()[0]["offset"] == 8  # a restart re-reads the held partial line
    _append(log, "ee\n")
    f.poll()
    assert [(x[2], x[3]) for x in sink.lines][-1] == ("three", 8)
    f.close()


def test_decoding_matches_the_batch_reader(tmp_path):
    """Invalid UTF-8, over-long lines and CRLF: the same text, offsets and repair reasons as
    tracewatch.sources.files.read_lines (one decoding policy for batch and live)."""
    f, sink, _ = _follower(tmp_path, max_line_bytes=64)
    log = tmp_path / "logs" / "a.log"
    data = b"plain\r\n" + b"bad \xff\xfe bytes\n" + b"x" * 200 + b"\n" + b"y" * 64 + b"\r\n" + b"last\n"
    f.attach(None)
    # written in small pieces so lines are split across reads
    for i in range(0, len(data), 7):
        _append(log, data[i:i + 7])
        f.poll()
    got = [(x[2], x[3], x[4]) for x in sink.lines]
    assert got == list(read_lines(log, 64))
    assert {r for _, _, r in got} == {None, INVALID_UTF8, LINE_TOO_LONG}
    f.close()


@pytest.mark.parametrize("start_at, expected", [("end", ["new"]), ("beginning", ["old", "new"])],
                         ids=["start-at-end", "start-at-beginning"])
def test_first_start_honours_start_at_and_later_files_start_at_zero(tmp_path, start_at, expected):
    f, sink, _ = _follower(tmp_path, start_at=start_at)
    log = tmp_path / "logs" / "a.log"
    _append(log, "old\n")
    f.attach(None)
    _append(log, "new\n")
    _append(tmp_path / "logs" / "b.log", "appeared later\n")
    f.poll()
    assert [t for t in sink.texts() if t != "appeared later"] == expected
    assert "appeared later" in sink.texts()
    f.close()


def test_rotation_by_rename_finishes_the_old_file_first(tmp_path):
    f, sink, clock, log = _started(tmp_path, "1\n2\n")
    os.rename(log, tmp_path / "logs" / "a.log.1")  # no longer matched by *.log
    _append(tmp_path / "logs" / "a.log.1", "3\n")  # the writer still had the old file open
    _append(log, "4\n")
    f.poll()
    assert sink.texts() == ["1", "2", "3", "4"]
    assert sink.ended == []  # still within the grace period
    _append(tmp_path / "logs" / "a.log.1", "5 (late)\n")
    clock.t += GRACE / 2
    f.poll()
    clock.t += GRACE
    f.poll()
    assert sink.texts() == ["1", "2", "3", "4", "5 (late)"]
    assert len(sink.ended) == 1 and sink.ended[0][1] == sink.lines[0][1]  # the old stream ended
    assert [p["path"] for p in f.positions()] == [str(log)]
    f.close()


def test_rename_to_a_name_still_matched_is_followed_not_reread(tmp_path):
    f, sink, _, log = _started(tmp_path, "1\n", pattern="logs/a.log*")
    os.rename(log, tmp_path / "logs" / "a.log.1")
    _append(tmp_path / "logs" / "a.log.1", "2\n")
    f.poll()
    assert sink.texts() == ["1", "2"] and sink.ended == []
    assert [p["path"] for p in f.positions()] == [str(tmp_path / "logs" / "a.log.1")]
    f.close()


def test_copytruncate_reads_the_rest_from_the_copy_then_starts_again(tmp_path):
    f, sink, _ = _follower(tmp_path)
    log = tmp_path / "logs" / "a.log"
    head = "".join(f"line {i} with enough text to make a fingerprint\n" for i in range(4))
    _append(log, head)
    f.attach(None)
    f.poll()
    _append(log, "written before the copy, never read\n")
    shutil.copy(log, tmp_path / "logs" / "a.log.1")
    os.truncate(log, 0)
    _append(log, "after\n")
    f.poll()
    assert sink.texts()[4:] == ["written before the copy, never read", "after"]
    assert sink.lines[-1][3] == 0  # the file is read again from its start
    f.close()


def test_copytruncate_without_a_copy_starts_again_at_zero(tmp_path, caplog):
    f, sink, _ = _follower(tmp_path)
    f.chunk = 13  # read "first\nsecond\n" and leave the rest for the next poll
    log = tmp_path / "logs" / "a.log"
    _append(log, "first\nsecond\nunread\n")
    f.attach(None)
    f.poll()
    os.truncate(log, 0)
    _append(log, "x\n")
    f.poll()
    assert sink.texts() == ["first", "second", "x"]
    assert "before its last 7 bytes were read; they are lost" in caplog.text
    f.close()


def test_truncated_and_regrown_past_the_offset_is_seen_by_its_head(tmp_path):
    """The file was truncated and rewritten beyond the old offset between two polls: the size
    alone cannot tell, the head fingerprint can."""
    f, sink, _, log = _started(tmp_path, "aaaa\n")
    log.write_text("bbbbbbbb\ncc\n")
    f.poll()
    assert sink.texts() == ["aaaa", "bbbbbbbb", "cc"]
    f.close()


def test_a_copy_matched_by_the_globs_is_not_read_twice(tmp_path):
    head = "".join(f"copied line {i}, long enough for a head fingerprint\n" for i in range(3))
    f, sink, _, log = _started(tmp_path, head, pattern="logs/a.log*")
    shutil.copy(log, tmp_path / "logs" / "a.log.1")
    os.truncate(log, 0)
    _append(log, "fresh\n")
    f.poll()
    f.poll()
    assert sink.texts()[3:] == ["fresh"]
    f.close()


def test_deleted_file_is_read_to_its_end_then_finished(tmp_path):
    f, sink, clock, log = _started(tmp_path, "1\n")
    with open(log, "ab") as writer:
        log.unlink()
        writer.write(b"2\nno newline at the end")
    f.poll()
    clock.t += GRACE + 1
    f.poll()
    assert sink.texts() == ["1", "2", "no newline at the end"]  # as the batch reader does
    assert len(sink.ended) == 1 and f.tails == []
    f.close()


def test_restart_resumes_where_the_checkpoint_left_off(tmp_path):
    read, saved = _stopped(tmp_path, "1\n2\npart")
    log = tmp_path / "logs" / "a.log"
    _append(log, "ial\n3\n")
    g, sink2, _ = _restarted(tmp_path, saved)
    assert read + sink2.texts() == ["1", "2", "partial", "3"]
    g.close()


def test_restart_finds_a_file_rotated_while_stopped(tmp_path):
    read, saved = _stopped(tmp_path, "1\n")
    log = tmp_path / "logs" / "a.log"
    _append(log, "2\n")
    os.rename(log, tmp_path / "logs" / "a.log.1")
    _append(log, "3\n")
    g, sink2, clock = _restarted(tmp_path, saved)
    clock.t += GRACE + 1
    g.poll()
    assert read + sink2.texts() == ["1", "2", "3"]
    g.close()


def _lines(tag: str, n: int) -> str:
    return "".join(f"{tag} line {i}, long enough for a head fingerprint of its own\n" for i in range(n))


def _logrotate(logs: Path, how: str) -> None:
    """One rotation as logrotate names them: a.log.N → a.log.N+1, then a.log → a.log.1 by
    rename, or copied to a.log.1 and truncated in place (copytruncate)."""
    n = 1
    while (logs / f"a.log.{n}").exists():
        n += 1
    for k in range(n - 1, 0, -1):
        os.rename(logs / f"a.log.{k}", logs / f"a.log.{k + 1}")
    if how == "rename":
        os.rename(logs / "a.log", logs / "a.log.1")
    else:
        shutil.copyfile(logs / "a.log", logs / "a.log.1")
        if how == "copytruncate":
            os.truncate(logs / "a.log", 0)


def _read_all(g: Follower, clock: Clock) -> None:
    for _ in range(4):  # read the rotated files to their end, past the grace, then the rest
        g.poll()
        clock.t += GRACE + 1


@pytest.mark.parametrize("rotations", [
    ["copytruncate"], ["copytruncate", "copytruncate"], ["rename", "rename"], ["copytruncate", "rename"],
    ["rename", "copytruncate"],
], ids=["copytruncate", "two-copytruncates", "two-renames", "copytruncate-then-rename", "rename-then-copytruncate"])
def test_restart_after_rotations_while_stopped_reads_every_line_once(tmp_path, rotations):
    """Down across one or two rotations: the rest of the checkpointed file (from the copy when
    its inode was truncated), the files rotated in between from their start, then the file at the
    path — every line once, in the order written."""
    read, saved = _stopped(tmp_path, _lines("before", 5))
    logs = tmp_path / "logs"
    written = read + _lines("unread", 3).splitlines()
    _append(logs / "a.log", _lines("unread", 3))
    for i, how in enumerate(rotations):
        _logrotate(logs, how)
        _append(logs / "a.log", _lines(f"gen{i + 2}", 4))
        written += _lines(f"gen{i + 2}", 4).splitlines()
    g, sink2, clock = _restarted(tmp_path, saved)
    _read_all(g, clock)
    assert read + sink2.texts() == written
    g.close()


def test_restart_between_the_copy_and_the_truncate(tmp_path):
    """Restarted after the copy, before the truncate: the file is resumed where it was, and the
    truncate, when it comes, is finished from the copy."""
    read, saved = _stopped(tmp_path, _lines("before", 5))
    logs = tmp_path / "logs"
    _append(logs / "a.log", _lines("unread", 3))
    _logrotate(logs, "copy")
    g, sink2, clock = _restarted(tmp_path, saved)
    os.truncate(logs / "a.log", 0)
    _append(logs / "a.log", "after\n")
    _read_all(g, clock)
    assert read + sink2.texts() == read + _lines("unread", 3).splitlines() + ["after"]
    g.close()


def test_a_copy_whose_truncate_has_not_come_yet_is_not_read_with_the_rotations(tmp_path):
    """Down across a copytruncate and the copy of the next one: that copy is the file at the
    path, read through it (and finished from the copy once the truncate comes)."""
    read, saved = _stopped(tmp_path, _lines("before", 5))
    logs = tmp_path / "logs"
    _logrotate(logs, "copytruncate")
    _append(logs / "a.log", _lines("gen2", 4))
    _logrotate(logs, "copy")
    g, sink2, clock = _restarted(tmp_path, saved)
    _read_all(g, clock)
    assert sink2.texts() == _lines("gen2", 4).splitlines()
    os.truncate(logs / "a.log", 0)
    _append(logs / "a.log", "after\n")
    _read_all(g, clock)
    assert sink2.texts() == _lines("gen2", 4).splitlines() + ["after"]
    g.close()


def test_rotated_files_read_before_the_checkpoint_are_not_read_again(tmp_path):
    """A rotated file still open at the checkpoint, and copytruncates read since: after a
    restart, only what came after the checkpoint is read."""
    f, sink, clock, log = _started(tmp_path, _lines("gen1", 3))
    logs = tmp_path / "logs"
    _logrotate(logs, "rename")
    _append(log, _lines("gen2", 3))
    f.poll()  # a.log.1 is read to its end but not finished: still within the grace
    _logrotate(logs, "copytruncate")  # a.log.1 → a.log.2; a copy of gen2 is a.log.1
    _append(log, _lines("gen3", 3))
    f.poll()
    saved = f.positions()
    assert len(saved) == 2
    f.close()
    _append(log, "after the checkpoint\n")
    g, sink2, clock = _restarted(tmp_path, saved)
    _read_all(g, clock)
    assert sink.texts() + sink2.texts() == (_lines("gen1", 3) + _lines("gen2", 3) + _lines("gen3", 3)).splitlines() \
        + ["after the checkpoint"]
    g.close()


def test_an_empty_file_copytruncated_while_stopped(tmp_path):
    """Empty at the checkpoint (no head to know its copy by): the copy is found as a file
    rotated after the checkpoint."""
    f, sink, _ = _follower(tmp_path)
    logs = tmp_path / "logs"
    (logs / "a.log").touch()
    f.attach(None)
    f.poll()
    saved = f.positions()
    f.close()
    assert saved[0]["fp_len"] == 0
    _append(logs / "a.log", _lines("gen1", 3))
    _logrotate(logs, "copytruncate")
    _append(logs / "a.log", "after\n")
    g, sink2, clock = _restarted(tmp_path, saved)
    _read_all(g, clock)
    assert sink2.texts() == _lines("gen1", 3).splitlines() + ["after"]
    g.close()


def test_two_copytruncates_between_two_reads(tmp_path):
    """Running, but two copytruncates came before the follower looked again: the first copy
    from the offset, the second from its start, then the file."""
    f, sink, clock, log = _started(tmp_path, _lines("gen1", 3))
    logs = tmp_path / "logs"
    _append(log, _lines("unread", 2))
    _logrotate(logs, "copytruncate")
    _append(log, _lines("gen2", 3))
    _logrotate(logs, "copytruncate")
    _append(log, "after\n")
    _read_all(f, clock)
    assert sink.texts() == (_lines("gen1", 3) + _lines("unread", 2) + _lines("gen2", 3)).splitlines() + ["after"]
    f.close()


def test_restart_with_the_inode_reused_by_another_file(tmp_path, caplog):
    _, saved = _stopped(tmp_path, "the old file\n")
    saved[0]["fp"] = "0" * 32  # as if another file now had this inode: its head differs
    g, sink2, _ = _restarted(tmp_path, saved)
    assert "is gone since the checkpoint" in caplog.text
    assert sink2.texts() == ["the old file"]  # the file at the path is new to us: read from 0
    g.close()


def test_start_up_errors_name_the_folder(tmp_path):
    cfg = parse_config({"sources": [{"name": "app", "paths": [str(tmp_path / "missing" / "*.log")]}]})
    with pytest.raises(InputError, match="missing.*does not exist"):
        Follower(cfg.sources, Recorder()).check_paths()


def test_watch_dirs():
    assert watch_dirs("/var/log/app/*.log") == ("/var/log/app", False)
    assert watch_dirs("/var/log/*/app.log") == ("/var/log", True)
    assert watch_dirs("/var/log/app.log") == ("/var/log", False)


@pytest.mark.parametrize("polling", [False, True], ids=["native", "polling"])
def test_watcher_wakes_on_a_new_file(tmp_path, polling):
    """A real observer (inotify, or watchdog's polling observer): creating a file in a watched
    folder wakes the follower with a rescan hint."""
    woke = threading.Event()
    hints: list[bool] = []

    def wake(rescan: bool) -> None:
        hints.append(rescan)
        if rescan:
            woke.set()

    w = Watcher({str(tmp_path): False}, wake, polling=polling, interval=0.1)
    w.start()
    try:
        (tmp_path / "new.log").write_text("x\n")
        assert woke.wait(10), "no notification within 10 s"
    finally:
        w.stop()
    assert True in hints
