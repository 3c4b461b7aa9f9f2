"""Input read badly is loud: untimed keyed records are counted and reported, and fit refuses
(score warns) when most of a source's input was rejected or untimed."""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path

from .conftest import run_cli
from .daemon_helpers import DaemonProcess, free_port, no_daemon_left  # noqa: F401 - the fixture stops a daemon left running

PATTERN = r"^(?P<ts>\S+) req=(?P<key>\S+) (?P<message>.*)$"


def _config(tmp_path, **source) -> str:
    opts = "".join(f"{k} = '{v}'\n" for k, v in source.items())
    path = tmp_path / "tracewatch.toml"
    path.write_text(f"state_dir = '{tmp_path / 'state'}'\n[[sources]]\nname = 'lockers'\n{opts}")
    return str(path)


def _lines(tmp_path, name: str, stamp) -> str:
    """120 sessions of three steps each, keyed req=rN, one second apart, 60 s between sessions."""
    t0 = datetime(2026, 12, 2, 7, 0, tzinfo=timezone.utc).timestamp()
    rows = []
    for n in range(120):
        for i, step in enumerate(("pickup code checked", "door 4 opened", "door 4 closed")):
            rows.append(f"{stamp(t0 + 60 * n + i)} req=r{n} {step}")
    path = tmp_path / name
    path.write_text("\n".join(rows) + "\n")
    return str(path)


def _iso(t: float) -> str:
    return datetime.fromtimestamp(t, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def test_fit_refuses_a_pattern_matching_nothing(tmp_path):
    cfg = _config(tmp_path, line_pattern=r"^NEVER (?P<message>.*)$")
    proc = run_cli("fit", "--config", cfg, _lines(tmp_path, "a.log", _iso))
    assert proc.returncode == 1
    assert proc.stderr == ("tracewatch: fit refused: source 'lockers': 360 of 360 lines rejected (no_match=360), "
                           "above max_unread_share 0.5; no baseline written (check format and line_pattern)\n")
    assert not (tmp_path / "state" / "baselines").exists() or not any((tmp_path / "state" / "baselines").iterdir())


def test_fit_refuses_syslog_format_on_other_lines(tmp_path):
    cfg = _config(tmp_path, format="syslog")
    proc = run_cli("fit", "--config", cfg, _lines(tmp_path, "a.log", lambda t: f"locker-7 at {t:.0f}"))
    assert proc.returncode == 1
    assert proc.stderr == ("tracewatch: fit refused: source 'lockers': 360 of 360 lines rejected (not_syslog=360), "
                           "above max_unread_share 0.5; no baseline written (check format and line_pattern)\n")


def test_untimed_records_counted_refused_then_warned(tmp_path):
    good = _lines(tmp_path, "good.log", _iso)
    bad = _lines(tmp_path, "bad.log", lambda t: "sometime")  # the ts group matches, no layout reads it
    cfg = _config(tmp_path, line_pattern=PATTERN)
    proc = run_cli("fit", "--config", cfg, bad)
    assert proc.returncode == 1
    assert proc.stderr == ("tracewatch: fit refused: source 'lockers': 360 of 360 records with a session key "
                           "carry no usable time, above max_unread_share 0.5; no baseline written (check ts_format)\n")
    fit = run_cli("fit", "--config", cfg, good, check=True)
    assert "\nuntimed: " not in fit.stdout and fit.stderr == ""
    score = run_cli("score", "--config", cfg, bad)
    assert score.returncode == 0
    assert score.stderr == ("tracewatch: warning: source 'lockers': 360 of 360 records with a session key carry "
                            "no usable time, above max_unread_share 0.5 (check ts_format)\n")


def test_untimed_below_the_share_is_a_fit_report_line_and_a_warning(tmp_path):
    good = _lines(tmp_path, "good.log", _iso)
    lines = open(good).read().splitlines()
    lines[:30] = [f"later req=x{i} door 4 opened" for i in range(30)]  # 30 of 360 without a time
    (tmp_path / "mixed.log").write_text("\n".join(lines) + "\n")
    cfg = _config(tmp_path, line_pattern=PATTERN)
    fit = run_cli("fit", "--config", cfg, str(tmp_path / "mixed.log"), check=True)
    assert "untimed: lockers=30 records with a session key but no usable time" in fit.stdout
    assert fit.stderr == ("tracewatch: warning: source 'lockers': 30 of 360 records with a session key carry "
                          "no usable time (check ts_format)\n")


def test_the_daemon_logs_untimed_records_once_per_source_and_counts_them(tmp_path):
    """The daemon, following a file whose keyed lines carry no usable time, logs the line
    `score` prints (once per source, not again within UNTIMED_WARN_S however many more come)
    and counts them in tracewatch_records_untimed_total{source}, carried across a restart."""
    from prometheus_client.parser import text_string_to_metric_families

    good = _lines(tmp_path, "good.log", _iso)
    cfg = _config(tmp_path, line_pattern=PATTERN)
    with open(cfg, "a") as fh:
        fh.write(f"paths = ['{tmp_path / 'live' / '*.log'}']\n[sessions]\nidle_timeout_s = 1.0\n[server]\nlisten = '127.0.0.1:{free_port()}'\n"
                 "[daemon]\npoll_interval_s = 0.2\ncheckpoint_interval_s = 0.3\n")
    run_cli("fit", "--config", cfg, good, check=True)
    (tmp_path / "live").mkdir()
    live = tmp_path / "live" / "app.log"
    bad = open(_lines(tmp_path, "bad.log", lambda t: "sometime")).read()

    def untimed(d: DaemonProcess) -> float | None:
        text = d.get("/metrics")[1].decode()
        return next((s.value for f in text_string_to_metric_families(text) if f.name == "tracewatch_records_untimed"
                     for s in f.samples if s.labels.get("source") == "lockers" and s.name.endswith("_total")), None)

    warning = ("WARNING tracewatch.daemon: source 'lockers': 360 of 360 records with a session key carry no usable "
               "time, above max_unread_share 0.5 (check ts_format)")
    daemon = DaemonProcess(Path(cfg)).ready()
    live.write_text(bad)
    daemon.until(lambda: warning in daemon.stderr(), "the untimed warning")
    with open(live, "a") as fh:
        fh.write(bad)
    daemon.until(lambda: untimed(daemon) == 720, "720 untimed records counted")
    assert daemon.status()["sources"][0]["untimed"] == 720
    assert daemon.terminate() == 0
    assert daemon.stderr().count("no usable time") == 1  # rate-limited: the second 360 said nothing more

    daemon = DaemonProcess(Path(cfg)).ready()  # the count comes back with the checkpoint
    assert untimed(daemon) == 720
    assert daemon.terminate() == 0
