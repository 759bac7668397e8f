"""`logitfork replay`: a transcript written by a real session, opened in the app without a model.

The transcript comes from a real session on the tiny model (`tui.session.opening.open_session`,
`tui.transcripts.format.lines`, `write_atomic`); what the app shows is checked against the
engine's own records of that session and against `tui.transcripts.reader.StoredSession`,
i.e. from outside the app. The cumulative raw mass is checked against a hand sum;
"kept" means final probability > 0, the app's rule for a stored list (common practice,
no source: a token outside the support has probability 0). No timing is asserted here;
the open time is measured by hand (see the README).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
from textual.widgets import DataTable

from tui.app.app import make_app
from tui.app.inspect_screen import InspectScreen
from tui.app.key_bar import key_items
from tui.app.safe_text import shown, shown_token
from tui.cli import main as cli_main
from tui.files import write_atomic
from tui.session.step_analysis import format_prob
from tui.token_style import EDIT_MARK, FORK_MARK, PART_MARK
from tui.transcripts.format import lines
from tui.transcripts.reader import StoredSession
from tui.workbench.replay_source import replay_source

try:
    from app_session import scenario, wait_until
except ImportError:
    from tests.app_session import scenario, wait_until

STEPS = 14
REASON = "replay: no model loaded"


@pytest.fixture(scope="module")
def recorded(tiny_model_dir, tmp_path_factory):
    """(transcript path, the engine's final view) of a real 14-step session with a fork."""
    from tui.model.catalogue import load_model
    from tui.session.opening import open_session

    lm = load_model(str(tiny_model_dir))
    engine, info = open_session(lm, scenario(), seed=5)
    for _ in range(STEPS - 4):
        engine.step()
    engine.fork(1, "top_k=5", "fork k5")
    for _ in range(4):
        engine.step()
    path = tmp_path_factory.mktemp("replay") / "session.jsonl"
    write_atomic(path, lines(engine.view(), info, engine.prompt_ids))
    return path, engine.view()


def notes(app) -> list[str]:
    return [n.message for n in app._notifications]


async def test_replay_shows_the_session_and_moves_the_cursor(recorded):
    path, live = recorded
    app = make_app(source=replay_source(path))
    async with app.run_test(size=(100, 30)) as pilot:
        await wait_until(pilot, lambda: len(app.grid.panes()) == len(live.panes))
        assert app.view == live  # every record, recipe log and fork origin, from the file
        assert app.stepper is None and app.cursor == STEPS
        stored = StoredSession.open(path)
        for widget, pane in zip(app.grid.panes(), live.panes):
            body = widget.query_one(".pane-body").content.plain
            for mark in (PART_MARK, FORK_MARK, EDIT_MARK):  # marks annotate, they are not text
                body = body.replace(mark, "")
            assert body.endswith(shown(stored.pane_text(pane.id)))
            if pane.origin is not None:  # a fork shows its fork point inside its text
                assert FORK_MARK in widget.query_one(".pane-body").content.plain
        assert "replay" in app.screen.query_one("#top-bar").content.plain  # what this is
        await pilot.press("left", "left", "left")
        assert app.cursor == STEPS - 3
        first = app.grid.panes()[0].query_one(".pane-body").content.plain
        assert first.endswith(shown("".join(r.text for r in live.panes[0].records[:STEPS - 3])))
        await pilot.press("home")
        assert app.cursor == 0
        await pilot.press("end")
        assert app.cursor == STEPS


async def test_model_keys_are_dimmed_and_say_why(recorded):
    path, live = recorded
    app = make_app(source=replay_source(path))
    async with app.run_test(size=(100, 30)) as pilot:
        await wait_until(pilot, lambda: app.grid.panes())
        enabled = {desc: on for _key, desc, on in key_items(app.screen)}
        for desc in ("run/pause", "step", "fork", "edit", "add", "rewind", "draws", "seed"):
            assert enabled[desc] is False, desc
        assert enabled["inspect"] and enabled["cursor"] and enabled["quit"]
        told = len(notes(app))
        await pilot.press("n", "space", "f", "e", "S", "r", "d", "a")
        await pilot.pause()
        assert app.screen is app.grid.screen  # no dialog opened
        assert app.view == live and app.stepper is None
        said = notes(app)[told:]
        assert len(said) == 8 and all(REASON in m and f"logitfork rerun {path}" in m
                                      for m in said)


async def test_inspect_shows_the_stored_top_20(recorded):
    path, live = recorded
    pane = live.panes[3]  # min_p=0.1 at a high temperature: a few kept, the rest cut
    step = 6
    app = make_app(source=replay_source(path))
    async with app.run_test(size=(120, 40)) as pilot:
        await wait_until(pilot, lambda: app.grid.panes())
        app.open_inspect(pane.id, step)
        await wait_until(pilot, lambda: isinstance(app.screen, InspectScreen)
                         and app.screen.analysed, what="the inspect view")
        screen = app.screen
        top = StoredSession.open(path).top_at(pane.id, step)
        assert len(top) == 20 and top == pane.records[step].top
        table = screen.query_one("#top-table", DataTable)
        total = 0.0
        for i, tok in enumerate(top):
            cells = [c.plain for c in table.get_row_at(i)]
            total += tok.raw_prob  # hand sum of the raw column
            assert cells[1] == shown_token(tok.text)
            assert cells[2] == format_prob(tok.raw_prob) and cells[3] == format_prob(tok.final_prob)
            assert cells[4] == format_prob(total)
            assert cells[5] == ("kept" if tok.final_prob > 0 else "cut")
            assert cells[6] == ("" if tok.final_prob > 0 else "-")  # the stage needs the model
        assert any(t.final_prob == 0 for t in top) and any(t.final_prob > 0 for t in top)
        assert "needs the model" in screen.query_one("#inspect-note").content.plain
        assert "approximate" in screen.query_one("#recipes-label").content.plain
        own = next(r for r in screen.recipes if r.own)
        assert own.pane_id == pane.id and own.kept == pane.records[step].kept
        assert all(r.approx for r in screen.recipes if not r.own)
        told = len(notes(app))
        await pilot.press("enter")  # force: off, says why
        await pilot.pause()
        assert isinstance(app.screen, InspectScreen)
        assert REASON in notes(app)[told]
        enabled = {desc: on for _key, desc, on in key_items(app.screen)}
        assert enabled["force this token"] is False and enabled["back"]


def test_the_replay_command_refuses_a_bad_file_in_one_line(tmp_path, capsys):
    bad = tmp_path / "bad.jsonl"
    bad.write_text('{"kind": "step"}\n')
    assert cli_main(["replay", str(bad)]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"error: {bad}:1: ") and err.count("\n") == 1


async def test_a_cut_last_line_is_left_out_and_told_in_the_app(recorded, tmp_path):
    path, live = recorded
    data = path.read_bytes()
    cut = tmp_path / "cut.jsonl"
    cut.write_bytes(data[:-40])  # the writer killed mid-line: no newline, not JSON
    warned: list[str] = []
    app = make_app(source=replay_source(cut, warn=warned.append))
    async with app.run_test(size=(100, 30)) as pilot:
        await wait_until(pilot, lambda: app.grid.panes())
        assert len(warned) == 1 and "cut short" in warned[0]
        assert warned[0] in notes(app)
        last = live.panes[-1]  # the last line of the file is the last pane's last step
        kept = next(p for p in app.view.panes if p.id == last.id)
        assert kept.records == last.records[:-1]


def test_a_recovery_log_replays_too(recorded, tmp_path):
    from tui.transcripts.recovery_log import RecoveryLog

    path, live = recorded
    stored = StoredSession.open(path)
    log_path = tmp_path / "left.jsonl"
    with RecoveryLog(log_path, fsync=False) as log:  # the log a crashed app would leave
        info = _info_of(stored)
        log.begin(live, info, stored.header.prompt_ids)
    source = replay_source(log_path)
    assert source.view == live and source.label == "recovered"
    assert "logitfork recover left.jsonl --out" in source.unavailable("step")


def _info_of(stored: StoredSession):
    """A `SessionInfo` with the stored header's facts (for writing a log header)."""
    from dataclasses import replace

    from tui.session.opening import SessionInfo

    head = stored.header
    sc = replace(scenario(), title=head.title, prompt=head.prompt_text, seed=head.seed)
    return SessionInfo(sc, head.model_name, head.model_source, head.dtype)


NO_TORCH = r"""
import asyncio, json, sys
from tui.app.app import make_app
from tui.app.inspect_screen import InspectScreen
from tui.workbench.replay_source import replay_source

async def main():
    app = make_app(source=replay_source(sys.argv[1]))
    async with app.run_test(size=(100, 30)) as pilot:
        while not app.grid.panes():
            await pilot.pause(0.02)
        await pilot.press("left", "tab", "enter", "n")
        while not (isinstance(app.screen, InspectScreen) and app.screen.analysed):
            await pilot.pause(0.02)
        rows = len(app.screen.rows)
    heavy = sorted(m for m in ("torch", "transformers", "tui.session.engine", "tui.model.catalogue")
                   if m in sys.modules)
    print(json.dumps({"rows": rows, "heavy": heavy}))

asyncio.run(main())
"""


def test_replay_imports_no_torch(recorded):
    path, _ = recorded
    out = subprocess.run([sys.executable, "-c", NO_TORCH, str(path)], capture_output=True,
                         text=True, check=True, cwd=Path(__file__).resolve().parents[1])
    result = json.loads(out.stdout.strip().splitlines()[-1])
    assert result["rows"] >= 20  # the inspect view opened on the stored top-20
    assert result["heavy"] == []
