"""The command contracts: templates, fit, score (fields, --all, stable ids), and user errors."""

from __future__ import annotations

import shutil
import subprocess

import orjson
import pytest

from tracewatch.demo.run import CONFIG, write_scenario
from tracewatch.demo.scenario import parcel_lockers

from .conftest import run_cli

CONTRACT = {"alert", "alert_id", "source", "session_key", "score", "p_value", "reasons", "cluster", "events",
            "unseen_events", "unexpected", "missing", "baseline_version"}


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("cli")
    sc = parcel_lockers()
    write_scenario(tmp, sc, seed=9, n_baseline=1500, n_normal=400, per_kind=4)
    (tmp / "tracewatch.toml").write_text(CONFIG.format(pattern=sc.line_pattern).replace("0.005", "0.01"))
    return tmp


def test_templates_without_config(tmp_path):
    log = tmp_path / "x.log"
    log.write_text("door 1 opened\ndoor 22 opened\n\nbattery low on LK-3\n")
    proc = run_cli("templates", "--format", "text", str(log), check=True)
    rows = [orjson.loads(x) for x in proc.stdout.splitlines()]
    assert [r["line"] for r in rows] == [1, 2, 4]
    assert rows[0]["template"] == rows[1]["template"] == "door <var> opened"
    assert rows[0]["template_id"] == rows[1]["template_id"] != rows[2]["template_id"]


def test_fit_then_score_contract(demo_dir):
    fit = run_cli("fit", "--config", str(demo_dir / "tracewatch.toml"), str(demo_dir / "logs" / "baseline.log"),
                  check=True)
    assert "baseline v0001 written" in fit.stdout and "k = " in fit.stdout and "source locker-api: score >" in fit.stdout
    day = str(demo_dir / "today" / "today.log")
    alerts = [orjson.loads(x) for x in run_cli("score", "--config", str(demo_dir / "tracewatch.toml"), day,
                                                check=True).stdout.splitlines()]
    assert alerts and all(CONTRACT <= set(a) and a["alert"] for a in alerts)
    a = alerts[0]
    assert a["baseline_version"] == "v0001" and a["reasons"] and isinstance(a["diff"], list)
    every = [orjson.loads(x) for x in run_cli("score", "--all", "--config", str(demo_dir / "tracewatch.toml"),
                                               day, check=True).stdout.splitlines()]
    labels = [orjson.loads(x) for x in (demo_dir / "labels.jsonl").read_bytes().splitlines()]
    assert len(every) == len(labels)
    assert {x["alert_id"] for x in alerts} <= {x["alert_id"] for x in every}
    # stable ids: the same session gets the same id in another run
    again = [orjson.loads(x) for x in run_cli("score", "--config", str(demo_dir / "tracewatch.toml"), day,
                                               check=True).stdout.splitlines()]
    assert [x["alert_id"] for x in again] == [x["alert_id"] for x in alerts]
    # --fail-on-alert: alerts exit 3, distinct from 1 (a runtime problem) and 2 (bad config/arguments)
    failed = run_cli("score", "--fail-on-alert", "--config", str(demo_dir / "tracewatch.toml"), day)
    assert failed.returncode == 3 and len(failed.stdout.splitlines()) == len(alerts)
    quiet = run_cli("score", "--fail-on-alert", "--config", str(demo_dir / "tracewatch.toml"),
                    str(demo_dir / "logs" / "baseline.log"), "--baseline", "v0001")
    assert quiet.returncode in (0, 3) and (quiet.returncode == 3) == bool(quiet.stdout.strip())


@pytest.mark.parametrize("command", ["init", "completion", "check-config", "fit", "score", "run", "incidents", "demo"])
def test_subcommand_help_has_example_and_exit_codes(command):
    out = run_cli(command, "--help", check=True).stdout
    assert f"example:\n  tracewatch {command}" in out and "exit codes: 0 success" in out
    assert "3 alerts with --fail-on-alert" in out


@pytest.mark.parametrize(
    "args, message",
    [
        (["score", "--config", "{dir}/tracewatch.toml", "{dir}/nope.log"], "nope.log: no such file"),
        (["score", "--config", "{dir}/tracewatch.toml", "{dir}/logs/*.zzz"], "no file matches this pattern"),
        (["score", "--config", "{dir}/tracewatch.toml", "{dir}/logs"], "is a directory"),
        (["score", "{dir}/logs/baseline.log"], "give --config FILE"),
        (["fit", "--format", "text", "--state-dir", "{dir}/empty", "{dir}/tiny.log"], "a baseline needs at least"),
    ],
    ids=["missing-file", "empty-glob", "directory", "no-config", "too-few-sessions"],
)
def test_user_errors_are_one_line(demo_dir, args, message):
    (demo_dir / "tiny.log").write_text("one line\n")
    proc = run_cli(*[a.format(dir=demo_dir) for a in args])
    assert proc.returncode != 0
    assert message in proc.stderr and "Traceback" not in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1


def test_bad_argument_exit_code_2():
    proc = run_cli("score", "--no-such-flag")
    assert proc.returncode == 2 and "Traceback" not in proc.stderr


def test_demo_runs_end_to_end(tmp_path):
    proc = run_cli("demo", "--dir", str(tmp_path / "demo"), check=True)
    out = proc.stdout
    assert "ALERT " in out and "step by step" in out and "tally" in out
    for kind in ("missing_step", "unseen_event", "retry_loop", "out_of_order", "cut_short", "mixed_workflows"):
        assert kind in out
    assert (tmp_path / "demo" / "state" / "baselines" / "CURRENT").exists()


# -- shell completion (shtab) -------------------------------------------------------------------------
BASH_COMPLETE = """source "$1"
complete -p tracewatch
reply() { COMP_WORDS=("$@"); COMP_CWORD=$(($# - 1)); COMPREPLY=(); _shtab_tracewatch; echo "${COMPREPLY[*]}"; }
reply tracewatch i
reply tracewatch score --output ''
reply tracewatch completion ''
"""


def test_bash_sources_the_completion_script(tmp_path):
    bash = shutil.which("bash")
    if bash is None:
        pytest.skip("bash is not installed")
    script = tmp_path / "tracewatch.bash"
    script.write_text(run_cli("completion", "bash", check=True).stdout)
    proc = subprocess.run([bash, "--norc", "--noprofile", "-c", BASH_COMPLETE, "bash", str(script)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0 and proc.stderr == "", proc.stderr
    assert proc.stdout.splitlines() == ["complete -o bashdefault -F _shtab_tracewatch tracewatch",
                                        "init incidents", "json text", "bash zsh"]


def test_zsh_registers_the_completion_function(tmp_path):
    zsh = shutil.which("zsh")
    if zsh is None:
        pytest.skip("zsh is not installed (make test installs it with apt-get when it can)")
    folder = tmp_path / "completions"  # zsh's way: a file _tracewatch in a folder of $fpath
    folder.mkdir()
    (folder / "_tracewatch").write_text(run_cli("completion", "zsh", check=True).stdout)
    proc = subprocess.run([zsh, "-f", "-c", 'fpath=("$1" $fpath); autoload -U compinit && compinit -u -D && '
                           'print -r -- ${_comps[tracewatch]}', "zsh", str(folder)],
                          capture_output=True, text=True, timeout=60, cwd=tmp_path,
                          env={"HOME": str(tmp_path), "PATH": "/usr/bin:/bin"})
    assert proc.returncode == 0 and proc.stderr == "", proc.stderr
    assert proc.stdout.strip() == "_tracewatch"  # compinit read the script's "#compdef tracewatch"
    parsed = subprocess.run([zsh, "-n", str(folder / "_tracewatch")], capture_output=True, text=True, timeout=60)
    assert parsed.returncode == 0 and parsed.stderr == ""  # and zsh parses all of it
