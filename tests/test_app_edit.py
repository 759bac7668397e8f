"""Editing and reading the experiment in the app: title and note, copying a pane's text.

Driven with Textual's test harness on the tiny model. Expected texts come from the
scenario file (read with `load_scenario`) and from the engine's snapshots, i.e. from
outside the app. The clipboard check reads `App.clipboard`, Textual's own record of
what `copy_to_clipboard` sent (the OSC 52 escape of the xterm control sequences).
"""

from __future__ import annotations

import pytest
from textual.widgets import Static

from tui.app.confirm_dialog import ConfirmDialog

try:
    from app_session import live_app, scenario, steps, wait_until
except ImportError:
    from tests.app_session import live_app, scenario, steps, wait_until


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
        await wait_until(pilot, lambda: app.stepper is not None)
        await steps(pilot, app, 4)
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
