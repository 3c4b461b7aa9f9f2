"""Generated workloads with labelled anomalies: the parcel-locker demo and the machinery
tests use to build other scenarios.

A *workflow* is a function ``(rng, ctx) -> list[Step]`` giving one normal session. Anomalies
are injected into copies of normal sessions, each labelled with its kind:

    missing_step      an essential step removed
    unseen_event      an error message the baseline never saw inserted
    retry_loop        one step repeated 15–40 times
    out_of_order      two adjacent essential steps swapped
    cut_short         the session stops about half-way
    mixed_workflows   the steps of another workflow's session interleaved

Every name, id and number here is invented.
"""

from __future__ import annotations

import random
import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime, timezone

ANOMALY_KINDS = ("missing_step", "unseen_event", "retry_loop", "out_of_order", "cut_short", "mixed_workflows")


@dataclass(frozen=True)
class Step:
    name: str  # what the step is, independent of its variable values
    message: str
    level: str = "INFO"
    essential: bool = True  # removing it is an anomaly


Workflow = Callable[[random.Random], list[Step]]


@dataclass
class Scenario:
    service: str
    workflows: dict[str, tuple[float, Workflow]]  # name -> (share of traffic, generator)
    novel: list[Callable[[random.Random], Step]]  # messages the baseline never sees
    line_pattern: str = (r"^(?P<ts>\S+) (?P<level>[A-Z]+) \[(?P<svc>[^\]]+)\] req=(?P<key>\S+) "
                         r"(?P<message>.*)$")
    line_format: str = "{ts}Z {level} [{service}] req={key} {message}"
    time_format: str = "%Y-%m-%dT%H:%M:%S.%f"  # rendered to milliseconds


@dataclass
class GeneratedSession:
    key: str
    workflow: str
    steps: list[Step]
    label: str = "normal"  # or an anomaly kind
    start: float = 0.0
    detail: str = ""
    times: list[float] = field(default_factory=list)


def _pick(rng: random.Random, scenario: Scenario) -> str:
    names = list(scenario.workflows)
    return rng.choices(names, weights=[scenario.workflows[n][0] for n in names])[0]


def inject(kind: str, sess: GeneratedSession, scenario: Scenario, rng: random.Random) -> None:
    steps = list(sess.steps)
    essential = [i for i, s in enumerate(steps) if s.essential]
    if kind == "missing_step":
        inner = [i for i in essential if 0 < i] or essential
        i = rng.choice(inner)
        sess.detail = f"removed '{steps[i].name}'"
        del steps[i]
    elif kind == "unseen_event":
        i = rng.randrange(1, len(steps) + 1)
        novel = rng.choice(scenario.novel)(rng)
        sess.detail = f"inserted '{novel.name}'"
        steps.insert(i, novel)
    elif kind == "retry_loop":
        i = rng.randrange(len(steps))
        times = rng.randint(15, 40)
        sess.detail = f"'{steps[i].name}' repeated {times}x"
        steps[i:i + 1] = [steps[i]] * times
    elif kind == "out_of_order":
        pairs = [(a, b) for a, b in zip(essential, essential[1:]) if steps[a].name != steps[b].name]
        a, b = rng.choice(pairs)
        sess.detail = f"'{steps[a].name}' and '{steps[b].name}' swapped"
        steps[a], steps[b] = steps[b], steps[a]
    elif kind == "cut_short":
        keep = max(1, min(len(steps) - 2, len(steps) // 2))
        sess.detail = f"stopped after {keep} of {len(steps)} steps"
        steps = steps[:keep]
    elif kind == "mixed_workflows":
        other_name = rng.choice([n for n in scenario.workflows if n != sess.workflow])
        other = scenario.workflows[other_name][1](rng)
        sess.detail = f"mixed with a '{other_name}' session"
        merged: list[Step] = []
        a, b = list(steps), list(other)
        while a or b:
            src = a if (a and (not b or rng.random() < 0.5)) else b
            merged.append(src.pop(0))
        steps = merged
    else:
        raise ValueError(f"unknown anomaly kind {kind!r}")
    sess.steps = steps
    sess.label = kind


def generate(scenario: Scenario, n_normal: int, anomalies_per_kind: int = 0, *, seed: int = 0,
             start: datetime | None = None, span_s: float = 86_400.0,
             kinds: tuple[str, ...] = ANOMALY_KINDS) -> list[GeneratedSession]:
    """Normal sessions plus ``anomalies_per_kind`` of each kind, spread over ``span_s``."""
    rng = random.Random(seed)
    t0 = (start or datetime(2026, 11, 30, tzinfo=timezone.utc)).timestamp()
    sessions = []
    for _ in range(n_normal):
        name = _pick(rng, scenario)
        sessions.append(GeneratedSession(uuid.UUID(int=rng.getrandbits(128)).hex[:16], name,
                                         scenario.workflows[name][1](rng)))
    for kind in kinds:
        for _ in range(anomalies_per_kind):
            name = _pick(rng, scenario)
            sess = GeneratedSession(uuid.UUID(int=rng.getrandbits(128)).hex[:16], name,
                                    scenario.workflows[name][1](rng))
            inject(kind, sess, scenario, rng)
            sessions.append(sess)
    rng.shuffle(sessions)
    for sess in sessions:
        sess.start = t0 + rng.uniform(0, span_s)
        t = sess.start
        sess.times = []
        for _ in sess.steps:
            sess.times.append(t)
            t += rng.uniform(0.02, 1.5)
    return sessions


def render_text(scenario: Scenario, sessions: list[GeneratedSession]) -> list[str]:
    """Log lines of all sessions, interleaved in time order."""
    events = []
    for sess in sessions:
        for t, step in zip(sess.times, sess.steps):
            events.append((t, sess.key, step))
    events.sort(key=lambda e: e[0])
    out = []
    for t, key, step in events:
        ts = datetime.fromtimestamp(t, tz=timezone.utc).strftime(scenario.time_format)[:-3]
        out.append(scenario.line_format.format(ts=ts, level=step.level, service=scenario.service, key=key,
                                               message=step.message))
    return out


def baseline_and_day(scenario: Scenario, *, seed: int, n_baseline: int, n_normal: int,
                     per_kind: int) -> tuple[list[GeneratedSession], list[GeneratedSession]]:
    """A normal baseline day (29 Nov) and a day to score with ``per_kind`` anomalies of each kind (30 Nov)."""
    base = generate(scenario, n_baseline, 0, seed=seed, start=datetime(2026, 11, 29, tzinfo=timezone.utc))
    day = generate(scenario, n_normal, per_kind, seed=seed + 1, start=datetime(2026, 11, 30, tzinfo=timezone.utc))
    return base, day


def labels(sessions: list[GeneratedSession],
           key: Callable[[GeneratedSession], str] = lambda s: s.key) -> list[dict]:
    """One label row per session; ``key`` gives the session key the source will see."""
    return [{"session_key": key(s), "workflow": s.workflow, "label": s.label, "detail": s.detail}
            for s in sessions]


# -- the parcel-locker network ------------------------------------------------------------
def _ids(rng: random.Random) -> dict:
    return {
        "locker": f"LK-{rng.randint(100, 999)}",
        "courier": f"CR{rng.randint(1000, 9999)}",
        "parcel": f"PX{rng.randint(10**7, 10**8 - 1)}",
        "box": rng.randint(1, 64),
        "user": uuid.UUID(int=rng.getrandbits(128)),
    }


def _door(i: dict, rng: random.Random) -> list[Step]:
    return [Step("door opened", f"door {i['box']} opened on locker {i['locker']}"),
            Step("door closed", f"door {i['box']} closed after {rng.randint(900, 9000)}ms")]


def _notify(i: dict, rng: random.Random) -> list[Step]:
    steps = [Step("notification queued", f"notification queued for recipient {i['user']} via "
                                         f"{rng.choice(['sms', 'email', 'app'])}")]
    if rng.random() < 0.1:
        steps.append(Step("quiet hours", f"recipient {i['user']} is in quiet hours, notification deferred",
                          essential=False))
    if rng.random() < 0.06:
        steps.append(Step("delivery retry", f"notification gateway busy, retry {rng.randint(1, 2)} scheduled",
                          "WARN", essential=False))
    steps.append(Step("notification delivered", f"notification delivered to recipient {i['user']} in "
                                                f"{rng.randint(40, 900)}ms"))
    return steps


def deposit(rng: random.Random) -> list[Step]:
    """A courier drops one or more parcels at a locker."""
    i = _ids(rng)
    steps = [Step("courier authenticated", f"courier {i['courier']} authenticated at locker {i['locker']}")]
    if rng.random() < 0.08:
        steps.append(Step("route synced", f"route manifest synced for courier {i['courier']}", essential=False))
    for _ in range(rng.choices([1, 2, 3, 4], weights=[6, 2, 1, 1])[0]):
        j = _ids(rng)
        j["locker"], j["courier"] = i["locker"], i["courier"]
        size = rng.choice("SML")
        steps.append(Step("compartment requested", f"reserve compartment size={size} for parcel {j['parcel']}"))
        for _ in range(rng.choices([0, 1, 2], weights=[85, 12, 3])[0]):
            steps.append(Step("size fallback", f"no free compartment of size {size}, trying a larger one",
                              "WARN", essential=False))
        steps += [Step("compartment reserved", f"compartment {j['box']} reserved for parcel {j['parcel']}"),
                  *_door(j, rng)]
        recorded = Step("deposit recorded", f"deposit recorded for parcel {j['parcel']} "
                                            f"weight={rng.randint(80, 20000)}g")
        if rng.random() < 0.3:
            photo = Step("photo stored", f"parcel photo stored as img-{rng.getrandbits(40):010x}.jpg",
                         essential=False)
            steps += [photo, recorded] if rng.random() < 0.5 else [recorded, photo]
        else:
            steps.append(recorded)
        steps += _notify(j, rng)
    steps.append(Step("courier signed off", f"courier {i['courier']} signed off at locker {i['locker']}"))
    return steps


def pickup(rng: random.Random) -> list[Step]:
    """A recipient collects a parcel with a pickup code."""
    i = _ids(rng)
    steps = [Step("code checked", f"pickup code checked for parcel {i['parcel']} at locker {i['locker']}")]
    if rng.random() < 0.15:
        for attempt in range(1, rng.randint(2, 3)):
            steps.append(Step("code rejected", f"pickup code rejected for parcel {i['parcel']}, attempt {attempt}",
                              "WARN", essential=False))
        steps.append(Step("code checked", f"pickup code checked for parcel {i['parcel']} at locker {i['locker']}",
                          essential=False))
    if rng.random() < 0.12:
        steps += [Step("fee due", f"storage fee due for parcel {i['parcel']}: {rng.randint(1, 9)}.{rng.randint(0, 99):02d} EUR",
                       essential=False),
                  Step("fee paid", f"storage fee paid by card ending {rng.randint(1000, 9999)}", essential=False)]
    steps += [*_door(i, rng),
              Step("parcel collected", f"parcel {i['parcel']} marked collected by recipient {i['user']}"),
              Step("compartment released", f"compartment {i['box']} released on locker {i['locker']}")]
    if rng.random() < 0.2:
        steps.append(Step("pickup rated", f"recipient rated pickup {rng.randint(1, 5)} of 5", essential=False))
    return steps


def returns(rng: random.Random) -> list[Step]:
    """A courier takes expired parcels back to their senders."""
    i = _ids(rng)
    n = rng.randint(1, 5)
    steps = [Step("courier authenticated", f"courier {i['courier']} authenticated at locker {i['locker']}"),
             Step("expired listed", f"expired parcels listed for locker {i['locker']}: {n}")]
    for _ in range(n):
        j = _ids(rng)
        j["locker"] = i["locker"]
        steps += _door(j, rng)
        if rng.random() < 0.05:
            steps.append(Step("damage noted", f"parcel {j['parcel']} damage noted by courier {i['courier']}",
                              "WARN", essential=False))
        steps.append(Step("parcel returned", f"parcel {j['parcel']} marked returned to sender"))
    steps.append(Step("manifest signed", f"return manifest signed by courier {i['courier']}"))
    return steps


def health(rng: random.Random) -> list[Step]:
    """The monitoring system's periodic check of one locker."""
    i = _ids(rng)
    steps = [Step("health probe", f"health probe from monitor 10.20.{rng.randint(0, 255)}.{rng.randint(1, 254)}"),
             Step("environment read", f"temperature {rng.uniform(-5, 35):.1f}C humidity {rng.randint(20, 90)}% "
                                      f"on locker {i['locker']}"),
             Step("battery read", f"battery at {rng.randint(20, 100)}% on locker {i['locker']}")]
    if rng.random() < 0.1:
        steps.append(Step("battery low", f"battery below threshold on locker {i['locker']}, maintenance "
                                         "ticket opened", "WARN", essential=False))
    if rng.random() < 0.2:
        steps.append(Step("firmware checked", f"firmware {rng.randint(3, 4)}.{rng.randint(0, 9)}.{rng.randint(0, 20)} "
                                              "is current", essential=False))
        if rng.random() < 0.3:
            steps.append(Step("update scheduled", "firmware update scheduled for the night window",
                              essential=False))
    steps.append(Step("health report", f"health report sent for locker {i['locker']}"))
    return steps


def _novel_jam(rng: random.Random) -> Step:
    return Step("latch jammed", f"latch sensor on door {rng.randint(1, 64)} reports jammed bolt", "ERROR")


def _novel_payment(rng: random.Random) -> Step:
    return Step("fee gateway timeout", f"storage fee gateway timeout after {rng.randint(3000, 9000)}ms", "ERROR")


def _novel_token(rng: random.Random) -> Step:
    return Step("token invalid", f"courier token signature invalid for CR{rng.randint(1000, 9999)}", "ERROR")


def _novel_db(rng: random.Random) -> Step:
    return Step("ledger deadlock", "ledger write deadlock detected on table parcels, rolled back", "ERROR")


def parcel_lockers() -> Scenario:
    """The demo scenario: a backend for a city network of parcel lockers."""
    return Scenario(
        service="locker-api",
        workflows={"deposit": (0.40, deposit), "pickup": (0.35, pickup),
                   "return": (0.10, returns), "health": (0.15, health)},
        novel=[_novel_jam, _novel_payment, _novel_token, _novel_db],
    )
