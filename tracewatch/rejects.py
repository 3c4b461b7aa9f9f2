"""Reject sample: a bounded, redacted sample of the lines formats rejected, for people to read.

Stage: formats → **rejects** (beside the pipeline). Every rejected line is counted by the
pipeline; a sample of them is appended to ``<state_dir>/rejects.jsonl``, one JSON object a
line: ``{"time", "source", "reason", "line"}``. The file holds at most ``max_lines`` lines; when
full it becomes ``rejects.jsonl.1`` (replacing the older one) and a new file starts. At most
``per_reason`` lines of one (source, reason) are written by one process, so a flood of one kind
of bad line cannot crowd out the rest nor cost a write per line; blank lines are not sampled. Lines are cut to
``max_chars`` and passed through the redactor before they are written. A sample that cannot be
written (read-only disk) is given up quietly: it must never stop the pipeline.
"""

from __future__ import annotations

import time
from collections import Counter
from collections.abc import Callable
from functools import lru_cache
from pathlib import Path

import orjson

FILE_NAME = "rejects.jsonl"
MAX_LINES = 1000
PER_REASON = 100
MAX_CHARS = 500
NOT_SAMPLED = frozenset({"empty"})  # blank lines are counted, but there is nothing to read


class RejectLog:
    def __init__(self, path: Path, *, max_lines: int = MAX_LINES, per_reason: int = PER_REASON,
                 max_chars: int = MAX_CHARS, clock: Callable[[], float] = time.time) -> None:
        self.path = Path(path)
        self.max_lines = max_lines
        self.per_reason = per_reason
        self.max_chars = max_chars
        self.clock = clock
        self.written: Counter = Counter()  # (source, reason) -> lines written by this process
        self._lines: int | None = None  # lines in the current file, counted on first use
        self.broken = False

    def add(self, source: str, reason: str, line: str, redact: Callable[[str], str] = str) -> bool:
        """Append one rejected line if the bounds allow; True when it was written."""
        if self.broken or reason in NOT_SAMPLED or self.written[(source, reason)] >= self.per_reason:
            return False
        entry = {"time": round(self.clock(), 3), "source": source, "reason": reason,
                 "line": redact(line[:self.max_chars])}
        try:
            self._append(orjson.dumps(entry) + b"\n")
        except OSError:
            self.broken = True
            return False
        self.written[(source, reason)] += 1
        return True

    def _append(self, data: bytes) -> None:
        if self._lines is None:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            try:
                with open(self.path, "rb") as fh:
                    self._lines = sum(1 for _ in fh)
            except FileNotFoundError:
                self._lines = 0
        if self._lines >= self.max_lines:
            self.path.replace(self.path.with_name(self.path.name + ".1"))
            self._lines = 0
        with open(self.path, "ab") as fh:
            fh.write(data)
        self._lines += 1


@lru_cache(maxsize=64)
def reject_log(state_dir: Path) -> RejectLog:
    """The reject sample of one state directory, shared by every pipeline in this process."""
    return RejectLog(Path(state_dir) / FILE_NAME)
