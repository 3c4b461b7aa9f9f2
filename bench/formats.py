"""Parsing throughput of every input format: records per second from decoded lines.

    .venv/bin/python bench/formats.py [--records N] [--repeat R]

For each format, generated input (the parcel-locker demo rendered as text, jsonl, RFC 5424 and
RFC 3164 syslog and OTLP/JSON traces; system calls shaped like ``strace -f -ttt -T`` output) is
handed to the format object 1,024 lines at a time (``read_block``), as the pipeline does, and
timed; the fastest of ``--repeat`` runs counts. Only the format stage is measured (no
templates, sessions or model).
Also usable from ``bench/run.py`` through ``run(ctx)``. Nothing here asserts a timing.
"""

from __future__ import annotations

import argparse
import json
import random
import sys
import time
from datetime import datetime, timezone
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from tracewatch.config import SourceConfig  # noqa: E402
from tracewatch.demo.scenario import generate, parcel_lockers, render_text  # noqa: E402
from tracewatch.demo.traces import render_otlp  # noqa: E402
from tracewatch.formats import make_format  # noqa: E402
from tracewatch.pipeline import TICK_EVERY  # noqa: E402


def _events(n_records: int, seed: int):
    """(time, key, step) of demo sessions in time order, about ``n_records`` of them."""
    scenario = parcel_lockers()
    sessions = generate(scenario, max(1, n_records // 8), 0, seed=seed)
    events = sorted(((t, s.key, step) for s in sessions for t, step in zip(s.times, s.steps)), key=lambda e: e[0])
    return scenario, sessions, events[:n_records]


def _iso(t: float) -> str:
    return datetime.fromtimestamp(t, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z"


def _bsd(t: float) -> str:
    d = datetime.fromtimestamp(t, tz=timezone.utc)
    return f"{d:%b} {d.day:>2} {d:%H:%M:%S}"


_SEVERITY = {"INFO": 6, "WARN": 4, "ERROR": 3}


def strace_lines(n_records: int, seed: int) -> list[str]:
    """Lines shaped like ``strace -f -ttt -T -o FILE`` output of many short processes."""
    rng = random.Random(seed)
    calls = ['openat(AT_FDCWD, "/usr/lib/locale/C.utf8/LC_{}", O_RDONLY|O_CLOEXEC) = {}',
             'read({}, "\\177ELF\\2\\1\\1\\3\\0\\0\\0\\0\\0\\0\\0\\0"..., 832) = {}',
             "mmap(NULL, {}, PROT_READ, MAP_PRIVATE|MAP_DENYWRITE, 3, 0) = 0x7f{:08x}",
             "fstat({}, {{st_mode=S_IFREG|0644, st_size={}, ...}}) = 0",
             'access("/etc/ld.so.preload", R_OK) = -1 ENOENT (No such file or directory)',
             "close({}) = 0", "brk(NULL) = 0x55{:08x}", 'write(1, "parcel PX{}\\n", 12) = 12']
    out: list[str] = []
    t, pid = 1796163445.0, 4000
    while len(out) < n_records:
        pid += rng.randint(1, 3)
        for _ in range(rng.randint(40, 200)):
            t += rng.uniform(1e-5, 5e-4)
            dur = f" <{rng.uniform(1e-6, 1e-3):.6f}>"
            if rng.random() < 0.04:
                out.append(f"{pid}  {t:.6f} wait4(-1,  <unfinished ...>")
                out.append(f"{pid + 1}  {t + 1e-5:.6f} getpid() = {pid + 1}{dur}")
                out.append(f"{pid}  {t + 2e-5:.6f} <... wait4 resumed>[{{WIFEXITED(s) && WEXITSTATUS(s) == 0}}],"
                           f" 0, NULL) = {pid + 1}{dur}")
                continue
            call = rng.choice(calls).format(*(rng.randint(3, 99999) for _ in range(2)))
            out.append(f"{pid}  {t:.6f} {call}{dur}")
        out.append(f"{pid}  {t:.6f} exit_group(0) = ?")
        out.append(f"{pid}  {t:.6f} +++ exited with 0 +++")
    return out[:n_records]


def inputs(n_records: int, seed: int = 1) -> dict[str, tuple[dict, list[str]]]:
    """format label -> (source options, lines)."""
    scenario, sessions, events = _events(n_records, seed)
    text = render_text(scenario, sessions)[:n_records]
    jsonl = [json.dumps({"time": _iso(t), "level": s.level, "message": s.message, "ctx": {"req": k}})
             for t, k, s in events]
    rfc5424 = [f'<{16 * 8 + _SEVERITY[s.level]}>1 {_iso(t)} locker-gw-3 locker-api 812 - [req@32473 id="{k}"] '
               f"{s.message}" for t, k, s in events]
    rfc3164 = [f"<{16 * 8 + _SEVERITY[s.level]}>{_bsd(t)} locker-gw-3 locker-api[812]: req={k} {s.message}"
               for t, k, s in events]
    otlp = render_otlp(sessions, seed=seed)
    return {
        "text": ({"format": "text", "line_pattern": scenario.line_pattern}, text),
        "jsonl": ({"format": "jsonl", "session_key": "ctx.req"}, jsonl),
        "syslog (RFC 5424)": ({"format": "syslog", "session_field": "[req@32473 id]"}, rfc5424),
        "syslog (RFC 3164)": ({"format": "syslog", "session_key": r"req=(?P<key>\S+)"}, rfc3164),
        "otlp-json": ({"format": "otlp-json"}, otlp),
        "strace": ({"format": "strace"}, strace_lines(n_records, seed)),
        "strace (tree)": ({"format": "strace", "strace_session": "tree"}, strace_lines(n_records, seed)),
    }


def measure(options: dict, lines: list[str], repeat: int) -> tuple[float, int]:
    """Fastest time to parse ``lines`` with a fresh format object, and the records it gave."""
    best, records = float("inf"), 0
    for _ in range(repeat):
        fmt = make_format(SourceConfig(name="bench", **options))
        offsets = list(range(len(lines)))
        t0 = time.perf_counter()
        records = rejected = 0
        for lo in range(0, len(lines), TICK_EVERY):
            cols = fmt.read_block(lines[lo:lo + TICK_EVERY], offsets[lo:lo + TICK_EVERY])
            records += len(cols)
            rejected += len(cols.rejected)
        records += len(fmt.finish())
        best = min(best, time.perf_counter() - t0)
        if rejected:
            sys.exit(f"bench: {options['format']} rejected {rejected} generated lines")
    return best, records


def run(ctx) -> None:
    """``bench/run.py`` entry point: one row per format (lines = input lines)."""
    for label, (options, lines) in inputs(min(ctx.lines, 200_000)).items():
        seconds, records = measure(options, lines, ctx.repeat)
        ctx.row("formats", label, len(lines), seconds, None, f"{records / seconds:,.0f} records/s")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="Parsing throughput per input format.")
    ap.add_argument("--records", type=int, default=200_000, help="records of input per format (default 200k)")
    ap.add_argument("--repeat", type=int, default=3)
    a = ap.parse_args(argv)
    print(f"{'format':<20} {'lines':>9} {'records':>9} {'MB':>7} {'seconds':>8} {'records/s':>11} {'MB/s':>7}")
    for label, (options, lines) in inputs(a.records).items():
        seconds, records = measure(options, lines, a.repeat)
        mb = sum(len(x) + 1 for x in lines) / 1e6
        print(f"{label:<20} {len(lines):>9} {records:>9} {mb:>7.1f} {seconds:>8.2f} {records / seconds:>11,.0f} "
              f"{mb / seconds:>7.1f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
