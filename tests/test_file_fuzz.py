"""Mutated scenario, sweep and transcript files: one error line, exit 2, nothing written.

The rule under test is the project's own (no outside source): bad input gets one
`error:` line naming the file (and, where the file parses, the field), exit status 2,
no traceback, and no output file. Mutations are the usual ones of file fuzzing (common
practice, no source): truncation, bit flips, invalid UTF-8 spliced in, and, on the
parsed structure, a field replaced by a value of the wrong type, a huge number, an
empty or odd string. Each mutated file goes through its reader and through the
commands that take it (`run`, `sweep`, `report`, `rerun`, `replay`'s reader), in
process via `tui.cli.main`.
"""

from __future__ import annotations

import contextlib
import io
import json
import math
import tomllib
from pathlib import Path
from typing import Any, Callable

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tui.cli import main as cli
from tui.errors import UserError
from tui.session.scenario import load_scenario, scenarios_dir
from tui.sweeps.spec import load_sweep
from tui.transcripts.reader import StoredSession

try:
    from sweep_files import write_sweep
except ImportError:
    from tests.sweep_files import write_sweep

FUZZ = settings(max_examples=25, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])

# Values a field is replaced with: wrong types, huge and odd numbers, odd strings.
ODD_VALUES: list[Any] = [
    10**30, -(10**30), 2**63, 2**64, -1, 0, 1e308, -1e308, 1e-320, -0.0, math.inf, math.nan,
    "", " ", "\u0000", "x" * 5000, "top_p=1.5", "mirostat(tau=5,eta=0.1)", "é\u202e",
    True, False, [], [1, "a"], [[[]]], {}, {"role": "user"}, {"x": 10**30},
]


@pytest.fixture(autouse=True)
def _state_folder(tmp_path_factory, monkeypatch) -> None:
    # an unexpected failure writes a crash report; keep it out of the user's state folder
    monkeypatch.setenv("LOGITFORK_STATE_DIR", str(tmp_path_factory.mktemp("state")))


# --- writing mutated files ---------------------------------------------------------


def toml_value(value: Any) -> str:
    """A TOML value (inline arrays and tables) for the JSON-like values used here."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return "nan" if math.isnan(value) else "inf" if value == math.inf else \
            "-inf" if value == -math.inf else repr(value)
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False).replace("\x7f", "\\u007f")
    if isinstance(value, list):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{json.dumps(k)} = {toml_value(v)}" for k, v in value.items()) + "}"
    raise TypeError(type(value))


def toml_text(data: dict[str, Any]) -> str:
    return "".join(f"{json.dumps(k)} = {toml_value(v)}\n" for k, v in data.items())


def paths_of(value: Any, prefix: tuple = ()) -> list[tuple]:
    """Every place in a nested dict/list value, as a path of keys and indices."""
    found = [prefix] if prefix else []
    if isinstance(value, dict):
        for k, v in value.items():
            found += paths_of(v, (*prefix, k))
    elif isinstance(value, list):
        for i, v in enumerate(value):
            found += paths_of(v, (*prefix, i))
    return found


def replaced(data: Any, path: tuple, new: Any) -> Any:
    copy = json.loads(json.dumps(data))
    target = copy
    for key in path[:-1]:
        target = target[key]
    target[path[-1]] = new
    return copy


def byte_mutation(data: bytes, kind: str, where: float, bit: int) -> bytes:
    at = min(int(where * len(data)), len(data) - 1)
    if kind == "truncate":
        return data[:at]
    if kind == "flip":
        return data[:at] + bytes([data[at] ^ (1 << bit)]) + data[at + 1:]
    if kind == "bad-utf8":
        return data[:at] + b"\xc3\x28\xff" + data[at:]
    return data[:at] + data[at:][len(data[at:]) // 2:]  # "cut": drop part of the middle


BYTE_MUTATIONS = st.tuples(st.sampled_from(["truncate", "flip", "bad-utf8", "cut"]),
                           st.floats(0.0, 1.0), st.integers(0, 7))


# --- what every refusal must look like ----------------------------------------------


def run_cli(argv: list[str]) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        rc = cli(argv)
    return rc, out.getvalue(), err.getvalue()


def check_reader(read: Callable[[Path], object], path: Path) -> UserError | None:
    """The reader accepts the file, or refuses it with a one-line `UserError` naming it."""
    try:
        read(path)
    except UserError as exc:
        message = str(exc)
        assert "\n" not in message and message.startswith(str(path)), message
        return exc
    return None


def check_refused_by(argv: list[str], path: Path, written: Path) -> str:
    rc, out, err = run_cli(argv)
    lines = err.strip().splitlines()
    assert rc == 2, (argv, err)
    assert "Traceback" not in err
    errors = [line for line in lines if line.startswith("error: ")]
    assert len(errors) == 1 and str(path) in errors[0], err
    assert not written.exists(), f"{written} was written for a refused file"
    return errors[0]


def fresh(tmp_path_factory: pytest.TempPathFactory, name: str, data: bytes) -> Path:
    folder = tmp_path_factory.mktemp("fuzz")
    path = folder / name
    path.write_bytes(data)
    return path


# --- scenarios -----------------------------------------------------------------------

SCENARIO = scenarios_dir() / "planet-question.toml"


def scenario_fields() -> list[tuple]:
    return paths_of(tomllib.loads(SCENARIO.read_text(encoding="utf-8")))


def names_a_field(message: str, where: tuple) -> bool:
    """Whether a refusal names one of the keys on the path to the changed value (the leaf,
    or a table holding it when the table as a whole is what is wrong)."""
    return any(isinstance(k, str) and k in message for k in where)


def check_scenario(tmp_path_factory, tiny_model_dir, data: bytes, where: tuple | None) -> None:
    path = fresh(tmp_path_factory, "scenario.toml", data)
    refused = check_reader(load_scenario, path)
    out = path.parent / "out.jsonl"
    if refused is None:
        rc, _, err = run_cli(["run", str(path), "--model", str(tiny_model_dir), "--steps", "2",
                              "--out", str(out)])
        assert rc in (0, 2) and "Traceback" not in err, err
        assert (rc == 0) == out.exists()
        return
    if where is not None:
        assert names_a_field(str(refused), where), (where, str(refused))
    check_refused_by(["run", str(path), "--model", str(tiny_model_dir), "--out", str(out)], path, out)


@FUZZ
@given(BYTE_MUTATIONS)
def test_scenario_bytes_mutated(tmp_path_factory, tiny_model_dir, mutation) -> None:
    check_scenario(tmp_path_factory, tiny_model_dir, byte_mutation(SCENARIO.read_bytes(), *mutation), None)


@FUZZ
@given(st.sampled_from(scenario_fields()), st.sampled_from(ODD_VALUES))
def test_scenario_field_replaced(tmp_path_factory, tiny_model_dir, where: tuple, value: Any) -> None:
    data = replaced(tomllib.loads(SCENARIO.read_text(encoding="utf-8")), where, value)
    check_scenario(tmp_path_factory, tiny_model_dir, toml_text(data).encode("utf-8"), where)


# --- sweeps --------------------------------------------------------------------------


@pytest.fixture(scope="module")
def sweep_base(tiny_model_dir, tmp_path_factory) -> dict[str, Any]:
    path = write_sweep(tmp_path_factory.mktemp("sweep") / "s.toml", tiny_model_dir,
                       recipes=["greedy", "mirostat(tau=5,learning_rate=1000)"], samples=2,
                       max_new_tokens=3)
    data = tomllib.loads(path.read_text(encoding="utf-8"))
    data["grid"] = {"temperature": [0.5, 1e-300], "top_k": [2, 10**9]}
    assert load_sweep(fresh(tmp_path_factory, "s.toml", toml_text(data).encode())).recipe_texts
    return data


def check_sweep(tmp_path_factory, data: bytes, where: tuple | None) -> None:
    path = fresh(tmp_path_factory, "sweep.toml", data)
    refused = check_reader(load_sweep, path)
    out = path.parent / "out"
    if refused is None:
        spec = load_sweep(path)
        if len(spec.recipe_texts) * spec.samples * spec.max_new_tokens > 400:
            return  # a big but valid sweep: the reader's answer is what is tested here
        rc, _, err = run_cli(["sweep", str(path), "--out", str(out), "--resamples", "20"])
        assert rc in (0, 2) and "Traceback" not in err, err
        return
    if where is not None:
        assert names_a_field(str(refused), where), (where, str(refused))
    check_refused_by(["sweep", str(path), "--out", str(out)], path, out)


@FUZZ
@given(BYTE_MUTATIONS)
def test_sweep_bytes_mutated(tmp_path_factory, sweep_base, mutation) -> None:
    check_sweep(tmp_path_factory, byte_mutation(toml_text(sweep_base).encode("utf-8"), *mutation), None)


@FUZZ
@given(st.data(), st.sampled_from(ODD_VALUES))
def test_sweep_field_replaced(tmp_path_factory, sweep_base, data: st.DataObject, value: Any) -> None:
    where = data.draw(st.sampled_from(paths_of(sweep_base)))
    check_sweep(tmp_path_factory, toml_text(replaced(sweep_base, where, value)).encode("utf-8"), where)


# --- transcripts ---------------------------------------------------------------------


@pytest.fixture(scope="module")
def transcript_base(tiny_model_dir, tmp_path_factory) -> list[dict[str, Any]]:
    folder = tmp_path_factory.mktemp("transcript")
    scenario = folder / "s.toml"
    scenario.write_text(
        'title = "fuzz"\nprompt = "The lighthouse keeper"\nmax_new_tokens = 3\nseed = 2\n'
        '[[pane]]\nname = "a"\nrecipe = "mirostat(tau=5,learning_rate=1000)"\n'
        '[[pane]]\nname = "b"\nrecipe = "temperature=1e-300 top_k=3"\n', encoding="utf-8")
    out = folder / "t.jsonl"
    rc, _, err = run_cli(["run", str(scenario), "--model", str(tiny_model_dir), "--out", str(out)])
    assert rc == 0, err
    return [json.loads(line) for line in out.read_text(encoding="utf-8").splitlines()]


def jsonl(lines: list[dict[str, Any]]) -> bytes:
    return "".join(json.dumps(obj, ensure_ascii=False) + "\n" for obj in lines).encode("utf-8")


def check_transcript(tmp_path_factory, data: bytes, where: tuple | None) -> None:
    from tui.workbench.replay_source import replay_source

    path = fresh(tmp_path_factory, "t.jsonl", data)
    refused = check_reader(lambda p: StoredSession.open(p, warn=lambda m: None), path)
    check_reader(lambda p: replay_source(p, warn=lambda m: None), path)
    report = path.parent / "r.html"
    if refused is None:
        rc, _, err = run_cli(["report", str(path), "--out", str(report)])
        assert rc in (0, 2) and "Traceback" not in err, err
        rc, _, err = run_cli(["rerun", str(path)])
        assert rc in (0, 2, 3) and "Traceback" not in err, err
        return
    if where is not None:
        assert names_a_field(str(refused), where), (where, str(refused))
    check_refused_by(["report", str(path), "--out", str(report)], path, report)
    check_refused_by(["rerun", str(path)], path, path.parent / "nothing")
    check_refused_by(["replay", str(path)], path, path.parent / "nothing")  # before any screen


@FUZZ
@given(BYTE_MUTATIONS)
def test_transcript_bytes_mutated(tmp_path_factory, transcript_base, mutation) -> None:
    check_transcript(tmp_path_factory, byte_mutation(jsonl(transcript_base), *mutation), None)


@FUZZ
@given(st.data(), st.sampled_from(ODD_VALUES))
def test_transcript_field_replaced(tmp_path_factory, transcript_base, data: st.DataObject,
                                   value: Any) -> None:
    line = data.draw(st.integers(0, len(transcript_base) - 1))
    where = data.draw(st.sampled_from(paths_of(transcript_base[line])))
    lines = list(transcript_base)
    lines[line] = replaced(lines[line], where, value)
    unparsable = isinstance(value, float) and not math.isfinite(value)  # NaN is not JSON
    check_transcript(tmp_path_factory, jsonl(lines), None if unparsable else where)


def test_an_old_transcript_spelling_of_mirostat_is_read_with_a_note(tmp_path, transcript_base) -> None:
    # transcripts written before the rename hold mirostat(tau=..,eta=..): read as learning_rate
    lines = json.loads(json.dumps(transcript_base))
    for pane in lines[0]["panes"]:
        pane["recipe"] = pane["recipe"].replace("learning_rate=", "eta=")
        pane["recipe_log"] = [[s, r.replace("learning_rate=", "eta=")] for s, r in pane["recipe_log"]]
    assert "mirostat(tau=5,eta=1000)" in lines[0]["panes"][0]["recipe"]
    path = tmp_path / "old.jsonl"
    path.write_bytes(jsonl(lines))
    notes: list[str] = []
    session = StoredSession.open(path, warn=notes.append)
    assert session.panes[0].recipe == "mirostat(tau=5,learning_rate=1000)"
    assert session.panes[0].recipe_log == ((0, "mirostat(tau=5,learning_rate=1000)"),)
    assert len(notes) == 1 and "learning_rate" in notes[0] and str(path) in notes[0]


def test_a_scenario_with_the_old_mirostat_spelling_is_refused_naming_the_new(tmp_path) -> None:
    path = tmp_path / "old.toml"
    text = SCENARIO.read_text(encoding="utf-8").replace('"mirostat=3.0"', '"mirostat(tau=3,eta=0.1)"')
    path.write_text(text, encoding="utf-8")
    rc, _, err = run_cli(["run", str(path)])
    assert rc == 2
    assert err.strip() == (f"error: {path}: pane[1].recipe: 'mirostat(tau=3,eta=0.1)': mirostat "
                           "parameter eta is now called learning_rate; write e.g. "
                           "mirostat(tau=5,learning_rate=0.1)")


def test_the_shipped_scenario_is_the_one_fuzzed() -> None:
    # the mutations start from a valid file; if it stopped being one, they would test nothing
    assert load_scenario(SCENARIO).panes


# --- the cases the fuzzing found, pinned --------------------------------------------


def test_a_transcript_recipe_that_does_not_parse_is_refused_at_read_time(tmp_path, transcript_base) -> None:
    lines = json.loads(json.dumps(transcript_base))
    lines[0]["panes"][1]["recipe"] = "top_p=1.5"
    path = tmp_path / "t.jsonl"
    path.write_bytes(jsonl(lines))
    report = tmp_path / "r.html"
    message = check_refused_by(["report", str(path), "--out", str(report)], path, report)
    assert message == f"error: {path}:1: panes[1].recipe: top_p must be in (0, 1], got 1.5"


def test_a_prompt_token_outside_the_vocabulary_is_refused_by_rerun(tmp_path, transcript_base) -> None:
    # it passed the reader (ids >= 0) and then overflowed torch's int64 in the forward pass
    lines = json.loads(json.dumps(transcript_base))
    lines[0]["prompt"]["ids"][0] = 10**30
    path = tmp_path / "t.jsonl"
    path.write_bytes(jsonl(lines))
    message = check_refused_by(["rerun", str(path)], path, tmp_path / "nothing")
    assert f"{path}: prompt.ids: token id {10**30} is outside the vocabulary" in message


def test_a_prompt_longer_than_the_context_names_the_scenario_field(tmp_path, tiny_model_dir) -> None:
    # the tiny model's context holds 256 tokens (tests/tiny_model.py)
    path = tmp_path / "long.toml"
    path.write_text('title = "long"\nprompt = "' + "harbour " * 400 + '"\n'
                    '[[pane]]\nname = "a"\nrecipe = "greedy"\n', encoding="utf-8")
    out = tmp_path / "out.jsonl"
    message = check_refused_by(["run", str(path), "--model", str(tiny_model_dir), "--out", str(out)],
                               path, out)
    assert message.startswith(f"error: {path}: prompt: the prompt has ")
    assert "the model's context holds 256" in message


def test_a_sweep_model_name_too_long_for_a_path_names_the_field(tmp_path, sweep_base) -> None:
    path = tmp_path / "s.toml"
    path.write_text(toml_text({**sweep_base, "model": "x" * 5000}), encoding="utf-8")
    out = tmp_path / "out"
    message = check_refused_by(["sweep", str(path), "--out", str(out)], path, out)
    assert message.startswith(f"error: {path}: model: model xxx")
    assert "not a usable path" in message
