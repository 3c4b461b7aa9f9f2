"""Incident rows read back: what :mod:`tracewatch.alerts.store` checks before handing a row on.

Stage: **incidents** (persistence, read side). SQLite keeps whatever a file holds, and
``incidents.db`` is a file a person or a fault can change: a count of 0 (a division by zero in
grouping), a vector that is a list, a time of 1e300 (no date), JSON nested 10,000 deep, a
representative of a gigabyte. Each column, and each JSON column's shape, is checked here with
pydantic (strict types, finite numbers, bounded sizes) — the shapes the tracker, the summaries,
triage and the sinks rely on — and anything else is :class:`Damaged`, which the store turns
into a :class:`~tracewatch.errors.StateError` naming the incident.

Checked values are handed on as they were read (the check adds no defaults), so a row that
passes reads exactly as before.
"""

from __future__ import annotations

from typing import Annotated, Literal, NamedTuple

import orjson
from pydantic import BaseModel, ConfigDict, Field, TypeAdapter, ValidationError

from ..errors import first_problem
from .vectors import TERM_PATTERN, Vector

MAX_JSON_BYTES = 8 << 20  # one JSON column (an alert keeps at most 500 sequence ids and a few samples)
MAX_TIME = 253_402_300_799.0  # 9999-12-31T23:59:59Z: the last second a date can name
MAX_TERMS = 100_000  # terms of one stored vector (the tracker keeps about a thousand)
MAX_ITEMS = 100_000  # entries of one list or statistic in a stored alert
MAX_TEXT = 1 << 20  # characters of one stored string
EVENTS = ("opened", "escalated", "resolved")
ACTIONS = ("suppress", "suggest", "abstain")
STATUSES = ("open", "acknowledged", "resolved", "expected")


class Damaged(ValueError):
    """A value read back is not what tracewatch writes; ``str()`` is one short line."""


_Strict = ConfigDict(strict=True, extra="allow")
Time = Annotated[float, Field(ge=-MAX_TIME, le=MAX_TIME, allow_inf_nan=False)]
Finite = Annotated[float, Field(allow_inf_nan=False)]
Text = Annotated[str, Field(max_length=MAX_TEXT)]
Count = Annotated[int, Field(ge=0, lt=1 << 63)]
Texts = Annotated[list[Text], Field(max_length=MAX_ITEMS)]
Term = Annotated[str, Field(pattern=TERM_PATTERN)]
Vec = Annotated[dict[Term, Finite], Field(max_length=MAX_TERMS)]
Stats = Annotated[dict[Annotated[str, Field(max_length=64)],
                       Annotated[dict[Text, Count], Field(max_length=MAX_ITEMS)]], Field(max_length=64)]


class _Suggestion(BaseModel):
    model_config = ConfigDict(strict=True, extra="forbid")
    action: Literal[ACTIONS]
    label: Annotated[str, Field(max_length=200)] | None
    margin: Finite | None  # a margin that was not finite is stored as null


class _Row(BaseModel):
    """The listed columns of an incident."""

    model_config = ConfigDict(strict=True, extra="forbid")
    id: Annotated[int, Field(ge=1, lt=1 << 63)]
    status: Literal[STATUSES]
    title: Text
    first_seen: Time
    last_seen: Time
    count: Annotated[int, Field(ge=1, lt=1 << 63)]  # an incident opens with its first alert
    escalated: Count
    created: Time
    status_changed: Time
    status_by: Text
    note: Text
    stats: Stats
    suggestion: _Suggestion | None
    label: Annotated[str, Field(max_length=200)] | None
    sessions: Count = 0  # read for showing only: the sessions scored in its window


class _Unseen(BaseModel):
    model_config = _Strict
    template: Text
    template_id: Text | None = None
    count: Count = 1


class _Ngram(BaseModel):
    model_config = _Strict
    ngram: Text
    weight: Finite = 0.1
    cluster_share: Finite = 1.0
    seen_at_fit: bool = True


class _Alert(BaseModel):
    """The fields of a stored alert that grouping, summaries, triage and refit read."""

    model_config = _Strict
    alert_id: Annotated[str, Field(max_length=200)]
    source: Text = ""
    events: Count = 0
    sequence: Texts = []
    unseen_events: Annotated[list[_Unseen], Field(max_length=MAX_ITEMS)] = []
    unexpected: Annotated[list[_Ngram], Field(max_length=MAX_ITEMS)] = []
    missing: Annotated[list[_Ngram], Field(max_length=MAX_ITEMS)] = []
    diff: Texts = []
    samples: Texts = []
    closest_normal: Texts = []
    start: Time | None = None
    end: Time | None = None


class _Notice(BaseModel):
    """A queued notification's incident (what the sinks read)."""

    model_config = _Strict
    id: Annotated[int, Field(ge=1, lt=1 << 63)]
    title: Text
    status: Literal[STATUSES]
    count: Count
    first_seen: Time
    last_seen: Time
    status_changed: Time | None = None
    sources: Texts = []
    diff: Texts = []


class _Label(BaseModel):
    model_config = ConfigDict(strict=True, extra="forbid")
    incident_id: Annotated[int, Field(ge=1, lt=1 << 63)]
    label: Annotated[str, Field(max_length=200)]
    by: Text
    note: Text
    labelled_at: Time
    title: Text
    status: Literal[STATUSES]
    count: Count


_VEC = TypeAdapter(Vec)
_TEXTS = TypeAdapter(Texts)
_COUNT = TypeAdapter(Count)
_LABEL = TypeAdapter(Annotated[str, Field(max_length=200)])


def _check(adapter, value, what: str):
    try:
        (adapter.validate_python if isinstance(adapter, TypeAdapter) else adapter.model_validate)(value)
    except ValidationError as exc:
        raise Damaged(f"{what}: {first_problem(exc)}") from exc
    return value


def _json(raw, what: str, *, empty=None):
    """Decode one JSON column, bounded in size; ``empty`` stands for '' where '' means none."""
    if raw == "" and empty is not None:
        return empty()
    if not isinstance(raw, (str, bytes)):
        raise Damaged(f"{what}: not JSON text ({type(raw).__name__})")
    if len(raw) > MAX_JSON_BYTES:
        raise Damaged(f"{what}: {len(raw)} bytes, more than the {MAX_JSON_BYTES} tracewatch writes")
    try:
        return orjson.loads(raw)
    except orjson.JSONDecodeError as exc:  # malformed, or nested deeper than orjson's limit
        raise Damaged(f"{what}: not JSON ({str(exc)[:80]})") from exc


def incident_row(base: dict, stats, suggestion, label) -> dict:
    """A listed row: ``base`` holds the plain columns; the JSON ones are decoded and checked."""
    row = {**base, "stats": _json(stats, "stats"),
           "suggestion": None if suggestion == "" else _json(suggestion, "suggestion"), "label": label}
    return _check(_Row, row, "incident")


def count(value, what: str) -> int:
    return _check(_COUNT, value, what)


def alert(raw) -> dict:
    return _check(_Alert, _json(raw, "alert"), "alert")


def diff(raw) -> list[str]:
    """The representative's step difference (``json_extract``: JSON text, or NULL when absent)."""
    return [] if raw is None else _check(_TEXTS, _json(raw, "diff"), "diff")


def notice(raw) -> dict:
    return _check(_Notice, _json(raw, "payload"), "payload")


def event(value) -> str:
    if value not in EVENTS:
        raise Damaged(f"event: {str(value)[:40]!r} is not one of {', '.join(EVENTS)}")
    return value


def label(value) -> str:
    return _check(_LABEL, value, "label")


def label_row(row: dict) -> dict:
    return _check(_Label, row, "label")


class Group(NamedTuple):
    """One incident as grouping needs it (see :meth:`IncidentStore.group`)."""

    row: dict  # the listed row (status, count, first_seen, last_seen, escalated, stats, ...)
    total: Vector  # the sum of its alerts' vectors (trimmed)
    members: list[tuple[str, Vector]]  # candidate representatives


def group(base: dict, stats, suggestion, label_, centroid, members: list) -> Group:
    row = incident_row(base, stats, suggestion, label_)
    total = _check(_VEC, _json(centroid, "centroid"), "centroid")
    if not members:
        raise Damaged("no member alerts")
    kept = []
    for aid, vector in members:
        if not isinstance(aid, str):
            raise Damaged("member: no alert id")
        kept.append((aid, _check(_VEC, _json(vector, "member vector"), "member vector")))
    return Group(row, total, kept)
