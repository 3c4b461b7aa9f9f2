"""Hostile input for every format: random bytes and mutated valid lines never raise, and every
line read is accounted for.

What "accounted for" means, after ``flush()`` (nothing may stay held back):

- line formats (text, jsonl, syslog, strace): each line fed is in exactly one place — in one
  :class:`Rejection` (one rejection is one line), or in the raw text of one record that is not
  part of a rejection (a record joined from several lines — a traceback, an unfinished and
  resumed system call — holds them separated by ``\\n``). So
  ``sum(lines in records' raw) + rejections == lines fed``.
- otlp-json, which buffers a document over lines: each line fed is either part of a document
  that parsed (``lines_in_documents``) or in one line-level rejection; spans of a parsed
  document that cannot be used are rejected on their own (``bad_span``) and are not lines. So
  ``lines_in_documents + (rejections other than bad_span) == lines fed``.
"""

from __future__ import annotations

import json
import math
import tempfile
from pathlib import Path

import orjson
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tracewatch.config import SourceConfig, parse_config
from tracewatch.formats import feed_lines, make_format
from tracewatch.formats.otlp import SPAN_REASON, OtlpJsonFormat
from tracewatch.pipeline import Pipeline
from tracewatch.records import Record, Rejection
from tracewatch.sources.files import decode_line

MAX_LINE_BYTES = 512

_OTLP_DOC = {"resourceSpans": [{"resource": {"attributes": [{"key": "service.name", "value": {"stringValue": "api"}}]},
                                "scopeSpans": [{"scope": {"name": "s"}, "spans": [
                                    {"traceId": "5b8efff798038103d269b633813fc60c", "spanId": "eee19b7ec3c1b174",
                                     "name": "GET /x", "kind": 2, "startTimeUnixNano": "1544712660000000000",
                                     "status": {"code": 2}},
                                    {"traceId": "5B8EFFF798038103D269B633813FC60C", "name": "db", "kind": 3,
                                     "startTimeUnixNano": 1544712660500000000}]}]}]}

SOURCES = {
    "text": dict(format="text", line_pattern=r"^(?P<ts>\S+ \S+) (?P<level>[A-Z]+) (?P<message>.*)$",
                 session_key=r"req=(?P<key>\w+)", continuation_pattern=r"^(?!\d{4}-)", continuation_max=5),
    "jsonl": dict(format="jsonl", message_field="msg", session_key="ctx.req", time_field="t", level_field="lvl",
                  event_field="kind"),
    "syslog": dict(format="syslog", session_field="[meta req]", session_key=r"req=(?P<key>\w+)"),
    "otlp-json": dict(format="otlp-json", max_document_bytes=4096),
    "strace": dict(format="strace"),
    "strace-tree": dict(format="strace", strace_session="tree"),
}

CORPUS = {
    "text": ["2026-11-30 10:00:00,123 INFO req=a1 door 7 opened", "2026-11-30 10:00:01,001 ERROR req=a1 failed",
             "Traceback (most recent call last):", '  File "x.py", line 3, in <module>', "", "KeyError: 'k'"],
    "jsonl": ['{"t": 1700000000.5, "lvl": "info", "msg": "door 3 opened", "ctx": {"req": 77}}',
              '{"t": "2026-11-30T10:00:00Z", "kind": "door.open", "ctx": {"req": "a"}}',
              '{"t": 1700000000123, "msg": "x"}', "[1, 2]", '{"msg": null}'],
    "syslog": ["<34>1 2003-10-11T22:14:15.003Z mymachine.example.com su - ID47 - \ufeff'su root' failed",
               '<165>1 2003-10-11T22:14:15.003Z h evntslog - ID47 [meta req="r1" x="a\\"b\\]"] req=r2 body',
               "<13>Feb  5 17:32:18 10.0.0.99 Use the BFG!", "Nov 29 08:01:02 gw sshd[42]: Accepted key",
               "2026-11-29T08:01:02.250+01:00 gw systemd[1]: Started x."],
    "otlp-json": [json.dumps(_OTLP_DOC), *json.dumps(_OTLP_DOC, indent=2).splitlines()],
    "strace": ['4703  1796163445.001985 vfork( <unfinished ...>',
               '4704  1796163445.002356 execve("/usr/bin/cat", ["cat"], 0x55 /* 35 vars */ <unfinished ...>',
               '4703  1796163445.002521 <... vfork resumed>) = 4704 <0.000524>',
               '4703  openat(AT_FDCWD, "/x", O_RDONLY) = -1 ENOENT (No such file or directory)',
               '[pid  4704] 10:00:01.5 --- SIGCHLD {si_signo=SIGCHLD} ---', "4704  +++ exited with 0 +++",
               '4703  clone3({flags=CLONE_VM, exit_signal=0}, 88) = 4705', "4705  +++ killed by SIGKILL +++"],
}
CORPUS["strace-tree"] = CORPUS["strace"]

# characters that matter to the parsers, to make mutations bite
SPECIAL = '{}[]":,\\<>=-+. 0123456789ET:\ufeff\x00\r\t'


def _no_newline(s: str) -> str:
    return s.replace("\n", "")  # the source layer splits on newlines: a line never holds one


@st.composite
def mutated(draw, corpus: list[str]) -> str:
    line = draw(st.sampled_from(corpus))
    for _ in range(draw(st.integers(1, 4))):
        i = draw(st.integers(0, len(line)))
        j = draw(st.integers(i, min(len(line), i + 12)))
        op = draw(st.sampled_from(["delete", "insert", "replace", "truncate", "repeat"]))
        piece = _no_newline(draw(st.text(alphabet=SPECIAL, max_size=6) | st.text(max_size=4)))
        if op == "delete":
            line = line[:i] + line[j:]
        elif op == "insert":
            line = line[:i] + piece + line[i:]
        elif op == "replace":
            line = line[:i] + piece + line[j:]
        elif op == "truncate":
            line = line[:i]
        else:
            line = line[:j] + line[i:j] * draw(st.integers(2, 5)) + line[j:]
    return line


def from_bytes(data: bytes) -> list[str]:
    """Lines the source layer would hand on for these bytes (replacement, truncation)."""
    out = []
    for raw in data.split(b"\n"):
        text, _ = decode_line(raw[:-1] if raw.endswith(b"\r") else raw, MAX_LINE_BYTES)
        out.append(text)
    return out


def lines_for(name: str):
    corpus = CORPUS[name]
    one = st.one_of(st.sampled_from(corpus), mutated(corpus), st.text(max_size=80).map(_no_newline))
    return st.one_of(st.lists(one, max_size=30), st.binary(max_size=400).map(from_bytes))


def run_format(name: str, lines: list[str]) -> tuple[object, list]:
    fmt = make_format(SourceConfig(name="src", **SOURCES[name]))
    return fmt, feed_lines(fmt, lines)


def check_items(out: list, reasons: tuple[str, ...]) -> None:
    for item in out:
        rec = item.record if isinstance(item, Rejection) else item
        if isinstance(item, Rejection):
            assert isinstance(item.reason, str) and item.reason and isinstance(item.raw, str)
            assert item.reason in reasons  # the format's declared reasons (the metrics start them at 0)
        if rec is None:
            continue
        assert isinstance(rec, Record) and rec.source == "src"
        assert rec.key is None or isinstance(rec.key, str)
        assert rec.ts is None or (isinstance(rec.ts, float) and math.isfinite(rec.ts))
        assert isinstance(rec.message, str) and isinstance(rec.raw, str)
        assert rec.event is None or (isinstance(rec.event, str) and rec.event)


def accounted(fmt, out: list) -> int:
    rejected = [x for x in out if isinstance(x, Rejection)]
    if isinstance(fmt, OtlpJsonFormat):
        return fmt.lines_in_documents + sum(1 for x in rejected if x.reason != SPAN_REASON)
    in_records = sum(x.raw.count("\n") + 1 for x in out if isinstance(x, Record))
    return in_records + len(rejected)


FUZZ = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def _property(name: str):
    @FUZZ
    @given(lines=lines_for(name))
    def prop(lines):
        fmt, out = run_format(name, lines)
        check_items(out, type(fmt).reject_reasons(SourceConfig(name="src", **SOURCES[name])))
        assert accounted(fmt, out) == len(lines)
    return prop


test_text_never_raises_and_accounts_for_every_line = _property("text")
test_jsonl_never_raises_and_accounts_for_every_line = _property("jsonl")
test_syslog_never_raises_and_accounts_for_every_line = _property("syslog")
test_otlp_never_raises_and_accounts_for_every_line = _property("otlp-json")
test_strace_never_raises_and_accounts_for_every_line = _property("strace")
test_strace_tree_never_raises_and_accounts_for_every_line = _property("strace-tree")


def test_the_corpus_itself_is_read():
    # the seeds are valid: without mutation they give records, so the mutations start from sense
    for name, corpus in CORPUS.items():
        fmt, out = run_format(name, corpus)
        assert any(isinstance(x, Record) for x in out), name
        assert accounted(fmt, out) == len(corpus)


@settings(max_examples=40, deadline=None)
@given(lines=st.lists(st.one_of(*(mutated(c) for c in CORPUS.values()), st.binary(max_size=60).map(
    lambda b: decode_line(b.replace(b"\n", b""), MAX_LINE_BYTES)[0])), max_size=40))
def test_the_pipeline_takes_hostile_lines_of_every_format(lines):
    """Through the whole pipeline (templates, sessions, reject sample), every format at once."""
    with tempfile.TemporaryDirectory() as tmp:
        cfg = parse_config({"state_dir": tmp, "redact": [r"secret\w*"],
                            "sources": [{"name": n, **s} for n, s in SOURCES.items()]})
        pipe = Pipeline(cfg)
        for name in SOURCES:
            for i, line in enumerate(lines):
                pipe.feed_line(name, f"{name}.log", line, i)
        pipe.flush()
        assert all(pipe.lines[name] == len(lines) for name in SOURCES)
        assert all(reason in pipe.reject_reasons[source] for source, reason in pipe.rejected)
        sample = Path(tmp) / "rejects.jsonl"
        if sample.exists():
            entries = [orjson.loads(x) for x in sample.read_bytes().splitlines()]
            assert len(entries) <= 1000 and all(e["source"] in SOURCES for e in entries)


# -- the reject sample on disk -------------------------------------------------------------------
def test_rejects_are_sampled_to_state_dir_redacted_and_bounded(tmp_path):
    from tracewatch.alerts.alert import REDACTED
    from tracewatch.rejects import PER_REASON

    cfg = parse_config({"state_dir": str(tmp_path), "redact": [r"token=\S+"],
                        "sources": [{"name": "sys", "format": "syslog"}]})
    pipe = Pipeline(cfg)
    for i in range(PER_REASON + 50):
        pipe.feed_line("sys", "a.log", f"garbage line {i} token=s3cr3t", i)
        pipe.feed_line("sys", "a.log", "", i)
    pipe.flush()
    assert pipe.rejected[("sys", "not_syslog")] == PER_REASON + 50  # every line is counted
    entries = [orjson.loads(x) for x in (tmp_path / "rejects.jsonl").read_bytes().splitlines()]
    assert len(entries) == PER_REASON  # ... but one reason gets a bounded sample; blank lines none
    assert {(e["source"], e["reason"]) for e in entries} == {("sys", "not_syslog")}
    assert entries[0]["line"] == f"garbage line 0 {REDACTED}" and "s3cr3t" not in str(entries)


def test_reject_sample_rotates_and_survives_an_unwritable_state_dir(tmp_path):
    from tracewatch.rejects import RejectLog

    log = RejectLog(tmp_path / "rejects.jsonl", max_lines=5, clock=lambda: 0.0)
    assert all(log.add("s", "bad_json", f"line {i}") for i in range(12))
    current = (tmp_path / "rejects.jsonl").read_text().splitlines()
    older = (tmp_path / "rejects.jsonl.1").read_text().splitlines()
    assert len(current) == 2 and len(older) == 5 and orjson.loads(current[-1])["line"] == "line 11"
    blocked = tmp_path / "not-a-dir"
    blocked.write_text("")
    stuck = RejectLog(blocked / "rejects.jsonl")
    assert stuck.add("s", "bad_json", "x") is False and stuck.broken  # given up quietly
