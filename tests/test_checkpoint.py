"""Checkpoints and the alert journal: a pipeline stopped and restored mid-stream gives exactly
the verdicts of one uninterrupted run; alerts are journalled once across crashes."""

from __future__ import annotations

import orjson
import pytest

from tracewatch.baselines import load_baseline
from tracewatch.errors import StateError
from tracewatch.pipeline import Pipeline
from tracewatch.sources.checkpoint import (AlertJournal, JournalMark, capture, capture_chunks, load_checkpoint,
                                          restore, save_checkpoint)


@pytest.fixture(scope="module")
def fitted(demo_fit):
    return demo_fit.cfg, demo_fit.day.read_text().splitlines()


def _feed(pipe: Pipeline, lines: list[str], start: int) -> None:
    pipe.feed_block("api", "day", list(lines), list(range(start, start + len(lines))))


def test_restored_pipeline_gives_the_verdicts_of_an_uninterrupted_run(fitted, tmp_path):
    cfg, lines = fitted
    whole: list[dict] = []
    pipe = Pipeline(cfg, load_baseline(cfg.state_dir), on_verdict=whole.append, score_all=True)
    _feed(pipe, lines, 0)
    pipe.flush()

    cut = len(lines) * 6 // 10
    parts: list[dict] = []
    first = Pipeline(cfg, load_baseline(cfg.state_dir), on_verdict=parts.append, score_all=True)
    _feed(first, lines[:cut], 0)
    first.tick(first.watermark)  # what the daemon does before a checkpoint: score the closed ones
    assert len(first.miner.templates) > first.miner.n_seen, "the test needs templates learned since the fit"
    assert first.sessionizer.open, "the test needs sessions open at the checkpoint"
    path = tmp_path / "checkpoint.json"
    path.write_bytes(capture(first, [], {"offset": 0, "count": 0}))

    second = Pipeline(cfg, load_baseline(cfg.state_dir), on_verdict=parts.append, score_all=True)
    restore(second, load_checkpoint(path))
    _feed(second, lines[cut:], cut)
    second.flush()

    def comparable(verdicts: list[dict]) -> list[dict]:
        # how a session closed depends on when the last tick ran ("idle" vs "flush" at the end
        # of the input); which events it holds, and so its verdict, does not
        return sorted(({k: v for k, v in x.items() if k != "closed_by"} for x in verdicts),
                      key=lambda v: v["alert_id"])

    assert comparable(parts) == comparable(whole)
    assert second.records == pipe.records and second.sessions_scored == pipe.sessions_scored
    assert second.alerts == pipe.alerts
    assert [t.id for t in second.miner.templates] == [t.id for t in pipe.miner.templates]


def test_missing_damaged_and_foreign_checkpoints(tmp_path):
    path = tmp_path / "checkpoint.json"
    assert load_checkpoint(path) is None
    path.write_bytes(b'{"schema_version": 1, "kind": "tracewatch-checkpoint", "files": [')
    with pytest.raises(StateError, match="damaged.*move it away"):
        load_checkpoint(path)
    path.write_bytes(orjson.dumps({"schema_version": 1, "kind": "something-else"}))
    with pytest.raises(StateError, match="damaged"):
        load_checkpoint(path)


def test_a_session_naming_an_unknown_template_is_refused(fitted, tmp_path):
    cfg, lines = fitted
    pipe = Pipeline(cfg, load_baseline(cfg.state_dir))
    _feed(pipe, lines[:50], 0)
    state = orjson.loads(capture(pipe, [], {"offset": 0, "count": 0}))
    state["pipeline"]["sessions"]["open"][0][2] = [10**6]
    path = tmp_path / "checkpoint.json"
    path.write_bytes(orjson.dumps(state))
    with pytest.raises(StateError, match="template that does not exist"):
        restore(Pipeline(cfg, load_baseline(cfg.state_dir)), load_checkpoint(path))


def test_checkpoint_written_in_pieces_is_the_same_document(fitted, tmp_path):
    # the daemon writes the open sessions a few at a time; the file must be one valid checkpoint
    cfg, lines = fitted
    pipe = Pipeline(cfg, load_baseline(cfg.state_dir), clock=lambda: 0.0)  # ticks only when told, as the daemon's
    _feed(pipe, lines[:200], 0)
    n_open = len(pipe.sessionizer.open)
    assert n_open > 3
    pieces = list(capture_chunks(pipe, [], {"offset": 0, "count": 0}, per_chunk=2))
    assert len(pieces) >= 2 + (n_open + 1) // 2
    path = tmp_path / "checkpoint.json"
    save_checkpoint(path, iter(pieces))
    ckpt = load_checkpoint(path)
    assert len(ckpt.pipeline.sessions.open) == n_open
    assert orjson.loads(path.read_bytes())["pipeline"]["sessions"]["open"] == \
        orjson.loads(capture(pipe, [], {"offset": 0, "count": 0}))["pipeline"]["sessions"]["open"]


def _alert(n: int) -> dict:
    return {"alert": True, "alert_id": f"id{n}", "score": float(n)}


def _ids(path) -> list[str]:
    return [orjson.loads(line)["alert_id"] for line in path.read_bytes().splitlines()]


def test_journal_appends_once_across_two_crashes(tmp_path):
    path = tmp_path / "alerts.jsonl"
    j = AlertJournal(path)
    j.open(None)
    for n in (1, 2, 3):
        assert j.append(_alert(n))
    mark1 = JournalMark(**j.sync())
    j.append(_alert(4))
    j.append(_alert(5))
    j.close()  # crash: no checkpoint after 4 and 5

    j = AlertJournal(path)
    j.open(mark1)  # restart from the checkpoint: 4 and 5 will be raised again
    assert j.count == 5
    assert not j.append(_alert(4))
    assert j.append(_alert(6))
    mark2 = JournalMark(**j.sync())  # 5 was not raised again yet: it is carried in the mark
    assert mark2.pending == ["id5"]
    j.close()  # crash again

    j = AlertJournal(path)
    j.open(mark2)
    assert not j.append(_alert(5))
    assert j.append(_alert(7))
    j.close()
    assert _ids(path) == ["id1", "id2", "id3", "id4", "id5", "id6", "id7"]
    assert j.replayed == 1


def test_journal_cuts_a_torn_last_line(tmp_path, caplog):
    path = tmp_path / "alerts.jsonl"
    j = AlertJournal(path)
    j.open(None)
    j.append(_alert(1))
    mark = JournalMark(**j.sync())
    j.close()
    with open(path, "ab") as fh:
        fh.write(b'{"alert": true, "alert_id": "id2", "sco')  # killed mid-write
    j = AlertJournal(path)
    j.open(mark)
    assert "partial line" in caplog.text
    assert j.append(_alert(2))  # raised again after the restart, and now written whole
    j.close()
    assert _ids(path) == ["id1", "id2"]


def test_journal_numbering_and_since(tmp_path):
    path = tmp_path / "alerts.jsonl"
    j = AlertJournal(path, keep=3)
    j.open(None)
    for n in range(1, 6):
        j.append(_alert(n))
    got = j.since(0, 10)
    assert [a["alert_id"] for a in got["alerts"]] == ["id3", "id4", "id5"]
    assert got["next"] == 5 and got["total"] == 5 and got["missed"] == 2
    assert j.since(4, 10)["alerts"] == [_alert(5)] and j.since(4, 10)["missed"] == 0
    assert j.since(5, 10) == {"alerts": [], "next": 5, "total": 5, "missed": 0}
    j.close()
    reopened = AlertJournal(path, keep=3)
    reopened.open(None)  # numbering survives a restart: read back from the file
    assert reopened.since(3, 1)["alerts"] == [_alert(4)]
    reopened.close()


def test_damaged_lines_keep_their_numbers_and_their_alerts_are_appended_again(tmp_path, caplog):
    path = tmp_path / "alerts.jsonl"
    j = AlertJournal(path)
    j.open(None)
    for n in (1, 2, 3):
        j.append(_alert(n))
    mark = JournalMark(**j.sync())
    j.append(_alert(4))
    j.append(_alert(5))
    j.close()
    # a restart will raise 2 and 3 again (pending), 4 and 5 too (after the mark); 3 and 5 are damaged
    mark = mark.model_copy(update={"pending": ["id2", "id3"]})
    lines = path.read_bytes().split(b"\n")
    lines[2] = b"\x00" * len(lines[2])  # id3: what a power loss can leave
    lines[4] = b'["not", "an", "alert"]'  # id5
    path.write_bytes(b"\n".join(lines))
    j = AlertJournal(path)
    j.open(mark)
    assert j.damaged == 2 and [r.getMessage().count("damaged line") for r in caplog.records].count(1) == 1
    assert [n for n, _ in j.recent] == [1, 2, 4] and j.count == 5  # numbers kept
    assert [j.append(_alert(n)) for n in (2, 3, 4, 5)] == [False, True, False, True]
    j.close()
    assert [orjson.loads(x)["alert_id"] for i, x in enumerate(path.read_bytes().splitlines()) if i not in (2, 4)] == [
        "id1", "id2", "id4", "id3", "id5"]
