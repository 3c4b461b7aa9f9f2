"""Every error tracewatch raises on purpose.

    TracewatchError                 base; the CLI prints its message as one line
    ├── ConfigError                 bad config file, key, type or regex (exit code 2)
    ├── InputError                  an input file that cannot be read
    ├── BaselineError               no baseline, or a corrupt / foreign / incompatible one
    │   └── NoBaselineError         nothing has been fitted yet
    ├── StateError                  a state file (checkpoint, store) that cannot be used
    └── IncidentError               a change asked of an incident that cannot be made
        ├── IncidentNotFound        no incident with that id
        └── InvalidTransition       not allowed from the incident's status (or it had a new alert)

Third-party errors are translated at the boundary with ``raise ... from exc`` so callers
catch ours, not the library's. The incident errors are domain outcomes: the incident layer
raises them and only the HTTP layer turns them into status codes (404, 409).
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


class IncidentError(TracewatchError):
    exit_code = 1


class IncidentNotFound(IncidentError):
    def __init__(self, incident_id: int) -> None:
        super().__init__(f"no incident {incident_id}")
        self.incident_id = incident_id


class InvalidTransition(IncidentError):
    """``str(err)`` says why, e.g. "incident 3 is resolved; it cannot be marked acknowledged"."""


def first_problem(exc) -> str:
    """A pydantic ``ValidationError``'s first problem as ``where: what`` — one short line for a
    message about a damaged state file (the full list stays on the exception's cause)."""
    errors = exc.errors(include_url=False, include_input=False)
    if not errors:
        return str(exc).splitlines()[0]
    err = errors[0]
    where = ".".join(str(p) for p in err["loc"]) or "value"
    more = f" (and {len(errors) - 1} more)" if len(errors) > 1 else ""
    return " ".join(f"{where}: {err['msg']}".split())[:200] + more
