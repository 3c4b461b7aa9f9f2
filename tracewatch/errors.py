"""Every error tracewatch raises on purpose.

    TracewatchError                 base; the CLI prints its message as one line
    ├── ConfigError                 bad config file, key, type or regex (exit code 2)
    ├── InputError                  an input file that cannot be read
    ├── BaselineError               no baseline, or a corrupt / foreign / incompatible one
    │   └── NoBaselineError         nothing has been fitted yet
    └── StateError                  a state file (checkpoint, store) that cannot be used

Third-party errors are translated at the boundary with ``raise ... from exc`` so callers
catch ours, not the library's.
"""

from __future__ import annotations


class TracewatchError(Exception):
    """Base class; ``str(err)`` is a complete, user-facing sentence."""

    exit_code = 1


class ConfigError(TracewatchError):
    exit_code = 2


class InputError(TracewatchError):
    exit_code = 1


class BaselineError(TracewatchError):
    exit_code = 1


class NoBaselineError(BaselineError):
    exit_code = 1


class StateError(TracewatchError):
    exit_code = 1
