"""Command line: the command tree only; every command calls into the package.

Any error a user can cause ends as one line on stderr and a non-zero exit code (2 for a bad
config or bad arguments), never a traceback.
"""

from __future__ import annotations

import argparse
import gc
import sys
from pathlib import Path

import orjson
import shtab

from . import __version__
from .alerts.store import STATUSES
from .baselines import (baselines_dir, current_version, list_versions, load_baseline, load_baseline_dir,
                        set_current)
from .batch import assign_sources, byte_progress, fit_files, score_files, template_rows, unread_lines
from .config import Config, IncidentsConfig, adhoc_config, load_config
from .errors import ConfigError, TracewatchError
from .model.baseline import drift_warning
from .pipeline import Pipeline

CAUTION = ("Logs can hold secrets and personal data: keep state_dir private and follow your "
           "own data-protection rules. An anomaly detector misses things and raises false alarms; "
           "it complements, never replaces, health checks and security controls.")


class _Parser(argparse.ArgumentParser):
    intermixed = False  # positionals may follow options (`baselines refit --config F INPUT...`)

    def error(self, message: str):  # one line, exit code 2, as for a bad config
        self.exit(2, f"tracewatch: error: {message}\n")

    def parse_known_args(self, args=None, namespace=None):
        if not self.intermixed:
            return super().parse_known_args(args, namespace)
        self.intermixed = False  # parse_known_intermixed_args calls back into parse_known_args
        try:
            return self.parse_known_intermixed_args(args, namespace)
        finally:
            self.intermixed = True


def _config(args) -> Config:
    if getattr(args, "config", None):
        return load_config(args.config)
    fmt = getattr(args, "format", None)
    if fmt:
        return adhoc_config(fmt, state_dir=Path(args.state_dir))
    raise ConfigError("give --config FILE (or --format FMT to read whole lines without a config)")


def _out(obj) -> None:
    sys.stdout.buffer.write(orjson.dumps(obj, option=orjson.OPT_APPEND_NEWLINE | orjson.OPT_SERIALIZE_NUMPY))


# -- commands ----------------------------------------------------------------------------------
def cmd_check_config(args) -> int:
    cfg = _config(args)
    print(f"config OK: {len(cfg.sources)} source(s) "
          f"({', '.join(f'{s.name}:{s.format}' for s in cfg.sources) or 'none'}); state_dir {cfg.state_dir}")
    return 0


INIT_HELP = (
    "Write a starter config for one log file: its first few thousand lines are read by each of "
    "tracewatch's format readers, and the format that reads the most, its time layout and a session "
    "key (a field that repeats across lines and takes many values: a request id, a pid, a trace id) "
    "are guessed. Each guess is printed on one line with how sure it is (the share of sampled lines "
    "it holds for). The config is checked before it is written; an existing file is kept unless "
    "--force. Read the guesses before fitting: a wrong session key gives a baseline of nonsense.")


def cmd_init(args) -> int:
    from .starter import write_starter

    starter, out = write_starter(args.logfile, args.out, force=args.force)
    for g in starter.guesses:
        print(g.line())
    print(f"wrote {out}; next: tracewatch check-config --config {out}")
    return 0


def cmd_fit(args) -> int:
    cfg = _config(args)
    pairs = assign_sources(cfg, args.inputs, args.source)
    with byte_progress(pairs, "fit: reading") as on_bytes:
        baseline, path, pipeline = fit_files(cfg, pairs, on_bytes)
    for line in unread_lines(pipeline, refuse=False):
        print(f"tracewatch: {line}", file=sys.stderr)
    if args.json:
        _out({"version": baseline.version, "path": str(path), **baseline.report})
    else:
        print(format_report(baseline.report, baseline.version, path, pipeline))
    return 0


def cmd_score(args) -> int:
    cfg = _config(args)
    if args.incidents and args.all:
        raise ConfigError("score: --incidents prints incidents, --all every session; choose one")
    baseline = load_baseline(cfg.state_dir, args.baseline)
    pairs = assign_sources(cfg, args.inputs, args.source)
    drift = drift_warning(baseline, cfg)
    if drift:
        print(f"tracewatch: {drift}", file=sys.stderr)
    with byte_progress(pairs, "score") as on_bytes:
        if args.incidents:
            pipeline = _score_incidents(cfg, pairs, baseline, args.output, on_bytes)
        else:
            pipeline = score_files(cfg, pairs, baseline, _out if args.output == "json" else _alert_text,
                                   score_all=args.all, on_bytes=on_bytes)
    sys.stdout.flush()
    for line in unread_lines(pipeline, refuse=False):
        print(f"tracewatch: {line}", file=sys.stderr)
    n_alerts = sum(pipeline.alerts.values())
    if args.verbose:
        reasons = ", ".join(f"{r}={n}" for (_, r), n in sorted(pipeline.alerts.items())) or "none"
        print(f"tracewatch: {sum(pipeline.sessions_scored.values())} sessions scored with baseline "
              f"{baseline.version}; alerts by reason: {reasons}", file=sys.stderr)
    return EXIT_ALERTS if args.fail_on_alert and n_alerts else 0


def _detail(store, cfg: Config, incident: dict) -> dict:
    """An incident's detail form as `incidents show` and `score --incidents` print it."""
    from .alerts import summary
    from .alerts.alert import Redactor

    return summary.detail(incident, max_samples=cfg.incidents.max_samples, redact=Redactor(cfg.redact),
                          alert_counts=lambda b: store.alert_counts(b, incident_id=incident["id"]))


def _score_incidents(cfg: Config, pairs, baseline, output: str, on_bytes) -> Pipeline:
    """`score --incidents`: the replay's alerts grouped as the daemon would, in a store of their
    own (a temporary directory; the daemon's incidents.db is never touched), then printed: one
    detail object per incident (json), or the table and each incident in detail (text)."""
    import tempfile

    from .alerts import summary
    from .alerts.store import IncidentStore
    from .batch import group_files

    with tempfile.TemporaryDirectory(prefix="tracewatch-replay-") as tmp:
        store = IncidentStore.open(Path(tmp))
        try:
            pipeline = group_files(cfg, pairs, baseline, store, on_bytes=on_bytes)
            found = store.incidents(limit=-1)
            details = [{**_detail(store, cfg, store.incident(r["id"])), "alert_ids": store.alert_ids(r["id"], limit=-1)}
                       for r in found]
        finally:
            store.close()
    if output == "json":
        for d in details:
            _out(d)
    else:
        print(summary.table([summary.brief(r) for r in found]), end="\n\n")
        for d in details:
            print(summary.text(d), end="\n\n")
    return pipeline


def _alert_text(alert: dict) -> None:
    from .alerts.summary import alert_text

    print(alert_text(alert), end="\n\n")


def cmd_templates(args) -> int:
    cfg = _config(args)
    rows, pipeline = template_rows(cfg, assign_sources(cfg, args.inputs, args.source))
    tpls = pipeline.miner.templates
    for line, idx in rows:
        _out({"line": line, "template_id": tpls[idx].id, "template": tpls[idx].text})
    return 0


def cmd_baselines(args) -> int:
    cfg = _config(args)
    if args.action == "refit":
        return _refit(cfg, args)
    if args.inputs:
        raise ConfigError(f"baselines {args.action}: unexpected {' '.join(args.inputs)!r}")
    if args.action == "use":
        if not args.version:
            raise ConfigError("baselines use: name the VERSION to make current")
        load_baseline_dir(baselines_dir(cfg.state_dir) / args.version)  # refuse a corrupt one
        set_current(cfg.state_dir, args.version)
        print(f"current baseline is now {args.version}")
        return 0
    if args.action == "show":
        b = load_baseline(cfg.state_dir, args.version)
        print(format_report(b.report, b.version, baselines_dir(cfg.state_dir) / b.version, None))
        return 0
    current = current_version(cfg.state_dir)
    versions = list_versions(cfg.state_dir)
    if not versions:
        print(f"no baselines in {baselines_dir(cfg.state_dir)}")
    for v in versions:
        print(f"{'*' if v == current else ' '} {v}")
    return 0


# -- `baselines refit` (tracewatch/refit.py) -------------------------------------------------------
BASELINES_HELP = (
    "Without an action, list the baseline versions (* marks the current one); 'show VERSION' prints "
    "a version's fit report; 'use VERSION' makes it current (roll back). 'refit INPUT...' scores the "
    "files with the current baseline, fits a candidate on the sessions that raised nothing (and those "
    "whose alert belongs to an incident labelled expected), and applies the gates: enough sessions, "
    "enough calibration sessions, a false-alarm rate on the most recent sessions consistent with "
    "false_alarm_rate, and every alert of incidents labelled a known problem (and of open incidents) "
    "still flagged. A candidate that passes is saved and made current; one that fails is saved and "
    "left aside (exit code 3). --dry-run saves nothing. The gates cannot see a problem that never "
    "raised an alert: a refit learns whatever the quiet traffic shows.")


def _refit(cfg: Config, args) -> int:
    from .refit import format_refit, refit_files

    inputs = ([args.version] if args.version else []) + args.inputs
    report = refit_files(cfg, assign_sources(cfg, inputs, args.source), dry_run=args.dry_run)
    if args.json:
        _out(report)
    else:
        print(format_refit(report))
    if report["outcome"] in ("refused", "skipped"):
        failed = ", ".join(g["gate"] for g in report["gates"] if not g["passed"])
        print(f"tracewatch: refit refused: {failed} gate failed; the current baseline is kept", file=sys.stderr)
        return 3
    return 0


# -- `run` (the daemon) ---------------------------------------------------------------------------
RUN_HELP = (
    "Follow the config's source files as they grow, score sessions as they close with the current "
    "baseline (hot-reloaded when it changes), append alerts to <state_dir>/alerts.jsonl and serve "
    "/metrics, /healthz, /readyz, /api/status and /api/alerts on [server] listen "
    "(default 127.0.0.1:9464). Stop it with SIGTERM or Ctrl-C: it saves its state and exits 0; "
    "after a crash it resumes from its last checkpoint without losing or repeating anything. "
    "SIGHUP re-reads the config and the baseline (a config that fails validation is refused with "
    "one log line and the running one kept). Under systemd (Type=notify) it reports ready, "
    "reloading, stopping and watchdog pings over $NOTIFY_SOCKET. "
    "HTTP exposure: it binds loopback by default; the metrics and the API expose log-derived data "
    "(session keys, template text, sample lines after redaction) without authentication, so follow "
    "your own security rules before binding it to any other address.")


def cmd_run(args) -> int:
    from .service.daemon import run_daemon

    return run_daemon(load_config(args.config), config_path=args.config, log_level=args.log_level,
                      log_format=args.log_format)


# -- `incidents` (tracewatch/alerts/incidents.py, tracewatch/service/client.py) ------------------------
INCIDENTS_HELP = (
    "Incidents are alerts grouped by resemblance; the daemon keeps them in <state_dir>/incidents.db. "
    "Without an action, print a compact table (most recently active first); 'show ID' prints one in "
    "detail (with its timeline); 'ack', 'resolve' and 'expected' change its status. Each incident shows "
    "its severity and rate: its alerts against the sessions scored of its sources while it ran (README, "
    "Incidents). Reads the state directly (--config) "
    "or a running daemon's API (--url); a state change through --url needs the bearer token ([incidents] "
    "token, or the environment variable named by token_env, default TRACEWATCH_INCIDENT_TOKEN). "
    "Caution: incidents carry log-derived text (redacted by your patterns); keep the daemon's port on "
    "loopback or behind your own access control. A quiet list is not proof of health.")
_UNITS = {"s": 1, "m": 60, "h": 3600, "d": 86400}


def _since(value: str | None) -> float | None:
    import re
    import time

    from .service.client import parse_since

    if value is None:
        return None
    m = re.fullmatch(r"(\d+(?:\.\d+)?)([smhd])", value.strip())
    if m:
        return time.time() - float(m.group(1)) * _UNITS[m.group(2)]
    try:
        return parse_since(value)
    except ValueError as exc:
        raise ConfigError(f"--since: {exc}; or give a duration such as 30m, 2h, 1d") from exc


MAX_INCIDENT_ID = (1 << 63) - 1  # incident ids are SQLite integers
PRINT_INCIDENTS = 20  # probable baseline incidents the fit summary lists one by one


def incident_id(text: str) -> int:
    """An incident ID argument: a whole number from 1 to :data:`MAX_INCIDENT_ID` (argparse
    turns the error into one line and exit code 2)."""
    try:
        value = int(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"invalid int value: {text!r}") from exc
    if not 1 <= value <= MAX_INCIDENT_ID:
        raise argparse.ArgumentTypeError(f"{text[:40]} is not an incident ID (they run from 1 to {MAX_INCIDENT_ID})")
    return value


def cmd_incidents(args) -> int:
    import getpass

    from .alerts import summary
    from .alerts.incidents import set_status
    from .alerts.store import IncidentStore
    from .errors import IncidentNotFound
    from .service.client import api_request, incident_token

    action = args.action
    if action != "list" and args.id is None:
        raise ConfigError(f"incidents {action}: give the incident ID")
    if not 1 <= args.limit <= 1000:
        raise ConfigError("--limit: between 1 and 1000")
    cfg = load_config(args.config) if args.config else None
    if args.url is None and cfg is None:
        raise ConfigError("incidents: give --config FILE (read the state) or --url URL (ask a running daemon)")
    since = _since(args.since)
    if args.url is not None:
        if action == "list":
            query = f"?limit={args.limit}" + (f"&since={since}" if since is not None else "")
            query += f"&status={args.status}" if args.status else ""
            code, doc = api_request(args.url, "/api/incidents" + query)
        elif action == "show":
            code, doc = api_request(args.url, f"/api/incidents/{args.id}")
        else:
            token = incident_token(cfg.incidents if cfg is not None else IncidentsConfig())
            code, doc = api_request(args.url, f"/api/incidents/{args.id}/{action}", method="POST", token=token,
                                    body={"note": args.note} if args.note else None)
        if code != 200:
            print(f"tracewatch: {args.url}: HTTP {code}: {summary.safe(doc.get('error', doc))}", file=sys.stderr)
            return 1
        rows, detail = doc.get("incidents"), doc
        if action in ("ack", "resolve", "expected"):
            detail = doc["incident"]
    else:
        store = IncidentStore.open(cfg.state_dir, create=False)
        try:
            if action == "list":
                rows = [summary.brief(i) for i in store.incidents(status=args.status, since=since, limit=args.limit)]
            elif action == "show":
                found = store.incident(args.id)
                if found is None:
                    raise IncidentNotFound(args.id)
                detail = _detail(store, cfg, found)
            else:  # IncidentNotFound, InvalidTransition: one line, exit code 1
                out = set_status(store, args.id, action, by=f"cli:{getpass.getuser()}", note=args.note or "")
                detail = summary.brief(out)
        finally:
            store.close()
    if action == "list":
        if args.json:
            for row in rows:
                _out(row)
        else:
            print(summary.table(rows))
    elif action == "show" and not args.json:
        print(summary.text(detail))
    elif args.json:
        _out(detail)
    else:
        print(f"incident #{detail['id']} is now {detail['status']}: {summary.safe(detail['title'])}")
    return 0


# -- `label` (tracewatch/triage.py) ----------------------------------------------------------------
LABEL_HELP = (
    "Label an incident for triage: --expected (a harmless pattern: the incident is marked expected, "
    "and new incidents like it are opened as expected, without a notification) or --known NAME (a "
    "known problem: new incidents like it carry the suggestion NAME). Every label retrains the triage "
    "model (<state_dir>/triage.json), which a running daemon picks up by itself. It needs incidents "
    "with two different labels before it suggests anything, and abstains on incidents unlike every "
    "labelled one. --list prints the labels and the model's state. Writes <state_dir>/incidents.db "
    "directly: file permissions are the access control.")
_KNOWN_NAME = r"[A-Za-z0-9][A-Za-z0-9_.:/-]{0,63}"


def cmd_label(args) -> int:
    import getpass
    import re
    import time

    from .alerts import summary
    from .alerts.incidents import set_status
    from .alerts.store import IncidentStore
    from .errors import IncidentNotFound
    from .triage import EXPECTED, Triage

    cfg = load_config(args.config)
    if args.list:
        if args.id is not None or args.expected or args.known is not None:
            raise ConfigError("label --list: give no ID, --expected or --known")
        store = IncidentStore.open(cfg.state_dir, create=False)
        try:
            rows = store.labels()
        finally:
            store.close()
        triage = Triage(cfg.triage, cfg.state_dir)
        triage.load()
        if args.json:
            _out({"labels": rows, "model": triage.info or None})
        else:
            print(format_labels(rows, triage.info))
        return 0
    if args.id is None:
        raise ConfigError("label: give the incident ID (or --list)")
    if args.expected == (args.known is not None):
        raise ConfigError("label: give exactly one of --expected or --known NAME")
    label = EXPECTED if args.expected else args.known
    if not args.expected and (label == EXPECTED or not re.fullmatch(_KNOWN_NAME, label)):
        raise ConfigError(f"--known: {summary.safe(label)!r} is not a usable name: letters, digits and _.:/- "
                          f"(at most 64, not {EXPECTED!r}), for example latch-jam")
    by, note = f"cli:{getpass.getuser()}", args.note or ""
    store = IncidentStore.open(cfg.state_dir, create=False)
    try:
        if args.expected:  # the store's own status change: alerts like it are absorbed silently
            set_status(store, args.id, "expected", by=by, note=note)
        if not store.set_label(args.id, label, by=by, note=note, now=time.time()):
            raise IncidentNotFound(args.id)
        triage = Triage(cfg.triage, cfg.state_dir)
        info = triage.train_from_store(store) if cfg.triage.enabled else None
        if info is not None:
            triage.save()
    finally:
        store.close()
    print(f"incident #{args.id} labelled {label!r}")
    print("triage is disabled ([triage] enabled = false)" if info is None else format_model(info))
    return 0


def format_model(info: dict) -> str:
    from .alerts.summary import safe

    if not info:
        return "triage model: none yet (label incidents to train it)"
    per = ", ".join(f"{safe(k)}: {n}" for k, n in sorted(info["incidents"].items())) or "none"
    head = (f"triage model ({info['kernel']} kernel): {info['examples']} alert(s) of labelled incidents "
            f"({per})")
    if not info.get("classes"):
        return head + "; needs incidents with two different labels to learn — it abstains until then"
    mistakes = info["mistakes"]
    return (head + f"; {info['support']} support example(s); training mistakes per epoch "
            f"{', '.join(map(str, mistakes[:10]))}{' …' if len(mistakes) > 10 else ''}")


def format_labels(rows: list[dict], info: dict) -> str:
    from datetime import datetime, timezone

    from .alerts.summary import safe

    lines = [f"labels ({len(rows)}):" if rows else "no labels yet"]
    for r in rows:
        t = datetime.fromtimestamp(r["labelled_at"], tz=timezone.utc).strftime("%Y-%m-%d %H:%M")
        lines.append(f"  #{r['incident_id']:<5} {safe(r['label']):<20} {r['status']:<12} {r['count']:>6} alerts  "
                     f"{t} by {safe(r['by'])}  {safe(r['title'])}")
    lines.append(format_model(info))
    return "\n".join(lines)


def cmd_completion(args) -> int:
    sys.stdout.write(shtab.complete(build_parser(), shell=args.shell))
    return 0


def cmd_demo(args) -> int:
    from .demo.run import run_demo

    return run_demo(Path(args.dir), seed=args.seed, show=args.show)


# -- report ------------------------------------------------------------------------------------
def format_report(r: dict, version: str, path, pipeline: Pipeline | None) -> str:
    lines = [f"baseline {version} written to {path}"]
    if pipeline is not None:
        rejected = sum(pipeline.rejected.values())
        lines.append(f"records: {sum(pipeline.records.values())} "
                     f"(lines read {sum(pipeline.lines.values())}, rejected {rejected}"
                     + (f": {', '.join(f'{k[1]}={v}' for k, v in sorted(pipeline.rejected.items()))}" if rejected else "")
                     + ")")
        if pipeline.repaired:
            lines.append("repaired lines: " + ", ".join(f"{s} {r}={n}" for (s, r), n in sorted(pipeline.repaired.items())))
        if pipeline.untimed:
            lines.append("untimed: " + ", ".join(f"{s}={n}" for s, n in sorted(pipeline.untimed.items()))
                         + " records with a session key but no usable time")
    lines.append(f"sessions: {r['sessions']} ({r['train_sessions']} to fit, {r['calibration_sessions']} to "
                 f"calibrate), {r['distinct_sequences']} distinct sequences in the fit part")
    lines.append(f"templates: {r['templates']}   n-grams: {r['ngrams']}   scorer: {r['scorer']}")
    how = f"knee of the inertia curve at k={r['knee']}" if r["k_auto"] else "set in the config"
    lines.append(f"k = {r['k']} ({how})")
    if r["k_auto"]:
        lines.append("   k   inertia    silhouette")
        for row in r["curve"]:
            sil = "" if row["silhouette"] is None else f"{row['silhouette']:.3f}"
            mark = "  ◄" if row["k"] == r["k"] else ""
            lines.append(f"  {row['k']:>2}  {row['inertia']:>9.3f}  {sil:>10}{mark}")
    for note in r["notes"]:
        lines.append(f"note: {note}")
    lines.append("clusters (sessions, spread, representative session):")
    for c in r["clusters"]:
        rep = " | ".join(c["representative"])
        lines.append(f"  #{c['cluster']}: {c['sessions']} sessions, spread {c['spread']}: {rep}")
    if r["contamination"]:
        lines.append("contamination (tiny clusters left out of the baseline — look at them):")
        for c in r["contamination"]:
            lines.append(f"  {c['sessions']} session(s) ({c['share']:.2%}): {' | '.join(c['representative'])}")
    else:
        lines.append("contamination: none found")
    incidents = r.get("probable_incidents", [])
    if incidents:
        lines.append(f"probable incidents in the baseline period ({len(incidents)} sessions, set aside):")
        lines += [f"  {x['session_key']} ({x['source']}): {x['reason']}" for x in incidents[:PRINT_INCIDENTS]]
        if len(incidents) > PRINT_INCIDENTS:
            lines.append(f"  ... and {len(incidents) - PRINT_INCIDENTS} more (all in the baseline's manifest)")
    if r.get("lowest_false_alarm_rate") is not None:
        lines.append(f"lowest reachable false_alarm_rate: {r['lowest_false_alarm_rate']:.4g} "
                     f"(1/(calibration sessions + 1))")
    if r.get("refit"):  # a candidate of `baselines refit` or the daemon's refit
        from .refit import format_gates

        lines.append(f"refit of {r['refit']['based_on']}: {r['refit']['outcome']}")
        lines += format_gates(r["refit"])
    lines.append(f"thresholds (false_alarm_rate {r['false_alarm_rate']}, split-conformal on held-out sessions):")
    for src, t in r["thresholds"].items():
        if src == "*" and len(r["thresholds"]) == 2:
            continue  # one source: the pooled threshold is the same
        name = "all sources pooled" if src == "*" else f"source {src}"
        thr = "none (too few sessions)" if t["threshold"] is None else f"score > {t['threshold']:.4f}"
        lines.append(f"  {name}: {thr}  ({t['calibration_sessions']} sessions)")
    return "\n".join(lines)


# -- the command tree ---------------------------------------------------------------------------
EXIT_ALERTS = 3  # `score --fail-on-alert` found alerts (and `refit` refused): ran fine, the finding is bad
EXIT_HELP = ("exit codes: 0 success; 1 runtime problem (unreadable input, missing or corrupt baseline);\n"
             f"  2 bad config or arguments; {EXIT_ALERTS} alerts with --fail-on-alert, or a refit refused; 130 interrupted")
EXAMPLES = {
    "init": "tracewatch init logs/app.log --out tw.toml",
    "check-config": "tracewatch check-config --config config/tracewatch.example.toml",
    "fit": "tracewatch fit --config tw.toml logs/monday/*.log",
    "score": "tracewatch score --config tw.toml --fail-on-alert logs/tuesday/*.log",
    "templates": "tracewatch templates --format text some.log",
    "baselines": "tracewatch baselines --config tw.toml",
    "run": "tracewatch run --config tw.toml",
    "incidents": "tracewatch incidents --config tw.toml",
    "demo": "tracewatch demo --dir ./tracewatch-demo",
    "completion": "tracewatch completion bash > ~/.local/share/bash-completion/completions/tracewatch",
}


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="tracewatch", description="Log and execution-trace anomaly detection. " + CAUTION)
    p.add_argument("--version", action="version", version=f"tracewatch {__version__}")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_Parser)

    def with_config(sp, *, adhoc: bool = False):
        sp.add_argument("--config", "-c", metavar="FILE", help="TOML config file")
        if adhoc:
            sp.add_argument("--format", metavar="FMT", help="read INPUT in this format with no config "
                            "(the whole line is the message): text, jsonl, syslog, otlp-json, strace")
            sp.add_argument("--state-dir", default="./tracewatch-state", metavar="DIR",
                            help="state directory when no config is given (default ./tracewatch-state)")

    sp = sub.add_parser("init", help="guess a starter config from one log file", description=INIT_HELP)
    sp.add_argument("logfile", metavar="LOGFILE", help="a log file of the application, in its usual format")
    sp.add_argument("--out", "-o", default="tracewatch.toml", metavar="FILE",
                    help="the config file to write (default tracewatch.toml)")
    sp.add_argument("--force", action="store_true", help="overwrite FILE if it exists")
    sp.set_defaults(func=cmd_init)

    sp = sub.add_parser("check-config", help="validate a config file")
    with_config(sp)
    sp.set_defaults(func=cmd_check_config)

    sp = sub.add_parser("fit", help="fit a new baseline from normal logs and make it current")
    with_config(sp, adhoc=True)
    sp.add_argument("--source", metavar="NAME", help="the source the INPUT files belong to")
    sp.add_argument("--json", action="store_true", help="print the report as JSON")
    sp.add_argument("inputs", nargs="*", metavar="INPUT")
    sp.set_defaults(func=cmd_fit)

    sp = sub.add_parser("score", help="replay files through the current baseline; one JSON object per alert")
    with_config(sp, adhoc=True)
    sp.add_argument("--source", metavar="NAME", help="the source the INPUT files belong to")
    sp.add_argument("--all", action="store_true", help="print every session, not only alerts")
    sp.add_argument("--incidents", action="store_true",
                    help="group the alerts into incidents as the daemon would and print the incidents "
                         "(json: one detail object per incident, with its alert_ids; text: a table, then each "
                         "in detail)")
    sp.add_argument("--output", "-o", choices=["json", "text"], default="json",
                    help="json: one JSON object per alert (default); text: a readable view for a terminal")
    sp.add_argument("--baseline", metavar="VERSION", help="score with this baseline version")
    sp.add_argument("--fail-on-alert", action="store_true", help=f"exit {EXIT_ALERTS} when any alert was raised")
    sp.add_argument("--verbose", "-v", action="store_true", help="print a summary on stderr")
    sp.add_argument("inputs", nargs="*", metavar="INPUT")
    sp.set_defaults(func=cmd_score)

    sp = sub.add_parser("templates", help="print the event template of every input record")
    with_config(sp, adhoc=True)
    sp.add_argument("--source", metavar="NAME")
    sp.add_argument("inputs", nargs="+", metavar="INPUT")
    sp.set_defaults(func=cmd_templates)

    sp = sub.add_parser("baselines", help="list baseline versions, show one, make one current (roll back), "
                        "or refit the current one on recent files", description=BASELINES_HELP)
    with_config(sp)
    sp.add_argument("action", nargs="?", choices=["list", "show", "use", "refit"], default="list")
    sp.add_argument("version", nargs="?", metavar="VERSION", help="show, use: the version")
    # -- `baselines refit` --
    sp.add_argument("inputs", nargs="*", metavar="INPUT", help="refit: the files to take sessions from")
    sp.add_argument("--source", metavar="NAME", help="refit: the source the INPUT files belong to")
    sp.add_argument("--dry-run", action="store_true", help="refit: fit and apply the gates, save nothing")
    sp.add_argument("--json", action="store_true", help="refit: print the report as JSON")
    sp.intermixed = True
    sp.set_defaults(func=cmd_baselines)

    sp = sub.add_parser("run", help="run the daemon: follow files live, alert, serve metrics",
                        description=RUN_HELP)
    sp.add_argument("--config", "-c", metavar="FILE", required=True, help="TOML config file")
    sp.add_argument("--log-level", default="info", choices=["debug", "info", "warning", "error"],
                    help="tracewatch's own log on stderr (default info)")
    sp.add_argument("--log-format", default="plain", choices=["plain", "json"],
                    help="plain lines or JSON lines (default plain)")
    sp.set_defaults(func=cmd_run)

    # -- `incidents` --
    sp = sub.add_parser("incidents", help="list, show, acknowledge or resolve incidents (grouped alerts)",
                        description=INCIDENTS_HELP)
    sp.add_argument("action", nargs="?", default="list", choices=["list", "show", "ack", "resolve", "expected"])
    sp.add_argument("id", nargs="?", type=incident_id, metavar="ID")
    sp.add_argument("--config", "-c", metavar="FILE", help="TOML config file (read <state_dir>/incidents.db)")
    sp.add_argument("--url", metavar="URL", help="a running daemon's address, e.g. http://127.0.0.1:9464")
    sp.add_argument("--json", action="store_true", help="JSON (one object per incident for a list)")
    sp.add_argument("--since", metavar="WHEN", help="only incidents with an alert since: 30m, 2h, 1d or an ISO time")
    sp.add_argument("--status", choices=STATUSES)
    sp.add_argument("--limit", type=int, default=50, help="at most this many (default 50)")
    sp.add_argument("--note", help="a note kept with a status change")
    sp.set_defaults(func=cmd_incidents)

    # -- `label` --
    sp = sub.add_parser("label", help="label an incident expected or a known problem; retrain triage",
                        description=LABEL_HELP)
    sp.add_argument("id", nargs="?", type=incident_id, metavar="INCIDENT_ID")
    sp.add_argument("--config", "-c", metavar="FILE", required=True, help="TOML config file")
    sp.add_argument("--expected", action="store_true", help="a harmless pattern: suppress incidents like it")
    sp.add_argument("--known", metavar="NAME", help="a known problem's name, suggested for incidents like it")
    sp.add_argument("--note", help="a note kept with the label")
    sp.add_argument("--list", action="store_true", help="print the labels and the triage model's state")
    sp.add_argument("--json", action="store_true", help="with --list: one JSON object")
    sp.set_defaults(func=cmd_label)

    sp = sub.add_parser("demo", help="generate the parcel-locker demo, fit, score and tally what was caught")
    sp.add_argument("--dir", default="./tracewatch-demo", help="where to write the demo (default ./tracewatch-demo)")
    sp.add_argument("--seed", type=int, default=7)
    sp.add_argument("--show", type=int, default=6, help="how many alerts to print in full")
    sp.set_defaults(func=cmd_demo)

    sp = sub.add_parser("completion", help="print a shell completion script for tracewatch",
                        description="Print a completion script for bash or zsh on stdout: subcommands, options "
                        "and their choices complete with Tab; files complete where a file is asked for. "
                        "Install it where your shell looks (bash: ~/.local/share/bash-completion/completions/"
                        "tracewatch; zsh: a file _tracewatch in a folder of $fpath) or source it.")
    sp.add_argument("shell", choices=["bash", "zsh"])
    sp.set_defaults(func=cmd_completion)
    for action in (a for sp in sub.choices.values() for a in sp._actions):
        if action.metavar in ("FILE", "INPUT", "LOGFILE") and not hasattr(action, "complete"):
            action.complete = shtab.FILE
    for name, sp in sub.choices.items():
        example = EXAMPLES.get(name, "")
        sp.formatter_class = argparse.RawDescriptionHelpFormatter
        sp.epilog = (f"example:\n  {example}\n\n" if example else "") + EXIT_HELP
    return p


def _fewer_collections() -> None:
    """tracewatch allocates many short-lived tuples and records per line; with the default
    thresholds the cyclic garbage collector runs every 700 of them and keeps re-scanning every
    long-lived object (templates, open sessions). Objects alive at start are frozen out of the
    scans and the first generation is collected every 50,000 allocations instead (common
    practice for allocation-heavy batch work; measured ~20% faster `score`, bench/README.md)."""
    gc.freeze()
    gc.set_threshold(50_000, 20, 20)


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    if argv is None:  # a process of its own (tests call main(argv) inside pytest's process)
        _fewer_collections()
    try:
        return args.func(args)
    except TracewatchError as exc:
        print(f"tracewatch: {exc}", file=sys.stderr)
        return exc.exit_code
    except BrokenPipeError:
        return 0
    except KeyboardInterrupt:
        return 130
