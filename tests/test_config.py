"""Config: TOML validated by pydantic; every mistake is one line naming the key, exit code 2."""

from __future__ import annotations

import pytest

from tracewatch.config import adhoc_config, load_config, parse_config
from tracewatch.errors import ConfigError

from .conftest import run_cli

GOOD = """
state_dir = "state"
[[sources]]
name = "api"
paths = ["logs/*.log"]
format = "text"
line_pattern = '^(?P<ts>\\S+) (?P<level>\\w+) (?P<message>.*)$'
session_key = 'req=(?P<key>\\w+)'
[sessions]
idle_timeout_s = 10
[model]
k = 3
false_alarm_rate = 0.01
"""


def test_good_config_loads_and_resolves_state_dir(tmp_path):
    path = tmp_path / "tw.toml"
    path.write_text(GOOD)
    cfg = load_config(path)
    assert cfg.state_dir == (tmp_path / "state").resolve()
    assert cfg.sources[0].name == "api" and cfg.model.k == 3
    assert cfg.sessions.idle_timeout_s == 10 and cfg.features.ngram_max == 3


@pytest.mark.parametrize(
    "patch, expected",
    [
        ({"sources": [{"name": "a", "colour": "red"}]}, "sources[0].colour: unknown key"),
        ({"sources": [{"name": "a", "line_pattern": "(?P<message>.*"}]}, "sources[0].line_pattern: invalid regular expression"),
        ({"sources": [{"name": "a", "line_pattern": "(?P<msg>.*)"}]}, "needs a named group (?P<message>"),
        ({"sources": [{"name": "a", "session_key": "req=(\\w+)"}]}, "session_key: the regular expression needs a named group (?P<key>"),
        ({"model": {"k": 0}}, "model.k"),
        ({"model": {"false_alarm_rate": 2}}, "model.false_alarm_rate"),
        ({"sessions": {"idle_timeout_s": "soon"}}, "sessions.idle_timeout_s"),
        ({"server": {"listen": "9464"}}, "server.listen: listen must look like HOST:PORT"),
        ({"sources": [{"name": "a"}, {"name": "a"}]}, "the name 'a' is used twice"),
        ({"sources": [{"name": "a", "format": "xml"}]}, "sources[0].format"),
    ],
    ids=["unknown-key", "bad-regex", "no-message-group", "no-key-group", "k-zero", "rate-range",
         "wrong-type", "listen", "duplicate-source", "unknown-format"],
)
def test_bad_config_is_one_clear_error(patch, expected):
    with pytest.raises(ConfigError) as err:
        parse_config(patch)
    assert expected in str(err.value)
    assert "\n" not in str(err.value)


def test_check_config_command_exit_codes(tmp_path):
    good = tmp_path / "good.toml"
    good.write_text(GOOD)
    ok = run_cli("check-config", "--config", str(good))
    assert ok.returncode == 0 and "config OK: 1 source(s) (api:text)" in ok.stdout
    bad = tmp_path / "bad.toml"
    bad.write_text(GOOD.replace("idle_timeout_s = 10", "idle_timeout = 10"))
    proc = run_cli("check-config", "--config", str(bad))
    assert proc.returncode == 2
    assert proc.stderr.strip().endswith("sessions.idle_timeout: unknown key")
    assert len(proc.stderr.strip().splitlines()) == 1 and "Traceback" not in proc.stderr


def test_unreadable_and_invalid_toml(tmp_path):
    proc = run_cli("check-config", "--config", str(tmp_path / "missing.toml"))
    assert proc.returncode == 2 and "cannot read config file" in proc.stderr
    broken = tmp_path / "broken.toml"
    broken.write_text("[sources\nname=")
    proc = run_cli("check-config", "--config", str(broken))
    assert proc.returncode == 2 and "not valid TOML" in proc.stderr and "Traceback" not in proc.stderr


def test_adhoc_config_for_format_flag(tmp_path):
    cfg = adhoc_config("text", state_dir=tmp_path)
    assert cfg.sources[0].format == "text" and cfg.sources[0].line_pattern is None
    with pytest.raises(ConfigError, match="unknown format 'xml'"):
        adhoc_config("xml")


def test_example_config_in_the_repository_is_valid():
    from .conftest import ROOT

    cfg = load_config(ROOT / "config" / "tracewatch.example.toml")
    assert [s.format for s in cfg.sources] == ["text", "jsonl"]
    assert cfg.server.listen.startswith("127.0.0.1:")


def test_paths_and_state_dir_relative_to_config_file(tmp_path, monkeypatch):
    """A relative glob and state_dir mean the config file's folder, whatever the working directory."""
    from tracewatch.batch import assign_sources
    conf = tmp_path / "etc"
    (conf / "logs").mkdir(parents=True)
    (conf / "logs" / "a.log").write_text("door 1 opened\n")
    (tmp_path / "b.log").write_text("door 2 opened\n")
    absglob = str(tmp_path.resolve() / "b*.log")
    (conf / "tw.toml").write_text(f'[[sources]]\nname = "x"\nformat = "text"\npaths = ["logs/*.log", "{absglob}"]\n')
    monkeypatch.chdir(tmp_path)
    cfg = load_config(conf / "tw.toml")
    assert cfg.state_dir == (conf / "tracewatch-state").resolve()
    assert cfg.sources[0].paths == [str(conf.resolve() / "logs/*.log"), absglob]
    assert sorted(p.name for _, p in assign_sources(cfg, [])) == ["a.log", "b.log"]  # found from another directory
