"""Editing and reading the experiment in the app: title and note, copying a pane's text.

Driven with Textual's test harness on the tiny model. Expected texts come from the
scenario file (read with `load_scenario`) and from the engine's snapshots, i.e. from
outside the app. The clipboard check reads `App.clipboard`, Textual's own record of
what `copy_to_clipboard` sent (the OSC 52 escape of the xterm control sequences).
"""

from __future__ import annotations

import io

import pytest
from textual.widgets import Static

from tui.app.confirm_dialog import ConfirmDialog

try:
    from app_session import live_app, opened, scenario, steps, wait_until
except ImportError:
    from tests.app_session import live_app, opened, scenario, steps, wait_until


def as_text(widget: Static, width: int = 100) -> str:
    """What a Static holding a Rich renderable prints, as plain text."""
    from rich.console import Console

    console = Console(width=width, record=True, file=io.StringIO())
    console.print(widget.content)
    return console.export_text()


@pytest.fixture(scope="module")
def lm(tiny_model_dir):
    from tui.model.catalogue import load_model

    return load_model(str(tiny_model_dir))


async def test_the_title_and_note_show_under_the_top_bar(lm):
    sc = scenario("tea-shop")
    app = live_app(lm, sc)
    async with app.run_test(size=(160, 30)) as pilot:
        await wait_until(pilot, lambda: app.stepper is not None)
        line = app.screen.query_one("#scenario-line", Static).content.plain
        assert sc.title in line and sc.note in line and sc.note


async def test_copy_a_pane_to_the_clipboard_or_to_a_file(lm, tmp_path):
    app = live_app(lm, save_folder=tmp_path)
    async with app.run_test(size=(100, 30)) as pilot:
        await opened(pilot, app, 4)
        await pilot.press("left")  # the text up to the cursor: 3 tokens
        want = "".join(r.text for r in app.view.panes[0].records[:3])
        await pilot.press("c")
        assert isinstance(app.screen, ConfirmDialog)
        await pilot.press("c")
        assert app.clipboard == want
        await pilot.press("c", "f")
        await wait_until(pilot, lambda: list(tmp_path.glob("*.txt")), what="the file")
        (path,) = tmp_path.glob("*.txt")
        assert path.read_text(encoding="utf-8") == want
        assert path.name.startswith("harbour-town-greedy-seed3-")


async def test_the_recipe_dialog_teaches_the_language(lm):
    from textual.widgets import Input

    from tui.app.help_screen import HelpScreen
    from tui.app.recipe_dialog import RecipeDialog
    from tui.decoding import STAGES

    sc = scenario()
    app = live_app(lm, sc)
    async with app.run_test(size=(120, 40)) as pilot:
        await wait_until(pilot, lambda: app.stepper is not None)
        await pilot.press("e")
        dialog = app.screen
        assert isinstance(dialog, RecipeDialog)
        shown = as_text(dialog.query_one("#stage-list Static", Static))
        for spec in STAGES.values():  # every stage the parser takes, with its range
            assert spec.example in shown and spec.accepts in shown
        field = dialog.query_one("#dialog-value", Input)
        field.value = ""
        await pilot.press(*"temperature=0.8 mi")
        await wait_until(pilot, lambda: field._suggestion != "", what="a suggestion")
        assert field._suggestion == "temperature=0.8 min_p="
        await pilot.press("right")  # takes the completion
        assert field.value == "temperature=0.8 min_p="
        await pilot.press(*"1.5", "enter")  # outside [0, 1]: explained in place
        assert app.screen is dialog
        assert "min_p" in dialog.error and "[0, 1]" in dialog.error
        assert STAGES["min_p"].meaning in dialog.error
        await pilot.press("escape", "question_mark")
        assert isinstance(app.screen, HelpScreen)
        listed = as_text(app.screen.query_one("#help-stages", Static), width=200)
        assert all(spec.meaning in listed and spec.accepts in listed for spec in STAGES.values())
        assert app.screen.query_one("#help-title", Static).content.plain == sc.title
        assert app.screen.query_one("#help-note", Static).content.plain == sc.note


async def test_edit_the_prompt_restarts_the_session_and_the_transcript_says_so(lm, tmp_path):
    from textual.widgets import Input, TextArea

    from tui.app.scenario_dialog import ScenarioDialog
    from tui.session.opening import open_session
    from tui.session.scenario import load_scenario
    from tui.transcripts.reader import StoredSession

    sc = scenario()
    app = live_app(lm, sc, save_folder=tmp_path)
    async with app.run_test(size=(100, 30)) as pilot:
        await opened(pilot, app, 3)
        await pilot.press("p")
        dialog = app.screen
        assert isinstance(dialog, ScenarioDialog)
        assert dialog.query_one("#prompt-text", TextArea).text == sc.prompt
        dialog.query_one("#prompt-text", TextArea).text = "@user\nName a colour.\n"
        dialog.query_one("#max-new-tokens", Input).value = "0"
        await pilot.press("ctrl+r")  # a bad field: told in place, nothing changes
        assert app.screen is dialog and "max new tokens" in dialog.error
        dialog.query_one("#max-new-tokens", Input).value = "5"
        dialog.query_one("#stop-strings", Input).value = '["\\n\\n", "."]'
        await pilot.press("ctrl+r")
        await wait_until(pilot, lambda: app.view.step == 0 and idle_after_edit(app),
                         what="the restart")
        engine = app.stepper.engine
        want_ids = lm.encode_prompt(None, [{"role": "user", "content": "Name a colour."}])
        assert engine.prompt_ids == tuple(want_ids) and engine.max_new_tokens == 5
        assert engine.stop_strings == ("\n\n", ".")
        assert [p.recipe for p in app.view.panes] == [p.recipe for p in sc.panes]
        assert app.view.seed == 3
        await steps(pilot, app, 2)
        # the same as a session opened on the edited scenario from the start
        edited = app.source.info.scenario
        fresh, _ = open_session(lm, edited, seed=3)
        fresh.step(), fresh.step()
        assert [[r.token_id for r in p.records] for p in app.view.panes] == \
            [[r.token_id for r in p.records] for p in fresh.view().panes]
        # the transcript records the edit: the setup before it and the steps it had
        path = tmp_path / "t.jsonl"
        path.write_text("\n".join(app.source.transcript_lines(app.view)) + "\n")
        head = StoredSession.open(path).header
        assert head.messages == (("user", "Name a colour."),) and head.prompt_text is None
        (before,) = head.prompt_edits
        assert (before.steps, before.prompt, before.max_new_tokens, before.stop) == \
            (3, sc.prompt, sc.max_new_tokens, sc.stop)
        # save the edited scenario: it reads back as what the session runs
        await pilot.press("p")
        target = tmp_path / "mine.toml"
        app.screen.query_one("#save-path", Input).value = str(target)
        await pilot.press("ctrl+s")
        await wait_until(pilot, lambda: target.exists(), what="the scenario file")
        saved = load_scenario(target)
        assert saved == edited.__class__(**{**edited.__dict__, "seed": 3})


def idle_after_edit(app) -> bool:
    return app.stepper.idle and not app.busy
