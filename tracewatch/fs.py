"""Small filesystem helpers shared by every stage that keeps state on disk.

Baselines, checkpoints, the triage model and the refit pool are all written with
:func:`atomic_write`: a reader (or a restart after a crash) sees the old file or the new one,
never half of either.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Iterable
from pathlib import Path


def atomic_write(path: Path, data: bytes | Iterable[bytes]) -> None:
    """Write ``data`` (bytes, or pieces of bytes) to ``path`` via a temp file, fsync and rename:
    never a half-written file. The folder is fsynced too, so the rename survives a crash."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.")
    try:
        with os.fdopen(fd, "wb") as fh:
            if isinstance(data, bytes):
                fh.write(data)
            else:
                for piece in data:
                    fh.write(piece)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    fsync_dir(path.parent)


def fsync_dir(folder: Path) -> None:
    """Make a rename or a new file in ``folder`` durable."""
    dir_fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(dir_fd)
    finally:
        os.close(dir_fd)
