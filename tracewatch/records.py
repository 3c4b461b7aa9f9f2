"""The unit that formats hand on to the rest of the pipeline: one parsed record.

Stage: formats → **records** → templates. A record is a line (or a JSON document, a span,
a syscall) reduced to what the later stages need.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(slots=True)
class Record:
    """One parsed input record.

    ``message`` is mined into a template unless ``event`` is set, in which case ``event``
    is the event type itself (span names, syscall names) and template mining is bypassed.
    """

    source: str
    key: str | None  # session key; None for keyless sources (time windows)
    ts: float | None  # seconds since the epoch, if the record carries a time
    level: str | None
    message: str
    raw: str
    offset: int = -1  # byte offset of the line in its file, -1 when unknown
    event: str | None = None


@dataclass(slots=True)
class Rejection:
    """A line a format could not read as intended; counted by ``reason``.

    When ``record`` is set the line was still kept (for example as a whole-line message),
    so nothing is lost; when it is None the line carried nothing usable (a blank line).
    """

    reason: str
    raw: str
    record: Record | None = None
