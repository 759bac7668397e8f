"""Scenario files: the shipped ones parse; each mistake is one `FILE: FIELD: reason` line."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from tui.errors import UserError
from tui.session.scenario import find_scenario, load_scenario, scenarios_dir

GOOD = """
title = "Test"
prompt = "Once"
[[pane]]
name = "a"
recipe = "top_p=0.9"
"""


def top(extra: str) -> str:
    """GOOD with `extra` among the top-level fields (before the first table)."""
    return GOOD.replace('prompt = "Once"', 'prompt = "Once"\n' + extra)


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "s.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_shipped_scenarios_parse():
    paths = [p for p in scenarios_dir().glob("*.toml") if not p.stem.startswith("sweep")]
    assert len(paths) >= 3
    for path in paths:
        sc = load_scenario(path)
        assert 1 <= len(sc.panes) <= 8
        assert sc.prompt or sc.messages


def test_default_scenario_is_found_by_name():
    assert find_scenario(None).stem == "harbour-town"


@pytest.mark.parametrize("text, field, reason", [
    (GOOD.replace('title = "Test"', ""), "title", "missing"),
    (GOOD.replace("top_p=0.9", "top_p=1.5"), "pane[1].recipe", "top_p must be in (0, 1]"),
    (top("colour = 3\n"), "colour", "unknown field"),
    (GOOD.replace('prompt = "Once"', ""), "prompt", "exactly one of"),
    (top("max_new_tokens = 0\n"), "max_new_tokens", "integer in [1, 4096]"),
    (top("seed = -1\n"), "seed", "integer in"),
    (top("shared_draws = 1\n"), "shared_draws", "true or false"),
    (top("stop = [\"\"]\n"), "stop", "non-empty strings"),
    (GOOD + '[[pane]]\nname = "b"\nrecipe = "greedy"\nwidth = 3\n', "pane[2].width", "unknown"),
    ('title = "T"\nprompt = "x"\n', "pane", "at least one"),
    ('title = "T"\n[[message]]\nrole = "robot"\ncontent = "hi"\n[[pane]]\nname = "a"\n'
     'recipe = "greedy"\n', "message[1].role", "must be one of"),
])
def test_bad_fields_are_named(tmp_path, text, field, reason):
    path = write(tmp_path, text)
    with pytest.raises(UserError) as info:
        load_scenario(path)
    msg = str(info.value)
    assert msg.startswith(f"{path}: {field}: "), msg
    assert reason in msg


def test_toml_syntax_error_is_one_line(tmp_path):
    path = write(tmp_path, "title = \n")
    with pytest.raises(UserError) as info:
        load_scenario(path)
    assert str(info.value).startswith(f"{path}: not valid TOML")


def test_bad_scenario_on_the_command_line_exits_2_without_traceback(tmp_path):
    path = write(tmp_path, GOOD.replace("top_p=0.9", "top_q=0.9"))
    out = subprocess.run([sys.executable, "-m", "tui", "run", str(path)],
                         capture_output=True, text=True)
    assert out.returncode == 2
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"error: {path}: pane[1].recipe: ")
    assert "Traceback" not in out.stderr


def test_run_writes_a_transcript_that_reads_back(tmp_path, tiny_model_dir):
    # the `run` command end to end on the tiny model: the file it writes is a transcript
    # that the reader accepts, with every pane's steps (format: README "Transcript format")
    from tui.transcripts.reader import StoredSession

    path = write(tmp_path, GOOD)
    out_file = tmp_path / "run.jsonl"
    out = subprocess.run([sys.executable, "-m", "tui", "run", str(path), "--steps", "3",
                          "--model", str(tiny_model_dir), "--out", str(out_file)],
                         capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    stored = StoredSession.open(out_file)
    assert stored.steps == 3 and [p.recipe for p in stored.header.panes] == ["top_p=0.9"]
    assert f"transcript: {out_file}" in out.stderr


def _roundtrip(sc, tmp_path):
    from tui.files import write_atomic
    from tui.session.scenario import scenario_toml

    path = tmp_path / "saved.toml"
    write_atomic(path, scenario_toml(sc))
    return load_scenario(path)


@pytest.mark.parametrize("name", ["harbour-town", "tea-shop", "planet-question", "captain-name"])
def test_a_written_scenario_reads_back_the_same(name, tmp_path):
    # the reader is the standard library's tomllib (TOML 1.0); equality is field by field
    sc = load_scenario(find_scenario(name))
    assert _roundtrip(sc, tmp_path) == sc


def test_awkward_text_survives_the_round_trip(tmp_path):
    from tui.session.scenario import PaneSpec, Scenario

    sc = Scenario(title='quotes " and \\ back\\slash', note="tab\there",
                  panes=(PaneSpec("a \u00e9\u4e2d \U0001F600", "greedy", seed=4),
                         PaneSpec("b", "temperature=0.7 top_p=0.9")),
                  messages=(("system", "line one\nline two\r\n"), ("user", "bell\x07 del\x7f")),
                  model="smollm2-135m-instruct", max_new_tokens=33, seed=9,
                  shared_draws=False, stop=("\n\n", "'''", '"""'))
    assert _roundtrip(sc, tmp_path) == sc
    plain = Scenario(title="t", panes=(PaneSpec("p", "greedy"),), prompt="one\n\ntwo ")
    assert _roundtrip(plain, tmp_path) == plain
