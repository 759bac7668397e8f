"""The transcript format: atomic saving, strict reading, streaming, versions, round trips.

Outside references: the JSON grammar of RFC 8259 (no NaN, objects per line as in the
JSON Lines convention, jsonlines.org), Python's documented `os.replace` atomicity
(POSIX rename(2)), and hand-made files whose every defect is known.
"""

from __future__ import annotations

import json
import os
import tracemalloc

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from transcript_fakes import (run_cli, sample_header, sample_lines, sample_records, write_objects,
                              write_sample)

from tui.errors import UserError
from tui.files import write_atomic
from tui.session.record import STOP_REASONS, StepRecord, TopToken
from tui.transcripts.format import step_line, transcript_lines
from tui.transcripts.headers import FORMAT, VERSION, PaneHeader, TranscriptHeader
from tui.transcripts.reader import StoredSession, TranscriptError

# ----- atomic saving ------------------------------------------------------------------------

def test_a_failure_mid_write_leaves_the_old_file_and_no_temp_file(tmp_path):
    # os.replace is atomic on POSIX (Python docs, os.replace; rename(2)): the old file
    # stays whole until the new one is complete.
    path = write_sample(tmp_path / "s.jsonl")
    before = path.read_bytes()

    def failing_lines():
        yield from transcript_lines(sample_header(), sample_records())
        raise OSError(28, "No space left on device")  # ENOSPC half way through

    with pytest.raises(OSError):
        write_atomic(path, failing_lines())
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.jsonl"]  # no temp file left


def test_a_saved_file_gets_the_usual_mode_not_mkstemps_0600(tmp_path):
    mask = os.umask(0o022)
    try:
        path = write_sample(tmp_path / "s.jsonl")
    finally:
        os.umask(mask)
    assert path.stat().st_mode & 0o777 == 0o644  # 0o666 minus umask 022 (POSIX open(2))


# ----- reading back -------------------------------------------------------------------------

def test_a_sample_reads_back_equal(tmp_path):
    path = write_sample(tmp_path / "s.jsonl")
    session = StoredSession.open(path)
    assert session.header == sample_header()
    assert [list(session.pane_records(p)) for p in (0, 1)] == sample_records()
    assert session.steps == 3 and session.pane_lengths == {0: 3, 1: 3}
    assert session.records_at(1)[1].text == " sea"
    assert session.top_at(0, 2)[0].token_id == 22
    assert session.pane_text(0) == " a time,"
    assert session.header.to_json()["format"] == FORMAT and len(list(session.iter_records())) == 6


def test_header_fields_this_version_does_not_know_are_kept(tmp_path):
    objs = sample_lines()
    objs[0]["note"] = "from a later minor writer"
    session = StoredSession.open(write_objects(tmp_path / "s.jsonl", objs))
    assert session.header.extra == {"note": "from a later minor writer"}


def test_prompt_edits_read_back_and_a_file_without_them_reads_as_none(tmp_path):
    from dataclasses import replace

    from tui.session.scenario import EarlierSetup

    earlier = (EarlierSetup(7, "Once", (), 40, ("\n",)),
               EarlierSetup(0, None, (("system", "Be brief."), ("user", "Hi")), 12, ()))
    head = replace(sample_header(), prompt_edits=earlier)
    objs = sample_lines()
    objs[0] = head.to_json()
    assert objs[0]["prompt_edits"][1]["prompt"]["messages"][0] == \
        {"role": "system", "content": "Be brief."}
    session = StoredSession.open(write_objects(tmp_path / "e.jsonl", objs))
    assert session.header.prompt_edits == earlier and session.header.extra == {}
    assert StoredSession.open(write_sample(tmp_path / "old.jsonl")).header.prompt_edits == ()
    objs[0]["prompt_edits"][0]["steps"] = -1
    with pytest.raises(TranscriptError, match="prompt_edits\\[0\\].steps"):
        StoredSession.open(write_objects(tmp_path / "bad.jsonl", objs))


def _corrupt(objs: list[dict], case: str) -> tuple[list[dict] | bytes, int, str]:
    """(file content, the line the error names, words the reason must contain)."""
    if case == "bad json":
        text = "".join(json.dumps(o) + "\n" for o in objs)
        lines = text.splitlines(keepends=True)
        lines[2] = lines[2][:40] + "\n"  # a line cut in the middle, with a newline after
        return "".join(lines).encode(), 3, "not a JSON line"
    if case == "missing field":
        del objs[2]["rank"]
        return objs, 3, "rank: missing"
    if case == "wrong type":
        objs[3]["kept"] = "2"
        return objs, 4, "kept: must be an integer"
    if case == "bool for int":
        objs[3]["token_id"] = True
        return objs, 4, "token_id: must be an integer"
    if case == "out of order":
        objs[3], objs[5] = objs[5], objs[3]  # step 2 of pane 0 before step 1 of pane 0
        return objs, 4, "pane 0 goes from step 0 to 2"
    if case == "step backwards":
        objs.append(dict(objs[1]))  # pane 0 step 0 again, after step 2
        return objs, 8, "after step 2"
    if case == "unknown pane":
        objs[2]["pane"] = 5
        return objs, 3, "5 is not a pane of the header"
    if case == "prob above 1":
        objs[4]["raw_prob"] = 1.5
        return objs, 5, "raw_prob: must be a probability in [0, 1]"
    if case == "negative u":
        objs[4]["u"] = -0.1
        return objs, 5, "u: must be a probability in [0, 1]"
    if case == "top prob":
        objs[4]["top"][1][3] = 2.0
        return objs, 5, "top[1] final_prob"
    if case == "header not first":
        objs[0], objs[1] = objs[1], objs[0]
        return objs, 1, "the first line must be the header"
    if case == "second header":
        objs.insert(3, dict(objs[0]))
        return objs, 4, "a second header"
    if case == "wrong format":
        objs[0]["format"] = "someone-elses-log"
        return objs, 1, "not a logitfork file"
    if case == "unknown step field":
        objs[2]["logits"] = [1, 2]
        return objs, 3, "logits: unknown field"
    if case == "nan":
        text = "".join(json.dumps(o) + "\n" for o in objs).replace('"raw_entropy": 0.5', '"raw_entropy": NaN', 1)
        return text.encode(), 2, "NaN is not valid JSON"  # RFC 8259 sec. 6 has no NaN
    if case == "not utf-8":
        text = "".join(json.dumps(o) + "\n" for o in objs).encode()
        return text.replace(b'" a"', b'"\xff a"', 1), 2, "not UTF-8"
    if case == "not an object":
        objs[1] = [1, 2, 3]  # type: ignore[call-overload]
        return objs, 2, "must be a JSON object"
    if case == "empty file":
        return b"", 1, "empty file"
    if case == "stop then more":
        objs[1]["stop"] = "end of text"  # pane 0 stops at step 0 but goes on
        return objs, 4, "after it stopped"
    if case == "forged stop":
        objs[0]["panes"][0]["stop"] = "end of text"  # the records end on "length"
        return objs, 1, "marked stopped (end of text) but its records end length"
    if case == "missing header field":
        del objs[0]["seed"]
        return objs, 1, "seed: missing"
    raise AssertionError(case)


BAD_CASES = ["bad json", "missing field", "wrong type", "bool for int", "out of order",
             "step backwards", "unknown pane", "prob above 1", "negative u", "top prob",
             "header not first", "second header", "wrong format", "unknown step field", "nan",
             "not utf-8", "not an object", "empty file", "stop then more", "forged stop",
             "missing header field"]


@pytest.mark.parametrize("case", BAD_CASES)
def test_a_bad_file_is_one_error_line_with_its_line_number(case, tmp_path, monkeypatch, capsys):
    content, line, words = _corrupt(sample_lines(), case)
    path = tmp_path / "bad.jsonl"
    if isinstance(content, bytes):
        path.write_bytes(content)
    else:
        write_objects(path, content)
    rc = run_cli(["report", str(path), "--out", str(tmp_path / "r.md")], monkeypatch)
    err = capsys.readouterr().err
    assert rc == 2
    assert err.startswith(f"error: {path}:{line}: "), err
    assert words in err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "r.md").exists()


def test_a_newer_version_is_refused_with_the_upgrade_message(tmp_path, monkeypatch, capsys):
    objs = sample_lines()
    objs[0]["version"] = 9
    path = write_objects(tmp_path / "new.jsonl", objs)
    assert run_cli(["report", str(path)], monkeypatch) == 2
    assert capsys.readouterr().err == (f"error: {path}:1: format version 9 is newer than this "
                                       f"logitfork reads ({VERSION}); upgrade logitfork\n")


def test_a_cut_last_line_is_dropped_with_a_warning(tmp_path, capsys):
    path = write_sample(tmp_path / "cut.jsonl")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) - 30])  # the writer died inside the last line
    session = StoredSession.open(path)
    err = capsys.readouterr().err
    assert err.startswith(f"warning: {path}:7: the last line is cut short")
    assert session.pane_lengths == {0: 3, 1: 2}
    assert list(session.iter_records())[-1].step == 2  # the valid lines are all there
    assert session.warnings and "cut short" in session.warnings[0]


def test_a_cut_line_in_the_middle_is_an_error_not_a_warning(tmp_path):
    path = write_sample(tmp_path / "cut.jsonl")
    lines = path.read_text().splitlines(keepends=True)
    lines[3] = lines[3][:50] + "\n"
    path.write_text("".join(lines))
    with pytest.raises(TranscriptError, match=r":4: not a JSON line"):
        StoredSession.open(path)


def test_a_missing_file_and_a_folder_are_user_errors(tmp_path):
    with pytest.raises(UserError, match="no such file"):
        StoredSession.open(tmp_path / "absent.jsonl")
    with pytest.raises(UserError, match="is a folder"):
        StoredSession.open(tmp_path)


def test_a_file_changed_after_opening_is_noticed(tmp_path):
    path = write_sample(tmp_path / "s.jsonl")
    session = StoredSession.open(path)
    with path.open("a") as fh:
        fh.write("\n")
    with pytest.raises(UserError, match="changed after it was opened"):
        list(session.iter_records())


# ----- streaming --------------------------------------------------------------------------

def test_a_large_file_is_read_with_bounded_memory(tmp_path):
    # 2 panes x 900 steps, ~2.3 KB a line: about 4 MB on disk.
    head = sample_header(max_new_tokens=4096, panes=tuple(
        PaneHeader(i, f"p{i}", "greedy", None, ((0, "greedy"),), None, None) for i in (0, 1)))
    top = tuple(TopToken(100 + k, "a long piece of token text " * 3, 0.01, 0.01) for k in range(20))

    def lines():
        yield json.dumps(head.to_json())
        for t in range(900):
            for pane in (0, 1):
                yield step_line(StepRecord(t, pane, 5, " word", 3, 0.2, 0.3, 40, 2.5, 1.5,
                                           0.5, top))

    path = write_atomic(tmp_path / "big.jsonl", lines())
    size = path.stat().st_size
    assert size > 4_000_000
    tracemalloc.start()
    try:
        session = StoredSession.open(path)
        count = sum(1 for _ in session.iter_records())
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert count == 1800 and session.steps == 900
    # Far below the file: nothing is held whole. What remains is fixed: one byte offset
    # per step, and CPython's tuple free list, which keeps up to 2000 freed tuples of
    # each small size (here the records' top-20 tuples, ~400 KB at most).
    assert peak < size / 8, (peak, size)
    assert session.records_at(899)[1].step == 899  # random access by stored offsets


# ----- round trips ------------------------------------------------------------------------

_text = st.text(max_size=12)
_prob = st.floats(0.0, 1.0)
_entropy = st.floats(0.0, 12.0)
# recipes are checked when a transcript is read, so the generated ones must parse
_recipe = st.sampled_from(["greedy", "temperature=0.7 top_p=0.9", "min_p=0.05",
                           "mirostat(tau=5,learning_rate=0.1)", "repetition_penalty=1.2 top_k=40"])


@st.composite
def transcripts(draw):
    n_panes = draw(st.integers(1, 4))
    ids = draw(st.lists(st.integers(0, 50), min_size=n_panes, max_size=n_panes, unique=True))
    columns, panes = [], []
    for pid in ids:
        n = draw(st.integers(0, 5))
        stop = draw(st.sampled_from((None,) + STOP_REASONS)) if n else None
        recs = []
        for t in range(n):
            top = tuple(TopToken(draw(st.integers(0, 10**6)), draw(_text), draw(_prob), draw(_prob))
                        for _ in range(draw(st.integers(0, 3))))
            recs.append(StepRecord(
                step=t, pane=pid, token_id=draw(st.integers(0, 10**6)), text=draw(_text),
                rank=draw(st.integers(1, 10**6)), raw_prob=draw(_prob), final_prob=draw(_prob),
                kept=draw(st.integers(1, 10**6)), raw_entropy=draw(_entropy),
                final_entropy=draw(_entropy), u=draw(_prob), top=top, forced=draw(st.booleans()),
                stop=stop if t == n - 1 else None))
        columns.append(recs)
        log = tuple(sorted(draw(st.lists(st.tuples(st.integers(0, 9), _recipe),
                                         min_size=1, max_size=3))))
        panes.append(PaneHeader(pid, draw(st.text(min_size=1, max_size=8)), draw(_recipe),
                                draw(st.none() | st.integers(0, 2**63 - 1)), log, None, stop))
    messages = draw(st.none() | st.lists(st.tuples(st.sampled_from(["system", "user"]), _text),
                                         min_size=1, max_size=2).map(tuple))
    head = TranscriptHeader(
        title=draw(st.text(min_size=1, max_size=20)), created="2025-01-01T00:00:00+00:00",
        model_name=draw(st.text(min_size=1, max_size=10)), model_source="s", dtype="float32",
        prompt_text=None if messages else draw(_text), messages=messages,
        prompt_ids=tuple(draw(st.lists(st.integers(0, 10**6), min_size=1, max_size=6))),
        max_new_tokens=draw(st.integers(1, 4096)), stop=tuple(draw(st.lists(_text, max_size=2))),
        seed=draw(st.integers(0, 2**63 - 1)), shared_draws=draw(st.booleans()),
        panes=tuple(panes), versions={"torch": draw(_text)})
    return head, columns


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(transcripts())
def test_generated_transcripts_round_trip(tmp_path, sample):
    head, columns = sample
    path = write_atomic(tmp_path / "gen.jsonl", transcript_lines(head, columns))
    session = StoredSession.open(path)
    assert session.header == head
    for pane, recs in zip(head.panes, columns):
        assert list(session.pane_records(pane.id)) == recs
