"""A starter config from one log file (``tracewatch init``).

Stage: before the pipeline. The first :data:`SAMPLE_LINES` lines of a file are read by the real
format readers (``tracewatch/formats``) with candidate options, and the options that read the
most become the guess: the format, the time layout (:func:`tracewatch.timestamps.detect`, the
one detector of layouts) and the session key — a field that repeats across lines and takes many
values. Each guess carries how sure it is: the share of sampled lines it holds for.
"""

from __future__ import annotations

import json
import math
import os
import re
import tomllib
from collections import Counter
from dataclasses import dataclass, field
from itertools import islice
from pathlib import Path

import orjson

from .config import CONTAINER_FORMATS, SourceConfig, parse_config
from .errors import ConfigError, InputError
from .formats import FORMATS, Rejection, feed_lines, make_format
from .model.calibrate import calibration_needed, calibration_size
from .timestamps import detect

SAMPLE_LINES = 3000
SAMPLE_BYTES = 64 * 2**20  # an OTLP/JSON line holds a whole export batch
# formats recognised by their own reader, most specific first; text reads anything, so it is the fallback
STRUCTURED = tuple(f for f in FORMATS if f != "text")
LEVELS = {"TRACE", "DEBUG", "INFO", "NOTICE", "WARN", "WARNING", "ERROR", "ERR", "CRITICAL", "CRIT", "FATAL",
          "ALERT", "EMERG", "SEVERE"}
_PAIR = re.compile(r"(?<![\w.-])([A-Za-z_][\w.-]{0,31})=([^\s\]\[,;()\"'=]+)")
_KEY_VALUE = r'[^\s\]\[,;()"]+'
_JSON_NAMES = {"message_field": ("message", "msg", "log", "text", "body", "event"),
               "time_field": ("time", "timestamp", "ts", "@timestamp", "datetime", "date", "t"),
               "level_field": ("level", "severity", "lvl", "levelname", "log.level", "loglevel")}


@dataclass
class Guess:
    """One guessed setting: what, how sure (the share of sampled lines it holds for), why."""

    what: str
    value: str
    share: float
    detail: str

    @property
    def sureness(self) -> str:
        return "sure" if self.share >= 0.95 else "likely" if self.share >= 0.7 else "unsure"

    def line(self) -> str:
        return f"{self.what}: {self.value} — {self.sureness} ({self.share:.0%}; {self.detail})"


@dataclass
class Starter:
    """The guessed source (its options as the config takes them) and the guesses behind it."""

    options: dict
    guesses: list[Guess] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)  # what else to know before fitting


def sample_lines(path: Path) -> list[str]:
    """The first :data:`SAMPLE_LINES` lines of ``path`` (at most :data:`SAMPLE_BYTES`), decoded."""
    try:
        with open(path, encoding="utf-8", errors="replace", newline="") as f:
            lines, size = [], 0
            for line in islice(f, SAMPLE_LINES):
                size += len(line)
                if size > SAMPLE_BYTES:
                    break
                lines.append(line.rstrip("\r\n"))
    except OSError as exc:
        raise InputError(f"{path}: cannot read: {exc.strerror or exc}") from exc
    if not any(line.strip() for line in lines):
        raise InputError(f"{path}: no lines to learn from (the file is empty)")
    return lines


@dataclass
class Trial:
    """What the real reader of a format made of the sample with some options."""

    lines: int  # non-empty lines
    rejected: int
    keys: list  # session key of every record

    @property
    def records(self) -> int:
        return len(self.keys)

    @property
    def read_share(self) -> float:
        return 0.0 if not self.records else max(0.0, 1 - self.rejected / max(self.lines, 1))


def trial(lines: list[str], options: dict) -> Trial:
    """The real reader of ``options["format"]`` over the sample; for jsonl, a line missing the
    message field is not counted against it (the field is guessed after)."""
    src = SourceConfig(name="sample", **options)
    if src.format in CONTAINER_FORMATS:
        src = src.model_copy(update={"container_key_prefix": False})
    out = feed_lines(make_format(src), lines)
    records = [x if not isinstance(x, Rejection) else x.record for x in out]
    records = [r for r in records if r is not None]
    rejected = sum(isinstance(x, Rejection) and x.reason != "no_message_field" for x in out)
    return Trial(sum(bool(line.strip()) for line in lines), rejected, [r.key for r in records])


def key_share(keys: list) -> tuple[float, int]:
    """How good a session key the values ``keys`` (one per record, None when absent) make: the
    share of records whose value also appears on another record, and the number of distinct
    values; a value that never repeats or a field with a single value is no session key."""
    counts = Counter(k for k in keys if k is not None)
    if len(counts) < 2 or not keys:
        return 0.0, len(counts)
    return sum(n for n in counts.values() if n > 1) / len(keys), len(counts)


def best_key(lines: list[str], base: dict, candidates: dict[str, dict]) -> tuple[str, dict, float, int] | None:
    """The candidate (name -> options added to ``base``) that best repeats across records and
    takes many values: the highest share of repeating records × log(distinct values), so a field
    of a few values on every line (a locker, a status) loses to a request id on most lines; None
    when no candidate repeats at all."""
    best, best_rank = None, 0.0
    for name, extra in candidates.items():
        share, distinct = key_share(trial(lines, {**base, **extra}).keys)
        rank = share * math.log(distinct) if distinct > 1 else 0.0
        if rank > best_rank:
            best, best_rank = (name, extra, share, distinct), rank
    return best


def _pair_candidates(texts: list[str]) -> dict[str, dict]:
    """``name=value`` pairs seen in at least a fifth of the texts, as session_key regexes."""
    names = Counter(n for t in texts for n in {m[1] for m in _PAIR.finditer(t)})
    return {f"{name}=": {"session_key": rf"\b{re.escape(name)}=(?P<key>{_KEY_VALUE})"}
            for name, n in names.most_common(20) if n >= len(texts) / 5}


# -- text: a line_pattern ----------------------------------------------------------------------
def _prefix(line: str, n: int) -> str | None:
    if n == 0:
        m = re.match(r"\[([^\]]+)\]", line)
        return m[1] if m else None
    m = re.match(r"\S+(?:\s+\S+){%d}" % (n - 1), line)
    return m[0] if m else None


def _time_prefix(lines: list[str]) -> tuple[str, str, float, str] | None:
    """The regex of the time at the start of the lines, the layout, the share of lines it reads
    and an example: the longest run of leading tokens (or a bracketed start) that reads."""
    best = None
    for n in (0, 1, 2, 3, 4, 5, 6):
        layouts = Counter()
        example = None
        for line in lines:
            text = _prefix(line, n)
            layout = detect(text)[1] if text else None
            if layout is not None:
                layouts[layout.name] += 1
                example = example or text
        if layouts:
            name, hits = layouts.most_common(1)[0]
            if best is None or hits >= best[2]:
                rx = r"\[(?P<ts>[^\]]+)\]" if n == 0 else r"(?P<ts>\S+%s)" % (r"\s+\S+" * (n - 1))
                best = (rx, name, hits, example)
    return None if best is None else (best[0], best[1], best[2] / len(lines), best[3])


def _level_after(lines: list[str], head: re.Pattern) -> str | None:
    """The regex of a level word right after ``head`` on most lines (bracketed or not)."""
    shapes = Counter()
    for line in lines:
        m = head.match(line)
        token = line[m.end():].split(None, 1)[0] if m and line[m.end():].strip() else ""
        if token.strip("[]:").upper() in LEVELS:
            shapes["bracket" if token.startswith("[") else "plain"] += 1
    if not shapes or sum(shapes.values()) < 0.8 * len(lines):
        return None
    return r"\[(?P<level>[A-Za-z]+)\]" if shapes.most_common(1)[0][0] == "bracket" else r"(?P<level>[A-Za-z]+):?"


def guess_text(lines: list[str]) -> Starter:
    texts = [line for line in lines if line.strip()]
    parts, guesses = [], []
    stamp = _time_prefix(texts)
    if stamp is not None and stamp[2] >= 0.5:
        parts.append(stamp[0])
        guesses.append(Guess("time", stamp[1], stamp[2], f"at the start of the line, e.g. {stamp[3]!r}"))
    level = _level_after(texts, re.compile(r"\s*".join(["^"] + parts)))
    if level:
        parts.append(level)
    pattern = "^" + r"\s+".join(parts + ["(?P<message>.*)"]) + "$"
    options = {"format": "text", "line_pattern": pattern}
    if stamp is not None and stamp[2] >= 0.5:
        options["ts_format"] = stamp[1]
    return _with_key(lines, Starter(options, guesses), _pair_candidates(texts))


def _with_key(lines: list[str], starter: Starter, candidates: dict[str, dict]) -> Starter:
    key = best_key(lines, starter.options, candidates)
    if key is None:
        starter.guesses.append(Guess("session key", "none", 0.0, "no field repeats across lines; records are "
                                     "grouped in time windows ([sessions] window_s)"))
        return starter
    name, extra, share, distinct = key
    starter.options.update(extra)
    starter.guesses.append(Guess("session key", name, share, f"{distinct} distinct values, each on "
                                 "several lines"))
    return starter


# -- jsonl: field paths ---------------------------------------------------------------------------
def _flat(obj: dict, prefix: str = "", depth: int = 3) -> dict:
    out = {}
    for k, v in obj.items():
        if isinstance(v, dict) and depth > 1:
            out.update(_flat(v, f"{prefix}{k}.", depth - 1))
        elif isinstance(v, (str, int, float)) and not isinstance(v, bool):
            out[f"{prefix}{k}"] = v
    return out


def guess_jsonl(lines: list[str]) -> Starter:
    rows = []
    for line in lines:
        try:
            obj = orjson.loads(line)
        except orjson.JSONDecodeError:
            continue
        if isinstance(obj, dict):
            rows.append(_flat(obj))
    seen = Counter(p for row in rows for p in row)
    common = [p for p, n in seen.most_common() if n >= len(rows) / 2]
    options, guesses = {"format": "jsonl"}, []
    strings = [p for p in common if all(isinstance(r.get(p, ""), str) for r in rows)]
    named = {key: next((p for p in names if p in common), None) for key, names in _JSON_NAMES.items()}
    message = named["message_field"] or max(strings, key=lambda p: sum(len(r.get(p, "")) for r in rows), default=None)
    if message is None:
        raise InputError("no text field found in the JSON objects to take as the message")
    options["message_field"] = message
    guesses.append(Guess("message field", message, seen[message] / len(rows), "the text that is mined into templates"))
    times = {p: Counter(getattr(detect(str(r[p]))[1], "name", None) for r in rows if p in r) for p in common}
    times = {p: c for p, c in times.items() if c.most_common(1)[0][0] is not None}
    tfield = named["time_field"] if named["time_field"] in times else next(iter(times), None)
    options["time_field"] = tfield
    if tfield is not None:
        layout, hits = times[tfield].most_common(1)[0]
        if all(isinstance(r.get(tfield, ""), str) for r in rows):
            options["ts_format"] = layout
        guesses.append(Guess("time", f"{tfield} ({layout})", hits / len(rows), f"e.g. {rows[0].get(tfield)!r}"))
    options["level_field"] = named["level_field"]
    taken = {message, tfield, named["level_field"]}
    candidates = {p: {"session_key": p} for p in common if p not in taken}
    return _with_key(lines, Starter(options, guesses), candidates)


# -- the other formats ---------------------------------------------------------------------------
def guess_syslog(lines: list[str]) -> Starter:
    texts = [line for line in lines if line.strip()]
    candidates = {"procid": {"session_field": "procid"}, **_pair_candidates(texts)}
    return _with_key(lines, Starter({"format": "syslog"}, [Guess("time", "the syslog header", 1.0, "RFC 5424 or "
                                                                 "RFC 3164")]), candidates)


def guess_journald(lines: list[str]) -> Starter:
    """The journal's export: a process of a unit, or a ``name=`` pair in the messages."""
    candidates = {"_SYSTEMD_UNIT/_PID": {"journal_key_fields": ["_SYSTEMD_UNIT", "_PID"]},
                  **_pair_candidates([line for line in lines if line.strip()])}
    return _with_key(lines, Starter({"format": "journald"}, [Guess("time", "from the format", 1.0,
                                                                   "the journal's __REALTIME_TIMESTAMP")]), candidates)


def guess_container(lines: list[str], fmt: str) -> Starter:
    """A container log: the payload (every record's message, read as plain text) is guessed
    as jsonl or text, and its options go with ``payload_format``."""
    src = SourceConfig(name="sample", format=fmt, container_key_prefix=False)
    payload = [r.message for r in feed_lines(make_format(src), lines) if not isinstance(r, Rejection)]
    inner = guess_payload(payload)
    return Starter({"format": fmt, "payload_format": inner.options["format"], **inner.options} | {"format": fmt},
                   inner.guesses)


def guess_payload(lines: list[str]) -> Starter:
    """jsonl when most lines are JSON objects, else text."""
    return guess_jsonl(lines) if trial(lines, {"format": "jsonl"}).read_share >= 0.5 else guess_text(lines)


INHERENT = {"otlp-json": ("traceId", "the span's start time (startTimeUnixNano)"),
            "otlp-logs-json": ("traceId", "the record's time (timeUnixNano)"),
            "strace": ("pid", "strace's own time stamps (-t, -tt or -ttt)")}


def guess(lines: list[str]) -> Starter:
    """The starter source for a sample of lines: its format (the structured reader that reads
    the most lines, text when none reads half), then that format's own guesses."""
    trials = {fmt: trial(lines, {"format": fmt}) for fmt in STRUCTURED}
    shares = {fmt: t.read_share for fmt, t in trials.items()}
    ranked = sorted(STRUCTURED, key=lambda f: -shares[f])  # stable: ties go to the more specific
    fmt = ranked[0] if shares[ranked[0]] >= 0.5 else "text"
    if fmt == "text":
        starter = guess_text(lines)
        share = trial(lines, starter.options).read_share
    elif fmt == "jsonl":
        starter, share = guess_jsonl(lines), shares[fmt]
    elif fmt == "syslog":
        starter, share = guess_syslog(lines), shares[fmt]
    elif fmt == "journald":
        starter, share = guess_journald(lines), shares[fmt]
    elif fmt in CONTAINER_FORMATS:
        starter, share = guess_container(lines, fmt), shares[fmt]
    else:
        key, when = INHERENT[fmt]
        kshare, distinct = key_share(trials[fmt].keys)
        starter, share = Starter({"format": fmt}, [Guess("time", "from the format", 1.0, when),
                                                   Guess("session key", key, kshare, f"{distinct} distinct values, "
                                                         "set by the format")]), shares[fmt]
    runner = next((f for f in ranked if f != fmt), None)
    detail = f"its reader reads {shares.get(fmt, share):.0%} of the sampled lines" if fmt != "text" else \
        "the line_pattern below matches that share of the sampled lines"
    if runner is not None:
        detail += f"; next best {runner} {shares[runner]:.0%}"
    starter.guesses.insert(0, Guess("format", fmt, share, detail))
    return starter


# -- the config file -----------------------------------------------------------------------------
def _toml(value) -> str:
    """A TOML value: a string in single quotes (literal, as regexes read best) when it can be."""
    if isinstance(value, str):
        return f"'{value}'" if "'" not in value and "\n" not in value else json.dumps(value, ensure_ascii=False)
    return json.dumps(value)


CAUTION = ("# state_dir holds baselines, alerts and checkpoints with text taken from your logs, which can\n"
           "# include secrets and personal data: keep it private and apply your own data-retention rules.")


def render(starter: Starter, log: Path, out: Path, sampled: int) -> str:
    """The commented config text: the guesses, then a source that reads ``log``."""
    name = re.sub(r"[^A-Za-z0-9_.-]+", "-", log.stem).strip("-.") or "app"
    rel = os.path.relpath(log.resolve(), out.resolve().parent)
    lines = [f"# tracewatch starter config, guessed by `tracewatch init` from the first {sampled} lines of",
             f"# {log}:"]
    lines += [f"#   {g.line()}" for g in starter.guesses]
    lines += ["# Check each guess below, then:",
              f"#   tracewatch check-config --config {out.name}",
              f"#   tracewatch fit --config {out.name}          # on a period of normal traffic",
              f"#   tracewatch score --config {out.name} NEWER.log",
              CAUTION, 'state_dir = "tracewatch-state"', "", "[[sources]]",
              f"name = {_toml(name)}",
              f"paths = [{_toml(rel)}]          # relative to this file's folder"]
    notes = {"line_pattern": "named groups: message (required), ts, level, key",
             "session_key": "the unit of work that gets scored: all records with the same key",
             "ts_format": "a layout of tracewatch/timestamps.py or a strptime pattern"}
    for key, value in starter.options.items():
        if value is None:
            lines.append(f"# {key} =                  # none found")
            continue
        lines.append(f"{key} = {_toml(value)}" + (f"    # {notes[key]}" if key in notes else ""))
    lines += ["", "[model]",
              "false_alarm_rate = 0.005   # share of normal sessions that may raise an alert (the threshold)",
              "", "[sessions]",
              "idle_timeout_s = 30        # a session with no record for this long is closed and scored", ""]
    return "\n".join(lines)


def rate_note(lines: list[str], options: dict, false_alarm_rate: float, calibration_fraction: float) -> str:
    """Whether ``false_alarm_rate`` is reachable by a fit on as many sessions as the sample holds:
    a fit calibrates on ``calibration_fraction`` of its sessions, and the lowest p-value n of
    them give is 1/(n + 1) (split-conformal; :mod:`tracewatch.model.calibrate`)."""
    need = calibration_needed(false_alarm_rate)
    fit_on = math.ceil(need / calibration_fraction)
    sessions = len({k for k in trial(lines, options).keys if k is not None})
    if not sessions:
        return (f"false_alarm_rate {false_alarm_rate}: a fit needs at least {need} calibration sessions, "
                f"about {fit_on} baseline sessions (not counted here: without a session key they are time windows)")
    n_cal = calibration_size(sessions, calibration_fraction)
    held = (f"the {len(lines)} sampled lines hold {sessions} sessions; a fit on as many would calibrate on "
            f"{n_cal}, whose lowest p-value is 1/{n_cal + 1} = {1 / (n_cal + 1):.3g}")
    if n_cal >= need:
        return f"false_alarm_rate {false_alarm_rate} is reachable: {held}"
    return (f"false_alarm_rate {false_alarm_rate} is NOT reachable with this many sessions: {held}, above the "
            f"rate, so only never-seen events would raise alerts; fit on at least {fit_on} sessions ({need} to "
            f"calibrate), or set false_alarm_rate to {_rounded_up(1 / (n_cal + 1))} or more")


def _rounded_up(x: float) -> float:
    """``x`` (> 0) to three significant digits, rounded up."""
    digits = 2 - math.floor(math.log10(x))
    return math.ceil(x * 10**digits - 1e-9) / 10**digits


def write_starter(log: str | Path, out: str | Path, *, force: bool = False) -> tuple[Starter, Path]:
    """Guess a config for ``log`` and write it to ``out`` (refused when it exists, unless ``force``);
    the text written is checked by the config's own validation first."""
    log, out = Path(log), Path(out)
    if out.exists() and not force:
        raise ConfigError(f"{out}: already exists; give --force to overwrite it or --out another file")
    lines = sample_lines(log)
    starter = guess(lines)
    text = render(starter, log, out, len(lines))
    model = parse_config(tomllib.loads(text), origin=str(out)).model
    starter.notes.append(rate_note(lines, starter.options, model.false_alarm_rate, model.calibration_fraction))
    try:
        out.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"{out}: cannot write: {exc.strerror or exc}") from exc
    return starter, out


__all__ = ["Guess", "Starter", "guess", "render", "sample_lines", "write_starter"]
