"""Baseline refit: a pool of recent quiet sessions, a candidate fitted on it, and the gates it
must pass before it is made current.

Stage: scoring → **refit** → baselines. Every session the pipeline scores without raising
anything is offered to a :class:`QuietPool` (one reservoir per source, emptied whenever the
baseline in use changes, so it holds a uniform sample of the sessions the current baseline
judged normal — and, with ``[refit] learn_expected``, the sessions whose alert joined an
incident an on-call engineer labelled *expected*). :func:`refit` fits a candidate on the older
part of the pool and hands it on to :func:`tracewatch.baselines.save_baseline` — as the current version only
when every gate passes:

    pool_size       the pool holds at least ``min_sessions`` quiet sessions (else nothing is fitted)
    calibration     the candidate has enough calibration sessions to flag sessions far from it
    holdout         on the most recent quiet sessions, which it never saw, the candidate's false
                    alarms are consistent with ``false_alarm_rate`` (one-sided binomial test)
    known_problems  every kept alert of the incidents labelled a known problem is still flagged
    open_incidents  the representative alert of every open or acknowledged incident is still flagged

What the gates cannot see: a problem that builds up slowly without ever raising an alert is
quiet traffic, and a refit learns it as normal. A gate that passes is no proof of health.

The daemon (``[refit]``, tracewatch/service/daemon.py) refits on a background thread every
``interval_s``; ``tracewatch baselines refit`` does it once for files. Event sequences travel
as template ids (stable hashes), so they outlive baseline switches and restarts.
"""

from __future__ import annotations

import math
import random
from collections import defaultdict
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated, Literal

import numpy as np
import orjson
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from .baselines import check_writable, current_version, load_baseline, save_baseline
from .config import Config
from .errors import StateError, first_problem
from .fs import atomic_write
from .model.baseline import POOLED, Baseline, fit_baseline
from .templates import Template, TemplateTree

POOL_FILE = "refit-pool.json"
POOL_KIND = "tracewatch-refit-pool"
POOL_SCHEMA = 1
OUTCOMES = ("promoted", "passed", "refused", "skipped", "error")
MAX_INCIDENTS = 10_000  # open incidents read for the open_incidents gate
MAX_ALERTS = 1_000_000  # alert ids read per incident labelled expected (the refit command)

IdSeq = tuple[str, ...]


# -- the pool ----------------------------------------------------------------------------------------
class QuietPool:
    """A bounded, uniform sample of the quiet sessions of each source.

    Reservoir sampling, Algorithm R in J. S. Vitter, "Random sampling with a reservoir", ACM
    Transactions on Mathematical Software 11(1), 1985, pp. 37–57: the first ``capacity``
    sessions of a source are kept; the n-th after that replaces a random kept one with
    probability capacity / n, so every session offered so far is in the pool with the same
    probability. The random generator is seeded and its state is saved with the pool, so a
    restarted daemon makes the same choices as one that never stopped. Each kept session
    remembers its arrival number, so the most recent ones can be held out.
    """

    def __init__(self, capacity: int, seed: int = 0) -> None:
        self.capacity = capacity
        self.rng = random.Random(seed)
        self.baseline_version: str | None = None  # the baseline that judged these sessions quiet
        self.last_refit: float | None = None  # wall-clock time of the last refit (the daemon's schedule)
        self.dirty = False  # changed since the last save
        self._seen: dict[str, int] = {}
        self._kept: dict[str, list[tuple[int, IdSeq]]] = {}

    def offer(self, source: str, seq: Sequence[int], templates: Sequence[Template]) -> bool:
        """Offer one quiet session (template indices of ``templates``); True when it was kept."""
        slot = self._slot(source)
        if slot is not None:
            self._kept[source][slot] = (self._seen[source], tuple(templates[e].id for e in seq))
        return slot is not None

    def offer_ids(self, source: str, ids: Sequence[str]) -> bool:
        """:meth:`offer` for a session given as template ids (an alert's ``sequence``)."""
        slot = self._slot(source)
        if slot is not None:
            self._kept[source][slot] = (self._seen[source], tuple(ids))
        return slot is not None

    def offer_alert(self, alert: dict) -> bool:
        """Offer the session of an alert an on-call engineer declared expected (its whole
        event sequence only: an alert keeps at most the first 500 template ids)."""
        seq = alert.get("sequence") or ()
        return bool(seq) and len(seq) == alert.get("events") and self.offer_ids(str(alert["source"]), seq)

    def _slot(self, source: str) -> int | None:
        """Algorithm R: where the n-th session offered goes, or None when it is not kept."""
        n = self._seen.get(source, 0) + 1
        self._seen[source] = n
        self.dirty = True
        kept = self._kept.setdefault(source, [])
        if len(kept) < self.capacity:
            kept.append((n, ()))
            return len(kept) - 1
        slot = self.rng.randrange(n)
        return slot if slot < len(kept) else None

    def sessions(self) -> list[tuple[str, int, IdSeq]]:
        """``(source, arrival number, template ids)`` of every kept session."""
        return [(src, n, ids) for src, kept in self._kept.items() for n, ids in kept]

    def sizes(self) -> dict[str, int]:
        return {src: len(kept) for src, kept in self._kept.items()}

    def seen(self) -> dict[str, int]:
        return dict(self._seen)

    def clear(self, baseline_version: str | None) -> None:
        """Start afresh for a new baseline: what the old one called quiet says nothing now."""
        self._seen, self._kept = {}, {}
        self.baseline_version = baseline_version
        self.dirty = True

    # -- persistence: JSON, template ids stored once ---------------------------------------------
    def to_json(self) -> bytes:
        vocab: dict[str, int] = {}
        sources = {}
        for src, kept in self._kept.items():
            sources[src] = {"seen": self._seen[src], "arrivals": [n for n, _ in kept],
                            "sessions": [[vocab.setdefault(t, len(vocab)) for t in ids] for _, ids in kept]}
        version, internal, gauss = self.rng.getstate()
        return orjson.dumps({
            "kind": POOL_KIND, "schema_version": POOL_SCHEMA, "baseline_version": self.baseline_version,
            "last_refit": self.last_refit, "rng_state": [version, list(internal), gauss],
            "templates": list(vocab), "sources": sources})

    def save(self, path: Path) -> None:
        atomic_write(path, self.to_json())
        self.dirty = False

    @classmethod
    def load(cls, path: Path, capacity: int, seed: int = 0) -> "QuietPool":
        """The pool saved at ``path`` (an empty one when there is none); StateError when the
        file cannot be used. A pool larger than ``capacity`` is cut down to a random subset."""
        pool = cls(capacity, seed)
        try:
            if Path(path).stat().st_size > MAX_POOL_BYTES:
                raise StateError(f"{path}: not a usable refit pool (larger than {MAX_POOL_BYTES >> 20} MiB, more "
                                 "than tracewatch ever writes); move it away to start an empty pool")
            raw = Path(path).read_bytes()
        except FileNotFoundError:
            return pool
        except OSError as exc:
            raise StateError(f"{path}: cannot read the refit pool: {exc.strerror or exc}") from exc
        try:
            doc = _PoolFile.model_validate(orjson.loads(raw))  # orjson: no NaN, no Infinity
            if doc.kind != POOL_KIND:
                raise ValueError("not a tracewatch refit pool")
            if doc.schema_version != POOL_SCHEMA:
                raise ValueError(f"schema {doc.schema_version} is not supported (this tracewatch reads "
                                 f"{POOL_SCHEMA})")
            version, internal, gauss = doc.rng_state
            pool.rng.setstate((version, tuple(internal), gauss))
            names = doc.templates
            for src, part in doc.sources.items():
                if any(not 0 <= i < len(names) for s in part.sessions for i in s):
                    raise ValueError(f"source {' '.join(src.split())[:100]!r}: a template index is out of range")
                kept = [(n, tuple(names[i] for i in s)) for n, s in zip(part.arrivals, part.sessions)]
                if len(kept) > capacity:
                    kept = pool.rng.sample(kept, capacity)
                pool._seen[src], pool._kept[src] = part.seen, kept
        except (orjson.JSONDecodeError, ValidationError, ValueError) as exc:
            why = first_problem(exc) if isinstance(exc, ValidationError) else str(exc).splitlines()[0]
            raise StateError(f"{path}: not a usable refit pool ({why}); move it away to start an empty "
                             "pool") from exc
        pool.baseline_version, pool.last_refit = doc.baseline_version, doc.last_refit
        return pool


MAX_POOL_BYTES = 1 << 30  # a refit pool file larger than this is not one tracewatch wrote
_MAX_ITEMS = 10_000_000  # sessions, events in one, template ids
_Count = Annotated[int, Field(ge=0, le=(1 << 63) - 1)]


class _PoolSource(BaseModel):
    model_config = ConfigDict(extra="forbid")
    seen: _Count
    arrivals: list[Annotated[int, Field(ge=1, le=(1 << 63) - 1)]] = Field(max_length=_MAX_ITEMS)
    sessions: list[list[Annotated[int, Field(ge=0, le=_MAX_ITEMS)]]] = Field(max_length=_MAX_ITEMS)

    @model_validator(mode="after")
    def _consistent(self) -> _PoolSource:
        if len(self.arrivals) != len(self.sessions) or len(self.sessions) > self.seen:
            raise ValueError("the counts do not agree")
        if any(n > self.seen for n in self.arrivals):
            raise ValueError("an arrival number is past the sessions seen")
        return self


class _PoolFile(BaseModel):
    model_config = ConfigDict(extra="allow", allow_inf_nan=False)
    kind: Annotated[str, Field(max_length=100)]
    schema_version: int
    baseline_version: Annotated[str, Field(pattern=r"^v[0-9]{1,9}$")] | None
    last_refit: Annotated[float, Field(ge=0, le=1e11)] | None
    # random.Random.getstate(): version 3, 624 32-bit words and a position in 0..624, a cached gauss
    rng_state: tuple[Literal[3], Annotated[list[Annotated[int, Field(ge=0, lt=1 << 32)]], Field(max_length=1000)],
                     float | None]
    templates: list[Annotated[str, Field(max_length=64)]] = Field(max_length=_MAX_ITEMS)
    sources: dict[Annotated[str, Field(max_length=4096)], _PoolSource] = Field(max_length=100_000)

    @model_validator(mode="after")
    def _consistent(self) -> _PoolFile:
        words = self.rng_state[1]
        if len(words) != 625:
            raise ValueError(f"rng_state: the generator state is the wrong size ({len(words)} numbers, not 625)")
        if words[-1] > 624:
            raise ValueError("rng_state: the position is past the 624 words")
        return self


# -- what a refit is made of -------------------------------------------------------------------------
@dataclass
class RefitData:
    """A snapshot of everything a refit reads, so the fit can run while ingest goes on."""

    based_on: str  # the baseline in use, which judged the pool
    quiet: list[tuple[str, int, IdSeq]]  # QuietPool.sessions()
    templates: dict  # the live template miner (TemplateTree.to_dict()), learned templates included
    n_seen: int  # how many of those belong to the baseline in use
    known: list[tuple[int, str, dict]] = field(default_factory=list)  # (incident, label, alert)
    firing: list[tuple[int, dict]] = field(default_factory=list)  # (incident, representative alert)
    notes: list[str] = field(default_factory=list)


def refit_data(pool: QuietPool, miner: TemplateTree, based_on: str) -> RefitData:
    """The pool and the live miner now (call it where they cannot change meanwhile)."""
    return RefitData(based_on=based_on, quiet=pool.sessions(), templates=miner.to_dict(), n_seen=miner.n_seen)


def add_incidents(data: RefitData, store) -> None:
    """Read the on-call labels and the open incidents of an
    :class:`~tracewatch.alerts.store.IncidentStore` into ``data``."""
    from .alerts.store import FIRING
    from .triage import EXPECTED

    labelled: set[int] = set()
    for alert, label, iid in store.labelled_alerts():
        labelled.add(iid)
        if label != EXPECTED:
            data.known.append((iid, label, alert))
    for status in FIRING:
        for row in store.incidents(status=status, limit=MAX_INCIDENTS):
            if row["id"] not in labelled:
                inc = store.incident(row["id"])
                if inc is not None:
                    data.firing.append((row["id"], inc["representative"]))


def expected_incidents(store) -> set[int]:
    """Incidents an on-call engineer labelled expected (triage's own suppressions are no label):
    their alerts' sessions are pooled as normal."""
    from .triage import EXPECTED

    return {row["incident_id"] for row in store.labels() if row["label"] == EXPECTED}


# -- scoring with a candidate ----------------------------------------------------------------------
def binomial_tail(k: int, n: int, p: float) -> float:
    """P(X ≥ k) for X ~ Binomial(n, p): how likely ``k`` or more false alarms in ``n`` normal
    sessions are when each is flagged with probability ``p``."""
    from scipy.stats import binom

    return 1.0 if k <= 0 else float(binom.sf(k - 1, n, p))


class _Judge:
    """Which sessions (template-id sequences) a baseline flags, by the pipeline's own rule
    (:meth:`tracewatch.model.baseline.Baseline.judge`)."""

    def __init__(self, baseline: Baseline) -> None:
        self.baseline = baseline
        self.scorer = baseline.make_scorer()
        self.index = {t.id: t.index for t in baseline.miner.templates}
        self._unknown: dict[str, int] = {}

    def indices(self, ids: IdSeq) -> tuple[int, ...]:
        """Template ids as this baseline's indices; an id it does not know is an unseen event."""
        out = []
        for t in ids:
            i = self.index.get(t)
            if i is None:
                i = self._unknown.setdefault(t, len(self.index) + len(self._unknown))
            out.append(i)
        return tuple(out)

    def flagged(self, sessions: list[tuple[str, IdSeq]]) -> np.ndarray:
        return self.baseline.judge(self.scorer, [src for src, _ in sessions],
                                   [self.indices(ids) for _, ids in sessions]).flagged


# -- the refit ---------------------------------------------------------------------------------------
def _gate(name: str, passed: bool, detail: str, **numbers) -> dict:
    return {"gate": name, "passed": bool(passed), "detail": detail, **numbers}


def _split(quiet: list[tuple[str, int, IdSeq]], share: float) -> tuple[list, list]:
    """Per source: the most recent ``share`` of the pool is held out, the rest is fitted."""
    by_source: dict[str, list[tuple[int, IdSeq]]] = defaultdict(list)
    for src, n, ids in quiet:
        by_source[src].append((n, ids))
    fit, hold = [], []
    for src in sorted(by_source):
        items = sorted(by_source[src], key=lambda x: x[0])
        cut = len(items) - int(round(len(items) * share))
        fit += [(src, ids) for _, ids in items[:cut]]
        hold += [(src, ids) for _, ids in items[cut:]]
    return fit, hold


def _candidate_miner(templates: dict, n_seen: int, used: set[str]) -> TemplateTree:
    """The baseline's templates plus those the fit sessions use; templates learned live only
    from alerts stay unseen for the candidate."""
    entries = [e for i, e in enumerate(templates["templates"]) if i < n_seen or e["id"] in used]
    return TemplateTree.from_dict({**templates, "templates": entries})


def _incident_gate(name: str, judge: _Judge, alerts: list[tuple[int, dict]], what: str) -> dict:
    usable = [(iid, a) for iid, a in alerts if a.get("sequence")]
    flags = judge.flagged([(str(a.get("source", "")), tuple(a["sequence"])) for _, a in usable])
    missed = sorted({iid for (iid, _), f in zip(usable, flags) if not f})
    detail = f"{int(flags.sum())}/{len(usable)} alerts of {len({i for i, _ in usable})} {what} still flagged"
    if missed:
        detail += f"; no longer flagged: incident {', '.join(f'#{i}' for i in missed[:10])}"
        detail += " …" if len(missed) > 10 else ""
    if len(usable) < len(alerts):
        detail += f" ({len(alerts) - len(usable)} alert(s) without an event sequence not checked)"
    return _gate(name, not missed, detail, alerts=len(usable), flagged=int(flags.sum()), missed_incidents=missed)


def refit(data: RefitData, cfg: Config, state_dir: Path | None = None, *,
          promote: bool = True) -> tuple[dict, Baseline | None]:
    """Fit a candidate on ``data``, apply the gates, and (with ``state_dir``) save it — as the
    current version when every gate passes, ``promote`` is set and the baseline in use is still
    ``data.based_on``. Returns the report and the candidate (None when the pool was too small)."""
    rcfg = cfg.refit
    known_ids = {e["id"] for e in data.templates["templates"]}
    quiet = [q for q in data.quiet if known_ids.issuperset(q[2])]
    by_source: dict[str, int] = defaultdict(int)
    for src, _, _ in quiet:
        by_source[src] += 1
    report: dict = {"outcome": "", "based_on": data.based_on, "version": None, "notes": list(data.notes),
                    "pool": {"sessions": len(quiet), "by_source": dict(sorted(by_source.items())),
                             "dropped": len(data.quiet) - len(quiet)},
                    "gates": []}
    if report["pool"]["dropped"]:
        report["notes"].append(f"{report['pool']['dropped']} pooled session(s) use templates the live "
                               "template miner does not know (a baseline fitted afresh); left out")
    gates = report["gates"]
    gates.append(_gate("pool_size", len(quiet) >= rcfg.min_sessions,
                       f"{len(quiet)} sessions in the pool, at least {rcfg.min_sessions} needed "
                       "([refit] min_sessions)", sessions=len(quiet), minimum=rcfg.min_sessions))
    if not gates[-1]["passed"]:
        report["outcome"] = "skipped"
        return report, None

    fit_part, holdout = _split(quiet, rcfg.holdout_share)
    report["pool"].update(fit=len(fit_part), holdout=len(holdout))
    miner = _candidate_miner(data.templates, data.n_seen, {t for _, ids in fit_part for t in ids})
    index = {t.id: t.index for t in miner.templates}
    # the pool is already judged (quiet sessions and labelled ones) and the gates check the
    # candidate: no cross-fitting, which would set the newest normal shapes aside
    fit_cfg = cfg.model_copy(update={"model": cfg.model.model_copy(update={"expected_bad_share": 0.0})})
    candidate = fit_baseline([(src, tuple(index[t] for t in ids)) for src, ids in fit_part], miner, fit_cfg)
    gates += _candidate_gates(candidate, holdout, data, cfg)

    passed = all(g["passed"] for g in gates)
    make_current = False
    if passed and promote and state_dir is not None:
        make_current = current_version(state_dir) == data.based_on
        if not make_current:
            report["notes"].append(f"the current baseline is no longer {data.based_on}: not made current")
    report["outcome"] = "promoted" if make_current else "passed" if passed else "refused"
    if state_dir is not None:
        candidate.report["refit"] = report  # kept in the candidate's manifest (`baselines show`)
        save_baseline(candidate, state_dir, make_current=make_current)
        report["version"] = candidate.version
    return report, candidate


def _candidate_gates(candidate: Baseline, holdout: list[tuple[str, IdSeq]], data: RefitData,
                     cfg: Config) -> list[dict]:
    rcfg, rate = cfg.refit, cfg.model.false_alarm_rate
    judge = _Judge(candidate)
    need = math.ceil(1 / rate) - 1
    n_cal = candidate.report["calibration_sessions"]
    gates = [_gate("calibration", candidate.calibration[POOLED].usable_,
                   f"{n_cal} calibration sessions, at least {need} needed for false_alarm_rate={rate}",
                   sessions=n_cal, minimum=need)]
    alarms, n = int(judge.flagged(holdout).sum()), len(holdout)
    p = binomial_tail(alarms, n, rate) if n else 0.0
    gates.append(_gate("holdout", n > 0 and p >= rcfg.significance,
                       f"{alarms}/{n} recent pooled sessions flagged ({alarms / max(n, 1):.2%}; expected "
                       f"{n * rate:.1f} at false_alarm_rate={rate}); P(≥{alarms}) = {p:.3g}, "
                       f"fails below {rcfg.significance}", sessions=n, false_alarms=alarms,
                       expected=round(n * rate, 3), p_value=p, significance=rcfg.significance))
    gates.append(_incident_gate("known_problems", judge, [(iid, a) for iid, _, a in data.known],
                                "incident(s) labelled a known problem"))
    if rcfg.gate_open_incidents:
        gates.append(_incident_gate("open_incidents", judge, data.firing, "open incident(s)"))
    return gates


def refit_files(cfg: Config, pairs: list[tuple[str, Path]], *, dry_run: bool = False) -> dict:
    """``tracewatch baselines refit``: score the files with the current baseline, pool their
    quiet sessions (and those whose alert the daemon grouped into an incident labelled
    expected: the same session has the same alert_id), refit, gate; save unless ``dry_run``."""
    from .alerts.store import FILENAME, IncidentStore
    from .batch import run_files
    from .pipeline import Pipeline

    if not dry_run:
        check_writable(cfg.state_dir)
    baseline = load_baseline(cfg.state_dir)
    pool = QuietPool(cfg.refit.pool_size, cfg.refit.seed)
    store = IncidentStore.open(cfg.state_dir, create=False) if (cfg.state_dir / FILENAME).exists() else None
    try:
        expected: set[str] = set()
        if store is not None and cfg.refit.learn_expected:
            expected = {aid for iid in expected_incidents(store) for aid in store.alert_ids(iid, MAX_ALERTS)}

        def on_alert(alert: dict) -> None:
            if alert["alert_id"] in expected:
                pool.offer_alert(alert)

        pipe = Pipeline(cfg, baseline, on_verdict=on_alert)
        pipe.on_quiet = lambda source, seq: pool.offer(source, seq, pipe.miner.templates)
        run_files(pipe, pairs)
        data = refit_data(pool, pipe.miner, baseline.version)
        if store is not None:
            add_incidents(data, store)
        else:
            data.notes.append(f"no {FILENAME} in {cfg.state_dir}: no labelled or open incidents to check")
    finally:
        if store is not None:
            store.close()
    report, _ = refit(data, cfg, None if dry_run else cfg.state_dir, promote=True)
    report["scored"] = sum(pipe.sessions_scored.values())
    return report


# -- words -------------------------------------------------------------------------------------------
def summary_line(report: dict) -> str:
    """One line per refit (the daemon's log)."""
    head = {"promoted": f"candidate {report['version']} promoted",
            "passed": f"candidate {report['version'] or '(not saved)'} passed the gates, not made current",
            "refused": f"candidate {report['version'] or '(not saved)'} refused",
            "skipped": "skipped"}.get(report["outcome"], report["outcome"])
    gates = "; ".join(f"{g['gate']} {'ok' if g['passed'] else 'FAILED'}: {g['detail']}" for g in report["gates"])
    return f"refit of {report['based_on']}: {head} — {gates}"


def format_refit(report: dict) -> str:
    """The report of one refit, for people."""
    pool = report["pool"]
    lines = [summary_line(report).split(" — ")[0]]
    parts = ", ".join(f"{s}: {n}" for s, n in pool["by_source"].items()) or "empty"
    lines.append(f"pool: {pool['sessions']} sessions ({parts})"
                 + (f"; {pool['fit']} fitted, {pool['holdout']} held out" if "fit" in pool else ""))
    lines += format_gates(report)
    lines += [f"note: {n}" for n in report["notes"]]
    return "\n".join(lines)


def format_gates(report: dict) -> list[str]:
    return ["gates:"] + [f"  {'ok    ' if g['passed'] else 'FAILED'} {g['gate']:<15} {g['detail']}"
                         for g in report["gates"]]
