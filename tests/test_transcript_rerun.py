"""The re-run check on the tiny model: a faithful transcript re-runs identically (exit 0);
one edited token is found at its step and pane (exit 3) with both tokens and top-5 lists.

The reference for "identical" is the engine's documented contract that draws are a pure
function of (seed, stream, step), with the session rebuilt only from the file's header;
the difference is made by hand (one token id changed in a copy of the file).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from transcript_fakes import run_cli

from tui.files import write_atomic
from tui.session.opening import open_session
from tui.session.scenario import parse_scenario
from tui.transcripts import format as transcript


def _session(lm, shared: bool, third_seed: int | None = 21):
    third = {"name": "third", "recipe": "temperature=0.9"}
    if third_seed is not None:
        third["seed"] = third_seed
    sc = parse_scenario({"title": "Rerun me", "prompt": "Fog rolled over the quay", "seed": 9,
                         "max_new_tokens": 40, "shared_draws": shared,
                         "pane": [{"name": "warm", "recipe": "temperature=1.2"},
                                  {"name": "narrow", "recipe": "top_k=4"}, third]})
    return open_session(lm, sc)


@pytest.fixture(scope="module")
def lm(tiny_model_dir):
    from tui.model.catalogue import load_model

    return load_model(str(tiny_model_dir))


@pytest.fixture(scope="module")
def saved(lm, tmp_path_factory) -> Path:
    """A session with a recipe change, a fork and a forced token."""
    engine, info = _session(lm, shared=True)
    for _ in range(4):
        engine.step()
    engine.set_recipe(1, "min_p=0.2 temperature=1.3")
    for _ in range(3):
        engine.step()
    engine.fork(0, "top_p=0.6", "fork")
    engine.step()
    engine.force(0, engine.step_index, 5)  # the user picks token 5 in pane 0
    for _ in range(6):
        engine.step()
    folder = tmp_path_factory.mktemp("rerun")
    path = write_atomic(folder / "s.jsonl",
                                   transcript.lines(engine.view(), info, engine.prompt_ids))
    return path


def test_a_faithful_transcript_reruns_identically(saved, monkeypatch, capsys):
    assert run_cli(["rerun", str(saved)], monkeypatch) == 0
    out = capsys.readouterr().out
    assert out.startswith("identical: a re-run on ")
    # Every record is compared except a fork's copies of its source's steps.
    lines = [json.loads(x) for x in saved.read_text().splitlines()]
    first = {p["id"]: (p["origin"][1] if p["origin"] else 0) for p in lines[0]["panes"]}
    own = sum(1 for r in lines[1:] if r["step"] >= first[r["pane"]])
    steps = 1 + max(r["step"] for r in lines[1:])
    assert f"({own} tokens over {steps} steps)" in out
    assert own < len(lines) - 1  # the fork's copied steps really were left out


def _edit(path: Path, out: Path, step: int, pane: int, token: int) -> dict:
    lines = path.read_text(encoding="utf-8").splitlines()
    for i, line in enumerate(lines[1:], start=1):
        obj = json.loads(line)
        if obj["step"] == step and obj["pane"] == pane:
            before = dict(obj)
            obj["token_id"] = token
            lines[i] = json.dumps(obj, ensure_ascii=False)
            out.write_text("\n".join(lines) + "\n", encoding="utf-8")
            return before
    raise AssertionError("no such record")


def test_one_edited_token_is_found_with_both_tokens_and_top5(saved, tmp_path, monkeypatch, capsys):
    copy = tmp_path / "edited.jsonl"
    before = _edit(saved, copy, step=6, pane=1, token=7)
    assert before["token_id"] != 7 and not before["forced"]
    assert run_cli(["rerun", str(copy)], monkeypatch) == 3
    out = capsys.readouterr().out.splitlines()
    assert out[0].startswith(f"different: {copy} and a re-run on ")
    assert out[0].endswith("first differ at step 6, pane 1 'narrow' (min_p=0.2 temperature=1.3)")
    assert out[1].startswith("  file:  token 7 ")
    assert out[2].startswith(f"  now:   token {before['token_id']} ")
    top5 = "  ".join(f"{t[0]} {t[1]!r} {t[2]:.4f}" for t in before["top"][:5])
    assert out[3] == f"  file top-5:  {top5}"  # the file's list is what the file holds
    assert out[4] == f"  now top-5:   {top5}"  # and the re-run computed the same list
    assert out[5] == "  package versions (file -> now):"
    assert any(line.strip().startswith("torch: ") for line in out[6:])


def test_unshared_draws_keep_each_panes_stream_after_a_removal(lm, tmp_path, monkeypatch, capsys):
    engine, info = _session(lm, shared=False, third_seed=None)  # draws from stream 2
    for _ in range(3):
        engine.step()
    engine.remove_pane(1)  # pane 2 keeps draw stream 2; a naive re-run would give it 1
    for _ in range(5):
        engine.step()
    path = write_atomic(tmp_path / "u.jsonl",
                                   transcript.lines(engine.view(), info, engine.prompt_ids))
    assert [p.id for p in engine.view().panes] == [0, 2]
    assert run_cli(["rerun", str(path)], monkeypatch) == 0
    assert capsys.readouterr().out.startswith("identical")


def test_an_unloadable_model_is_one_error_line(saved, monkeypatch, capsys):
    assert run_cli(["rerun", str(saved), "--model", "/no/such/model"], monkeypatch) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "Traceback" not in err
