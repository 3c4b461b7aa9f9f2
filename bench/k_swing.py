"""By hand, not in `make bench`: how much the threshold and the verdicts move with k and the seed.

Each scenario's baseline and day are generated once; the baseline is fitted with k chosen
("auto") and then forced to each k given, under each seed, and the same day scored every time.
One row per fit: the k fitted, the seed, the calibrated threshold, anomalies caught, normal
sessions flagged, the lowest anomaly score and the highest normal one.

    .venv/bin/python bench/k_swing.py                      # tickets, lockers, bikes; chosen k − 1 .. + 1
    .venv/bin/python bench/k_swing.py --scenario bikes --around 2 --seeds 0 1 2 3
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from datetime import datetime, timezone
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from tests.scenarios import bike_docks, fit_and_score, ticket_days
from tracewatch.demo.scenario import generate, parcel_lockers

RATE = 0.005


def scenario_days(name: str, data_seed: int):
    """The scenario, its baseline sessions and the day to score (with labelled anomalies)."""
    if name == "tickets":
        return ticket_days(data_seed, 10)
    day0, day1 = datetime(2026, 11, 29, tzinfo=timezone.utc), datetime(2026, 11, 30, tzinfo=timezone.utc)
    scenario = parcel_lockers() if name == "lockers" else bike_docks()
    base = generate(scenario, 3000, seed=data_seed, start=day0, kinds=())
    return scenario, base, generate(scenario, 3000, 40, seed=data_seed + 1, start=day1)


def fit_row(tmp: Path, scenario, base, day, k, seed: int) -> dict:
    baseline, verdicts = fit_and_score(tmp / f"k{k}-seed{seed}", scenario, base, day, "app",
                                       false_alarm_rate=RATE, k=k, seed=seed)
    bad = [s.key for s in day if s.label != "normal"]
    normal = [s.key for s in day if s.label == "normal"]
    return {"k": baseline.report["k"], "seed": seed, "threshold": baseline.report["thresholds"]["app"]["threshold"],
            "caught": sum(verdicts[x]["alert"] for x in bad), "anomalies": len(bad),
            "flagged": sum(verdicts[x]["alert"] for x in normal), "normal": len(normal),
            "lowest_anomaly": min(verdicts[x]["score"] for x in bad),
            "highest_normal": max(verdicts[x]["score"] for x in normal)}


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scenario", nargs="*", default=["tickets", "lockers", "bikes"],
                    choices=["tickets", "lockers", "bikes"])
    ap.add_argument("--data-seed", type=int, default=0)
    ap.add_argument("--around", type=int, default=1, help="k from chosen − AROUND to chosen + AROUND")
    ap.add_argument("--seeds", type=int, nargs="*", default=[0, 1, 2])
    args = ap.parse_args(argv)
    print(f"{'scenario':<8} {'k':>3} {'seed':>4} {'threshold':>9} {'caught':>9} {'flagged':>9} "
          f"{'lowest anomaly':>14} {'highest normal':>14}")
    with tempfile.TemporaryDirectory() as tmp:
        for name in args.scenario:
            scenario, base, day = scenario_days(name, args.data_seed)
            chosen = fit_row(Path(tmp) / name, scenario, base, day, "auto", args.seeds[0])["k"]
            for k in range(max(1, chosen - args.around), chosen + args.around + 1):
                for seed in args.seeds:
                    r = fit_row(Path(tmp) / name, scenario, base, day, k, seed)
                    print(f"{name:<8} {r['k']:>3} {seed:>4} {r['threshold']:>9.3f} "
                          f"{r['caught']:>4}/{r['anomalies']:<4} {r['flagged']:>4}/{r['normal']:<4} "
                          f"{r['lowest_anomaly']:>14.3f} {r['highest_normal']:>14.3f}", flush=True)


if __name__ == "__main__":
    main()
