"""``make bench``: run the benchmarks and print one table.

    bench/run.py [--quick | --lines N] [--only NAME ...] [--regen] [--profile]

Each benchmark is a module in ``bench/`` with ``run(ctx)``; it times what it measures and
reports through ``ctx.row`` (one measured subject) and ``ctx.check`` (a ratio against its
target). Generated inputs are cached under ``bench/out/`` (git-ignored). The default size is
1M lines (``TRACEWATCH_BENCH_LINES`` or ``--lines`` change it; ``--quick`` is 100k).
``--profile`` also profiles the benchmark's chosen command (py-spy if installed, else cProfile).
Timings are printed and saved to ``bench/out/results.json``; nothing here asserts a timing.
"""

from __future__ import annotations

import argparse
import importlib
import json
import os
import platform
import pstats
import re
import subprocess
import sys
from collections import Counter
from dataclasses import asdict, dataclass, field
from datetime import datetime, timezone
from pathlib import Path

HERE = Path(__file__).resolve().parent
OUT = HERE / "out"
BENCHMARKS = {"score": "score_vs_script", "formats": "formats", "daemon": "daemon",
              "scoring": "scoring", "fit_scale": "fit_scale", "otlp": "otlp", "templates": "templates"}  # name -> module with run(ctx)
DEFAULT_LINES = 1_000_000
QUICK_LINES = 100_000
BASELINE_SHARE = 0.2  # the baseline file is this share of the scored one (at least 50k lines)

# A child's peak RSS (ru_maxrss) on Linux starts from its parent's RSS at fork time, so the
# runner — which holds generated data — would inflate it. This small launcher (a fresh
# interpreter, ~10 MB) forks the measured command and reports its wall time and ru_maxrss (KiB)
# from wait4; getrusage(RUSAGE_CHILDREN) would also mix in every earlier child.
LAUNCHER = """
import os, sys, time
usage_path, argv = sys.argv[1], sys.argv[2:]
t0 = time.perf_counter()
pid = os.fork()
if pid == 0:
    try:
        os.execvp(argv[0], argv)
    finally:
        os._exit(127)
_, status, usage = os.wait4(pid, 0)
seconds = time.perf_counter() - t0
with open(usage_path, "w") as fh:
    fh.write(f"{seconds} {usage.ru_maxrss} {usage.ru_utime + usage.ru_stime}")
sys.exit(os.waitstatus_to_exitcode(status))
"""


@dataclass
class Proc:
    argv: list[str]
    seconds: float
    rss_mb: float  # this child's own peak resident set size
    stdout: Path
    cpu_seconds: float = 0.0  # user + system CPU time of the child: steadier than wall time on a busy machine

    def stdout_text(self) -> str:
        return self.stdout.read_text(encoding="utf-8")


@dataclass
class Row:
    bench: str
    subject: str
    lines: int
    seconds: float
    rss_mb: float | None
    note: str = ""

    @property
    def rate(self) -> float:
        return self.lines / self.seconds if self.seconds > 0 else float("inf")


@dataclass
class Check:
    name: str
    value: float
    target: float

    @property
    def met(self) -> bool:
        return self.value >= self.target


@dataclass
class ShapeRow:
    """One config shape of the score benchmark against its two targets."""

    shape: str
    rate: float  # records/s, fastest run
    vs_script: float
    vs_script_spread: str  # the ratio round by round
    vs_script_cpu: float  # the same ratio in CPU time, which other load disturbs far less
    vs_bare: float
    vs_bare_spread: str
    target_script: float
    target_bare: float
    limits: str

    @property
    def met(self) -> bool:
        return self.vs_script >= self.target_script and self.vs_bare >= self.target_bare


@dataclass
class Context:
    lines: int
    baseline_lines: int
    regen: bool = False
    repeat: int = 3  # runs per timed subject; the fastest counts
    out: Path = OUT
    rows: list[Row] = field(default_factory=list)
    checks: list[Check] = field(default_factory=list)
    profile_target: list[str] | None = None
    shapes: list[ShapeRow] = field(default_factory=list)
    only_shapes: list[str] | None = None
    profiling: bool = False  # --profile: what limits each config shape comes from py-spy

    def shape(self, name: str, rate: float, vs_script: float, vs_script_spread: str, vs_script_cpu: float,
              vs_bare: float, vs_bare_spread: str, target_script: float, target_bare: float, limits: str,
              argv: list[str]) -> None:
        if self.profiling:
            limits = "; ".join(f"{share:.0f}% {func}" for share, func in top_functions(argv, self.out, 3))
        self.shapes.append(ShapeRow(name, rate, vs_script, vs_script_spread, vs_script_cpu, vs_bare, vs_bare_spread,
                                    target_script, target_bare, limits))

    def process(self, argv: list[str], *, stdout: Path) -> Proc:
        """Run a command to the end through ``LAUNCHER``; its wall time and its own peak RSS."""
        stdout.parent.mkdir(parents=True, exist_ok=True)
        err_path = stdout.with_suffix(stdout.suffix + ".err")
        usage_path = stdout.with_suffix(stdout.suffix + ".usage")
        with open(stdout, "wb") as out, open(err_path, "wb") as err:
            code = subprocess.call([sys.executable, "-c", LAUNCHER, str(usage_path), *argv], stdout=out, stderr=err)
        if code != 0:
            sys.exit(f"bench: {' '.join(argv)} exited with {code}:\n"
                     f"{err_path.read_text(errors='replace')[-2000:]}")
        seconds, max_rss_kib, cpu = usage_path.read_text().split()
        return Proc(argv, float(seconds), int(max_rss_kib) / 1024.0, stdout, float(cpu))

    def row(self, bench: str, subject: str, lines: int, seconds: float, rss_mb: float | None,
            note: str = "") -> None:
        self.rows.append(Row(bench, subject, lines, seconds, rss_mb, note))
        print(f"  {subject}: {lines} lines in {seconds:.2f} s", file=sys.stderr)

    def check(self, name: str, value: float, target: float) -> None:
        self.checks.append(Check(name, value, target))


def machine() -> str:
    cpu = platform.processor() or platform.machine()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    blas = ", ".join(f"{k}={os.environ[k]}" for k in ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE") if k in os.environ)
    return (f"{os.cpu_count()} cores ({cpu}), Python {platform.python_version()}, {platform.system()}"
            + (f", {blas}" if blas else ""))


def table(ctx: Context) -> str:
    head = f"{'benchmark':<24} {'subject':<24} {'lines':>9} {'seconds':>8} {'lines/s':>9} {'peak RSS':>9}  note"
    out = [head, "-" * len(head)]
    for r in ctx.rows:
        rss = f"{r.rss_mb:.0f} MB" if r.rss_mb is not None else "-"
        out.append(f"{r.bench:<24} {r.subject:<24} {r.lines:>9} {r.seconds:>8.2f} {r.rate:>9.0f} {rss:>9}  {r.note}")
    if ctx.shapes:
        out += ["", f"{'config shape':<26} {'records/s':>9} {'× script':>9} {'(rounds)':>11} {'(CPU)':>6} "
                f"{'× bare':>7} {'(rounds)':>11}  {'met':<4} what limits it"]
        for r in ctx.shapes:
            out.append(f"{r.shape:<26} {r.rate:>9.0f} {r.vs_script:>8.2f}× {r.vs_script_spread:>11} "
                       f"{r.vs_script_cpu:>5.2f}× {r.vs_bare:>6.2f}× {r.vs_bare_spread:>11}  {'yes' if r.met else 'NO':<4} "
                       f"{r.limits}")
        out.append(f"(targets: ≥ {ctx.shapes[0].target_script:g}× the script, ≥ {ctx.shapes[0].target_bare:g}× "
                   "the bare loop)")
    if ctx.checks:
        out += ["", f"{'ratio':<40} {'measured':>9} {'target':>8}  met"]
        for c in ctx.checks:
            out.append(f"{c.name:<40} {c.value:>8.2f}× {c.target:>7.2f}×  {'yes' if c.met else 'NO'}")
    return "\n".join(out)


def _shares(own: Counter, incl: Counter, total: float, top: int) -> list[str]:
    lines = [f"{'own %':>6} {'incl %':>6}  function"]
    for name, t in own.most_common(top):
        lines.append(f"{100 * t / total:>5.1f}% {100 * incl[name] / total:>5.1f}%  {name}")
    return lines


def profile_shares(argv: list[str], out: Path) -> tuple[str, Counter, Counter, float]:
    """Profile ``python -m MODULE ...``: with py-spy (sampling, so shares are not skewed by
    per-call overhead) when it is installed next to this Python, else with cProfile. Start-up
    imports are lumped into one line. Gives a heading, own and inclusive time per function
    and the total."""
    shown = " ".join(Path(a).name if "/" in a else a for a in argv)
    own: Counter = Counter()
    incl: Counter = Counter()
    spy = Path(sys.executable).with_name("py-spy")
    out.mkdir(parents=True, exist_ok=True)
    if spy.exists():
        raw = out / "profile.pyspy.txt"
        with open(out / "profile.stdout", "wb") as fh:
            subprocess.run([str(spy), "record", "-r", "200", "-f", "raw", "-o", str(raw), "--", *argv],
                           stdout=fh, stderr=subprocess.DEVNULL, check=True)
        total = 0
        for line in raw.read_text().splitlines():
            stack, n = line.rsplit(" ", 1)
            total += int(n)
            # "func (/path/to/file.py:123)" -> "func (file.py)"
            frames = [re.sub(r" \(.*?([^/]+?)(?::\d+)?\)$", r" (\1)", f) for f in stack.split(";")]
            if not stack.strip():
                frames = ["(no Python frame: interpreter start and exit)"]
            elif any("importlib" in f for f in frames):
                frames = ["(imports at start-up)"]
            own[frames[-1]] += int(n)
            for f in set(frames):
                incl[f] += int(n)
        return f"py-spy, {total} samples at 200 Hz of: {shown}", own, incl, total
    prof = out / "profile.pstats"
    with open(out / "profile.stdout", "wb") as fh:
        subprocess.run([sys.executable, "-m", "cProfile", "-o", str(prof), *argv[1:]], stdout=fh, check=True)
    stats = pstats.Stats(str(prof))
    for (file, line, name), (_, _, tt, ct, _) in stats.stats.items():  # type: ignore[attr-defined]
        key = f"{name} ({Path(file).name})" if line else name
        own[key] += tt
        incl[key] += ct
    return (f"cProfile (per-call overhead inflates small functions) of: {shown}", own, incl,
            stats.total_tt)  # type: ignore[attr-defined]


def top_functions(argv: list[str], out: Path, top: int) -> list[tuple[float, str]]:
    """The ``top`` functions by own time, as (percent, name)."""
    _, own, _, total = profile_shares(argv, out)
    return [(100 * t / total, name) for name, t in own.most_common(top)]


def profile(argv: list[str], out: Path, top: int = 20) -> str:
    head, own, incl, total = profile_shares(argv, out)
    return "\n".join([head, *_shares(own, incl, total, top)])


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="run tracewatch's benchmarks and print a table")
    size = ap.add_mutually_exclusive_group()
    size.add_argument("--quick", action="store_true", help=f"{QUICK_LINES} lines instead of {DEFAULT_LINES}")
    size.add_argument("--lines", type=int, help="lines in the scored file (env TRACEWATCH_BENCH_LINES)")
    ap.add_argument("--only", nargs="+", choices=sorted(BENCHMARKS), help="run only these benchmarks")
    ap.add_argument("--regen", action="store_true", help="rewrite the generated input files")
    ap.add_argument("--repeat", type=int, default=3, help="runs per timed subject, the fastest counts (default 3)")
    ap.add_argument("--profile", action="store_true",
                    help="also profile tracewatch on the same input (and each config shape of `score`)")
    ap.add_argument("--shape", nargs="+", metavar="SHAPE", help="score: only these config shapes (and the key-in-pattern one)")
    a = ap.parse_args(argv)
    lines = QUICK_LINES if a.quick else a.lines or int(os.environ.get("TRACEWATCH_BENCH_LINES", DEFAULT_LINES))
    ctx = Context(lines, max(50_000, int(lines * BASELINE_SHARE)), a.regen, max(1, a.repeat),
                  only_shapes=a.shape, profiling=a.profile)
    started = datetime.now(timezone.utc)
    print(f"tracewatch benchmarks, {started:%Y-%m-%d %H:%M} UTC, {machine()}", file=sys.stderr)
    for name in a.only or BENCHMARKS:
        print(f"[{name}] {lines} lines", file=sys.stderr)
        importlib.import_module(BENCHMARKS[name]).run(ctx)
    print()
    print(f"tracewatch benchmarks — {started:%Y-%m-%d}, {machine()}")
    print(table(ctx))
    results = {"date": started.isoformat(), "machine": machine(), "lines": lines, "repeat": ctx.repeat,
               "rows": [{**asdict(r), "lines_per_s": r.rate} for r in ctx.rows],
               "shapes": [{**asdict(r), "met": r.met} for r in ctx.shapes],
               "checks": [{**asdict(c), "met": c.met} for c in ctx.checks]}
    if a.profile and ctx.profile_target:
        text = profile(ctx.profile_target, ctx.out)
        print("\n" + text)
        results["profile"] = text
    ctx.out.mkdir(parents=True, exist_ok=True)
    (ctx.out / "results.json").write_text(json.dumps(results, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
