"""The app's controls, driven with Textual's own test harness on the tiny model.

Start, step, pause, the cursor, inspect, fork, edit (valid and invalid), add and remove
a pane, save, quit. Expected values come from the engine's own snapshots and from the
transcript reader (`tui.transcripts.reader.StoredSession`), i.e. from outside the app; the
inspect table's cumulative mass is checked against a hand sum of the raw probabilities.
"""

from __future__ import annotations

import pytest
from textual.widgets import DataTable, Input

from tui.app.confirm_dialog import ConfirmDialog
from tui.app.input_dialog import InputDialog
from tui.app.inspect_screen import InspectScreen
from tui.app.recipe_dialog import RecipeDialog
from tui.app.safe_text import shown
from tui.app.token_pane import TokenPane
from tui.token_style import EDIT_MARK, FORK_MARK, PART_MARK
from tui.transcripts.reader import StoredSession

try:
    from app_session import idle, live_app, opened, steps, wait_until
except ImportError:
    from tests.app_session import idle, live_app, opened, steps, wait_until


@pytest.fixture(scope="module")
def lm(tiny_model_dir):
    from tui.model.catalogue import load_model

    return load_model(str(tiny_model_dir))


def pane_plain(app, index: int) -> str:
    """The generated part of a pane's body as plain text (the prompt tail cut off)."""
    widget = app.grid.panes()[index]
    body = widget.query_one(".pane-body").content.plain
    return body


async def test_start_step_pause_and_cursor(lm):
    app = live_app(lm)
    async with app.run_test(size=(100, 30)) as pilot:
        await wait_until(pilot, lambda: app.view is not None and app.stepper is not None)
        assert len(app.grid.panes()) == 4  # the default scenario's panes
        await steps(pilot, app, 5)
        view = app.view
        assert view.step == 5 and all(len(p.records) == 5 for p in view.panes)
        # run, then pause (that it takes effect within one step: test_app_keys.py)
        await pilot.press("space")
        await wait_until(pilot, lambda: app.view.step >= 7, what="running")
        await pilot.press("space")
        await wait_until(pilot, lambda: idle(app), what="paused")
        assert not app.stepper.running
        # the cursor: back two steps, the panes show the text up to it
        end = app.view.step
        await pilot.press("left", "left")
        assert app.cursor == end - 2 and not app.follow
        first = app.view.panes[0]
        text = "".join(r.text for r in first.records[: end - 2])
        body = pane_plain(app, 0)
        assert body.endswith(shown(text))
        assert app.grid.panes()[0].query_one(".pane-status").content.plain.startswith(
            f"step {end - 3}/{end - 1}")  # the last step shown, of the last; from 0
        await pilot.press("home")
        assert app.cursor == 0
        await pilot.press("end")
        assert app.cursor == end and app.follow


async def test_inspect_at_the_cursor(lm):
    app = live_app(lm)
    async with app.run_test(size=(100, 30)) as pilot:
        await opened(pilot, app, 4)
        await pilot.press("left")  # cursor 3: the last token shown is step index 2
        await pilot.press("enter")
        await wait_until(pilot, lambda: isinstance(app.screen, InspectScreen))
        screen = app.screen
        await wait_until(pilot, lambda: screen.analysed, what="the analysis worker")
        assert screen.step == 2 and screen.pane.id == app.view.panes[0].id
        record = app.view.panes[0].records[2]
        table = screen.query_one("#top-table", DataTable)
        assert table.row_count == len(screen.rows) >= 20
        # cumulative raw mass: a running sum of the raw column (hand check)
        total = 0.0
        for row, top in zip(screen.rows, record.top):
            total += top.raw_prob
            assert row.cum_raw == pytest.approx(total)
        # the first pane is greedy: only rank 1 is kept, greedy cut all the rest
        assert [r.kept for r in screen.rows[:20]] == [True] + [False] * 19
        assert all(r.cut_by == "greedy" for r in screen.rows[1:20])
        recipes = {r.name: r for r in screen.recipes}
        assert recipes["greedy"].kept == 1 and recipes["greedy"].own
        assert recipes["hot, wide top-k"].kept == min(400, 300)  # tiny vocabulary: 300
        await pilot.press("escape")
        assert not isinstance(app.screen, InspectScreen)


async def test_fork_edit_add_remove(lm):
    app = live_app(lm)
    async with app.run_test(size=(100, 30)) as pilot:
        await opened(pilot, app, 3)
        # fork the focused (first) pane with a new recipe
        await pilot.press("f")
        assert isinstance(app.screen, RecipeDialog)
        app.screen.query_one("#dialog-value", Input).value = "temperature=0.7 top_k=5"
        await pilot.press("enter")
        await wait_until(pilot, lambda: len(app.view.panes) == 5 and idle(app), what="fork")
        fork = app.view.panes[-1]
        assert fork.recipe == "temperature=0.7 top_k=5" and fork.name == "greedy/1"
        assert [r.token_id for r in fork.records] == \
            [r.token_id for r in app.view.panes[0].records]
        assert fork.origin == (app.view.panes[0].id, 3)
        assert isinstance(app.focused, TokenPane) and app.focused.pane_id == fork.id

        # edit with an invalid recipe: the RecipeError shows and nothing changes
        await pilot.press("e")
        dialog = app.screen
        assert isinstance(dialog, RecipeDialog)
        dialog.query_one("#dialog-value", Input).value = "top_p=1.5"
        await pilot.press("enter")
        assert app.screen is dialog and "top_p" in dialog.error
        assert "1.5" in dialog.error
        await pilot.press("escape")
        assert app.view.panes[-1].recipe == "temperature=0.7 top_k=5"
        assert [p for p in app.view.panes if p.id == fork.id][0].recipe_log[-1][1] == "temperature=0.7 top_k=5"

        # edit with a valid recipe: from the next step on
        await pilot.press("e")
        app.screen.query_one("#dialog-value", Input).value = "top_k=2"
        await pilot.press("enter")
        await wait_until(pilot, lambda: app.view.panes[-1].recipe == "top_k=2" and idle(app))
        assert app.view.panes[-1].recipe_log[-1] == (3, "top_k=2")
        await steps(pilot, app, 1)
        assert app.view.panes[-1].records[-1].kept == 2

        # add a pane: it catches up to the present step
        await pilot.press("a")
        app.screen.query_one("#dialog-value", Input).value = "greedy"
        app.screen.query_one("#dialog-name", Input).value = "late greedy"
        await pilot.press("enter")
        await wait_until(pilot, lambda: len(app.view.panes) == 6 and idle(app), what="add")
        late = app.view.panes[-1]
        assert late.name == "late greedy" and len(late.records) == app.view.step == 4
        # greedy from the same prompt writes what the first greedy pane wrote
        assert [r.token_id for r in late.records] == \
            [r.token_id for r in app.view.panes[0].records]

        # remove it (asks first)
        await pilot.press("x")
        await pilot.press("y")
        await wait_until(pilot, lambda: len(app.view.panes) == 5 and idle(app), what="remove")
        assert all(p.name != "late greedy" for p in app.view.panes)
        assert len(app.grid.panes()) == 5


async def test_save_and_quit(lm, tmp_path):
    app = live_app(lm, save_folder=tmp_path)
    async with app.run_test(size=(100, 30)) as pilot:
        await opened(pilot, app, 5)
        # quitting an unsaved session asks; "c" cancels
        await pilot.press("q")
        assert app.is_running and app.screen.query("Button")
        await pilot.press("c")
        await pilot.press("w")
        dialog = app.screen
        assert isinstance(dialog, InputDialog)
        default = dialog.value()
        assert default.startswith(str(tmp_path)) and default.endswith(".jsonl")
        target = tmp_path / "run.jsonl"
        dialog.query_one("#dialog-value", Input).value = str(target)
        await pilot.press("enter")
        await wait_until(pilot, lambda: target.exists() and not app.unsaved, what="the save")
        stored = StoredSession.open(target)
        head, records = stored.header, list(stored.iter_records())
        assert head.seed == 3 and len(head.panes) == 4
        assert len(records) == 4 * 5
        view = app.view
        by_pane = {p.id: [r.token_id for r in p.records] for p in view.panes}
        for pane_id, ids in by_pane.items():
            assert [r.token_id for r in records if r.pane == pane_id] == ids
        # saved: q quits at once
        await pilot.press("q")
        await wait_until(pilot, lambda: not app.is_running, what="exit")


async def test_click_on_a_token_inspects_it(lm):
    app = live_app(lm)
    async with app.run_test(size=(100, 30)) as pilot:
        await steps(pilot, app, 4)
        body = app.grid.panes()[1].query_one(".pane-body")
        where = step = None
        marks = (PART_MARK, FORK_MARK, EDIT_MARK)
        for y in range(body.size.height):  # the first cell that shows a token (not a prompt,
            x = 0  # not a mark, not just after a zero-width piece: a lone combining mark)
            after_zero = False
            for seg in body.render_line(y):
                step = seg.style.meta.get("step") if seg.style is not None else None
                if step is not None and seg.cell_length and seg.text not in marks \
                        and not after_zero:
                    where = (x, y)
                    break
                after_zero = seg.cell_length == 0 and bool(seg.text)
                x += seg.cell_length
            if where:
                break
        assert where is not None
        await pilot.click(body, offset=where)
        await wait_until(pilot, lambda: isinstance(app.screen, InspectScreen))
        assert app.screen.step == step and app.screen.pane.id == app.view.panes[1].id


async def test_draws_rewind_restart_and_quit_without_saving(lm):
    app = live_app(lm)
    async with app.run_test(size=(100, 30)) as pilot:
        await steps(pilot, app, 6)
        assert app.view.shared_draws
        await pilot.press("d")
        await wait_until(pilot, lambda: not app.view.shared_draws and idle(app))
        # rewind to the cursor: the session keeps what the panes show
        kept = [[r.token_id for r in p.records[:4]] for p in app.view.panes]
        await pilot.press("left", "left", "r")
        # it asks first, saying what goes: 2 steps in each of the 4 panes
        assert isinstance(app.screen, ConfirmDialog)
        assert "Rewind to step 4 (steps 0-3 stay)?" in app.screen.question
        assert "8 tokens from step 4 on in 4 pane(s)" in app.screen.question
        await pilot.press("n")  # keep: nothing changes
        assert not isinstance(app.screen, ConfirmDialog) and app.view.step == 6
        await pilot.press("r", "y")
        await wait_until(pilot, lambda: app.view.step == 4 and idle(app), what="the rewind")
        assert [[r.token_id for r in p.records] for p in app.view.panes] == kept
        assert app.cursor == 4
        # restart with a new seed (the dialog checks the number first)
        await pilot.press("S")
        dialog = app.screen
        assert isinstance(dialog, InputDialog)
        dialog.query_one("#dialog-value", Input).value = "-3"
        await pilot.press("enter")
        assert app.screen is dialog and "whole number" in dialog.error
        dialog.query_one("#dialog-value", Input).value = "42"
        await pilot.press("enter")
        await wait_until(pilot, lambda: app.view.seed == 42 and app.view.step == 0 and idle(app))
        assert app.cursor == 0
        await steps(pilot, app, 1)
        await pilot.press("q")
        assert app.is_running  # unsaved: it asks
        await pilot.press("d")
        await wait_until(pilot, lambda: not app.is_running, what="exit")


async def test_a_failing_step_is_told_and_the_session_kept(lm):
    app = live_app(lm)
    async with app.run_test(size=(100, 30)) as pilot:
        await steps(pilot, app, 3)
        before = [[r.token_id for r in p.records] for p in app.view.panes]
        runner = app.stepper.engine.runner
        real = runner.step

        def failing(kv, tokens):
            runner.step = real  # fail once
            raise MemoryError()

        runner.step = failing
        await pilot.press("space")
        await wait_until(pilot, lambda: idle(app) and app._notifications, what="the report")
        messages = [n.message for n in app._notifications]
        assert any("out of memory" in m and "paused" in m for m in messages)
        assert not app.stepper.running
        assert [[r.token_id for r in p.records] for p in app.view.panes] == before
        await steps(pilot, app, 1)  # and it goes on from there
        assert app.view.step == 4


def test_grid_shapes():
    from tui.app.pane_grid import grid_shape

    # the issue: columns for up to 4 panes, a grid for 5 to 8
    assert [grid_shape(n) for n in range(1, 9)] == [
        (1, 1), (2, 1), (3, 1), (4, 1), (3, 2), (3, 2), (4, 2), (4, 2)]


def test_the_seed_check_takes_only_ascii_digits():
    from tui.app.actions import check_seed

    assert check_seed("0") is None and check_seed("12345") is None
    for bad in ("", "-1", "1.5", "²", "٣"):  # superscript two and Arabic-Indic three pass str.isdigit
        assert check_seed(bad) is not None  # int() of each would fail or give a negative seed


async def test_the_fork_dialog_takes_typed_text_in_both_fields_in_tab_order(lm):
    app = live_app(lm)
    async with app.run_test(size=(100, 30)) as pilot:
        await opened(pilot, app, 2)
        await pilot.press("f")
        dialog = app.screen
        assert isinstance(dialog, RecipeDialog)
        name = dialog.query_one("#dialog-name", Input)
        recipe = dialog.query_one("#dialog-value", Input)
        assert dialog.focused is name  # the first field shown is the first focused
        await pilot.press(*" 2")
        await pilot.press("tab")
        assert dialog.focused is recipe
        await pilot.press("end", *" top_k=3")
        assert name.value == "greedy/1 2" and recipe.value == "greedy top_k=3"
        await pilot.press("enter")
        await wait_until(pilot, lambda: len(app.view.panes) == 5 and idle(app), what="fork")
        fork = app.view.panes[-1]
        assert fork.name == "greedy/1 2" and fork.recipe == "greedy top_k=3"


async def test_fork_at_the_cursor_keeps_the_text_shown_and_catches_up(lm):
    app = live_app(lm)
    async with app.run_test(size=(100, 30)) as pilot:
        await opened(pilot, app, 6)
        source = app.view.panes[1]
        from tui.app.key_bar import key_items

        assert ("tab", "pane", True) in key_items(app.screen)  # the key bar says how
        await pilot.press("tab")  # the second pane
        assert app.focused is app.grid.panes()[1]
        await pilot.press("left", "left")  # cursor at step 4 of 6
        await pilot.press("f")
        dialog = app.screen
        assert isinstance(dialog, RecipeDialog) and "at step 4: the new pane's recipe, from step 4 on" in dialog.title_text
        dialog.query_one("#dialog-value", Input).value = "greedy"
        await pilot.press("enter")
        await wait_until(pilot, lambda: len(app.view.panes) == 5 and idle(app), what="fork")
        fork = app.view.panes[-1]
        assert fork.origin == (source.id, 4) and len(fork.records) == 6
        assert [r.token_id for r in fork.records[:4]] == [r.token_id for r in source.records[:4]]
        assert all(r.rank == 1 for r in fork.records[4:])  # greedy from step 4 on (steps count from 0)
        # the rewind question counts a forced token and a recipe edit after the cursor
        from tui.app.actions import rewind_question
        from dataclasses import replace

        view = app.view
        edited = replace(view.panes[0], recipe_log=((0, "greedy"), (5, "top_k=2")),
                         records=view.panes[0].records[:5] + (
                             replace(view.panes[0].records[5], forced=True),))
        text = rewind_question(replace(view, panes=(edited,) + view.panes[1:]), 3)
        assert "15 tokens from step 3 on in 5 pane(s) and 1 forced token" in text
        assert "1 recipe change made for a later step will apply from step 3 on" in text
