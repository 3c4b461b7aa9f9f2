"""Live sources that are not file globs: the journal (journalctl) and the OTLP/HTTP spool.

Stage: **sources** (daemon) → formats. The daemon drives each such source as it drives the
file follower, in the same loop, under the same lock, into the same pipeline:

- ``attach(position, sink)`` once: resume after ``position`` (what :meth:`position` gave at the
  last checkpoint; None on a first start), handing lines to ``sink`` (the pipeline's
  ``feed_block`` / ``end_stream``, as the follower does);
- ``poll()`` every turn: hand on what has come; True while more is waiting;
- ``position()`` when a checkpoint is written — an opaque text saved beside the files' offsets,
  naming the first line not yet handed on — and ``saved()`` once it is on disk;
- ``status()``: one row shaped like a followed file's (source, path, offset, size, lag_bytes,
  lag_seconds, state), so ``/api/status`` and the lag metrics show it as they show files;
- ``detached``: why it is not reading now (None while it is), which ``/readyz`` reports;
- ``close()``.

Exactly-once holds as for files: a checkpoint saves the position together with the open
sessions and the alert journal's length, and a restart hands on what comes after it.
"""

from __future__ import annotations

from pathlib import Path
from typing import Protocol

from ..config import Config
from .follow import LineSink


class StreamSource(Protocol):
    source: str
    detached: str | None

    def attach(self, position: str | None, sink: LineSink) -> None: ...

    def poll(self) -> bool: ...

    def position(self) -> str | None: ...

    def saved(self) -> None: ...

    def status(self) -> dict: ...

    def close(self) -> None: ...


def is_file_source(cfg: Config, name: str) -> bool:
    """Whether the file follower reads source ``name`` (not the journal, not the OTLP receiver)."""
    src = cfg.source(name)
    return src.journalctl_args is None and not cfg.receives_otlp(name)


def stream_sources(cfg: Config, state_dir: Path) -> list[StreamSource]:
    """The daemon's sources that are not file globs, one object per source."""
    from .journal import JournalFollower
    from .spool import Spool

    out: list[StreamSource] = []
    for src in cfg.sources:
        if src.journalctl_args is not None:
            out.append(JournalFollower(src))
        elif cfg.receives_otlp(src.name):
            o = cfg.otlp
            out.append(Spool(src.name, state_dir / "otlp" / src.name, max_queue_bytes=o.max_queue_bytes,
                             file_bytes=o.spool_file_bytes, max_line_bytes=src.line_limit))
    return out
