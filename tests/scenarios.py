"""A second generated scenario, with workflows unlike the demo's: a city bike-share dock network.

Invented names and numbers only. Built with the same Step/Scenario machinery as the demo, so
the anomaly kinds and labels are the same.
"""

from __future__ import annotations

import random
from datetime import datetime, timezone

from tracewatch.demo.scenario import GeneratedSession, Scenario, Step, generate, render_text


def fit_and_score(tmp_path, scenario: Scenario, base: list[GeneratedSession], day: list[GeneratedSession],
                  source: str, **model):
    """Fit on ``base``'s log and score ``day``'s (every session): the baseline and the verdicts by
    session key."""
    from tracewatch.batch import assign_sources, fit_files, score_files
    from tracewatch.config import parse_config

    tmp_path.mkdir(parents=True, exist_ok=True)
    (tmp_path / "b.log").write_text("\n".join(render_text(scenario, base)) + "\n")
    (tmp_path / "d.log").write_text("\n".join(render_text(scenario, day)) + "\n")
    cfg = parse_config({"state_dir": str(tmp_path / "state"),
                        "sources": [{"name": source, "line_pattern": scenario.line_pattern}],
                        "sessions": {"idle_timeout_s": 30}, "model": model})
    baseline, _, _ = fit_files(cfg, assign_sources(cfg, [str(tmp_path / "b.log")]))
    verdicts: dict[str, dict] = {}
    score_files(cfg, assign_sources(cfg, [str(tmp_path / "d.log")]), baseline,
                lambda v: verdicts.__setitem__(v["session_key"], v), score_all=True)
    return baseline, verdicts


def ride(rng: random.Random) -> list[Step]:
    m, d, b, r = rng.randint(10**5, 10**6), rng.randint(1, 400), rng.randint(1000, 9999), rng.getrandbits(32)
    steps = [Step("card tapped", f"member {m} tapped card at dock D{d}")]
    for _ in range(rng.choices([0, 1, 2], weights=[88, 9, 3])[0]):
        steps.append(Step("card retry", "card read failed, asking member to tap again", "WARN", essential=False))
    steps.append(Step("bike released", f"bike B{b} released from dock D{d} slot {rng.randint(1, 30)}"))
    if rng.random() < 0.2:
        steps.append(Step("helmet lock", f"helmet lock {rng.randint(1, 30)} opened", essential=False))
    steps.append(Step("ride started", f"ride {r:08x} started"))
    if rng.random() < 0.1:
        steps += [Step("ride paused", f"ride {r:08x} paused at {rng.uniform(50, 51):.5f},{rng.uniform(4, 5):.5f}",
                       essential=False),
                  Step("ride resumed", f"ride {r:08x} resumed", essential=False)]
    steps += [Step("bike returned", f"bike B{b} returned to dock D{rng.randint(1, 400)} slot {rng.randint(1, 30)}"),
              Step("ride ended", f"ride {r:08x} ended after {rng.randint(2, 90)} min"),
              Step("fare charged", f"fare {rng.randint(0, 9)}.{rng.randint(0, 99):02d} EUR charged to member {m}")]
    if rng.random() < 0.4:
        steps.append(Step("receipt", f"receipt emailed to member {m}", essential=False))
    return steps


def rebalance(rng: random.Random) -> list[Step]:
    t, d = rng.randint(1, 40), rng.randint(1, 400)
    steps = [Step("truck arrived", f"truck T{t} arrived at dock D{d}"),
             Step("plan loaded", f"rebalance plan P{rng.randint(100, 999)} loaded for dock D{d}")]
    for _ in range(rng.randint(1, 6)):
        b = rng.randint(1000, 9999)
        steps += [Step("bike unlocked", f"bike B{b} unlocked for transfer"),
                  Step("bike loaded", f"bike B{b} loaded on truck T{t}")]
    steps.append(Step("truck left", f"truck T{t} left dock D{d}"))
    return steps


def self_test(rng: random.Random) -> list[Step]:
    d = rng.randint(1, 400)
    steps = [Step("self-test started", f"dock D{d} self-test started"),
             Step("slots ok", f"slot sensors ok: {rng.randint(10, 30)}"),
             Step("terminal ok", "payment terminal answered the self-test")]
    if rng.random() < 0.15:
        steps.append(Step("display adjusted", f"display contrast adjusted to {rng.randint(40, 90)}%", essential=False))
    steps.append(Step("self-test passed", f"dock D{d} self-test passed"))
    return steps


def renewal(rng: random.Random) -> list[Step]:
    m = rng.randint(10**5, 10**6)
    steps = [Step("renewal requested", f"renewal requested by member {m}"),
             Step("payment authorised", f"payment authorised ref {rng.getrandbits(48):012x}")]
    if rng.random() < 0.25:
        steps.append(Step("offer applied", "welcome back offer applied", essential=False))
    steps.append(Step("membership extended", f"membership of {m} extended to 2027-{rng.randint(1, 12):02d}-28"))
    return steps


def _novel_brake(rng):
    return Step("brake fault", f"brake sensor fault reported by bike B{rng.randint(1000, 9999)}", "ERROR")


def _novel_vandal(rng):
    return Step("tamper alarm", f"tamper alarm on dock D{rng.randint(1, 400)} lid", "ERROR")


def _novel_auth(rng):
    return Step("auth outage", "identity service unreachable, falling back to offline list", "ERROR")


def bike_docks() -> Scenario:
    return Scenario(
        service="dockctl",
        workflows={"ride": (0.6, ride), "rebalance": (0.1, rebalance), "self-test": (0.2, self_test),
                   "renewal": (0.1, renewal)},
        novel=[_novel_brake, _novel_vandal, _novel_auth],
        line_pattern=r"^\[(?P<ts>[^\]]+)\] (?P<svc>\S+) (?P<level>[A-Z]+) ctx=(?P<key>\w+): (?P<message>.*)$",
        line_format="[{ts}] {service} {level} ctx={key}: {message}",
        time_format="%Y-%m-%d %H:%M:%S,%f",
    )


# -- ticket machines at tram stops: a few exact variants of one workflow ------------------------
STEPS = {
    "open": "ticket session opened",
    "lang": "display language switched",
    "zone": "fare zone selected",
    "disc": "reduced fare applied",
    "fare": "fare shown to rider",
    "coin": "coin accepted",
    "card": "bank card presented",
    "ok": "bank card approved",
    "print": "ticket printed",
    "change": "change returned",
    "receipt": "receipt printed",
    "close": "ticket session closed",
}
# (share of traffic, step sequence): eight exact variants; "reduced-card-receipt" is the rare one
VARIANTS = {
    "card": (0.28, "open zone fare card ok print close"),
    "coins": (0.20, "open zone fare coin coin print change close"),
    "card-receipt": (0.15, "open zone fare card ok print receipt close"),
    "lang-card": (0.12, "open lang zone fare card ok print close"),
    "reduced-coins": (0.10, "open zone disc fare coin coin coin print close"),
    "coins-receipt": (0.07, "open zone fare coin coin print receipt close"),
    "lang-coins": (0.05, "open lang zone fare coin coin print change close"),
    "reduced-card-receipt": (0.03, "open zone disc fare card ok print receipt close"),
}
RARE = "reduced-card-receipt"  # 3% of traffic


def _workflow(seq: str):
    def steps(rng: random.Random) -> list[Step]:
        return [Step(name, STEPS[name]) for name in seq.split()]
    return steps


def ticket_machines() -> Scenario:
    return Scenario(service="ticketd", workflows={n: (share, _workflow(seq)) for n, (share, seq) in VARIANTS.items()},
                    novel=[])


# ticket machines have no never-seen messages: only the kinds made of known steps
TICKET_KINDS = ("missing_step", "retry_loop", "out_of_order", "cut_short")


def ticket_days(seed: int = 0, anomalies_per_kind: int = 0
                ) -> tuple[Scenario, list[GeneratedSession], list[GeneratedSession]]:
    """Ticket machines, a baseline of 3000 normal sessions on 2026-11-29 and a day to score of
    1500 on 2026-11-30 with ``anomalies_per_kind`` of each of :data:`TICKET_KINDS`."""
    scenario = ticket_machines()
    day0, day1 = datetime(2026, 11, 29, tzinfo=timezone.utc), datetime(2026, 11, 30, tzinfo=timezone.utc)
    base = generate(scenario, 3000, seed=seed, start=day0, kinds=())
    return scenario, base, generate(scenario, 1500, anomalies_per_kind, seed=seed + 100, start=day1, kinds=TICKET_KINDS)
