"""Baseline hot reload: notices when another baseline becomes current and loads it.

Stage: baselines (``<state_dir>/baselines/``, written by ``tracewatch fit``, ``baselines use``
and the refit job) → the daemon, which switches its pipeline to what :meth:`BaselineWatch.check`
hands it. A baseline that cannot be loaded is refused — logged and counted — and the one in
use is kept; the same broken version is not retried until its files change.
"""

from __future__ import annotations

import logging
import os
from pathlib import Path

from ..baselines import baselines_dir, current_version, load_baseline_dir
from ..model.baseline import Baseline
from ..errors import BaselineError

log = logging.getLogger("tracewatch.daemon")


class BaselineWatch:
    """Watches ``CURRENT`` and the current version's manifest (inode, mtime, size)."""

    def __init__(self, state_dir: Path) -> None:
        self.state_dir = Path(state_dir)
        self.failures = 0  # new baselines refused
        self._sig: tuple | None = None

    def _signature(self, version: str | None) -> tuple | None:
        if version is None:
            return None
        try:
            st = os.stat(baselines_dir(self.state_dir) / version / "manifest.json")
        except OSError:
            return (version,)
        return version, st.st_ino, st.st_mtime_ns, st.st_size

    def loaded(self, version: str) -> None:
        """``version`` is the one in use now (read at start)."""
        self._sig = self._signature(version)

    def check(self, in_use: str, *, force: bool = False) -> Baseline | None:
        """The baseline to switch to, when another one became current (or with ``force``, when
        the current one is not ``in_use``); None when nothing changed or it was refused."""
        try:
            version = current_version(self.state_dir)
        except BaselineError as exc:
            log.error("%s; still using baseline %s", exc, in_use)
            return None
        sig = self._signature(version)
        if version is None or (sig == self._sig and not (force and version != in_use)):
            return None
        self._sig = sig
        try:
            return load_baseline_dir(baselines_dir(self.state_dir) / version)
        except BaselineError as exc:
            self.failures += 1
            log.error("new baseline refused: %s; still using %s", exc, in_use)
            return None
