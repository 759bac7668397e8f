"""Forcing a token from the inspect view: the pane goes on from it, the others repeat.

With shared draws every pane reads the same uniform number at a step (common random
numbers), so after the session rewinds to the forced step the other panes, drawing
the same numbers from the same contexts, must write exactly the text they wrote
before (the engine's contract; common practice, no source). The forced token is
marked on screen and in the transcript.
"""

from __future__ import annotations

import json

import pytest
from textual.widgets import DataTable

from tui.app.colouring import FORCED_MARK
from tui.app.confirm_dialog import ConfirmDialog
from tui.app.inspect_screen import InspectScreen

try:
    from app_session import idle, live_app, steps, wait_until
except ImportError:
    from tests.app_session import idle, live_app, steps, wait_until


@pytest.fixture(scope="module")
def lm(tiny_model_dir):
    from tui.model.catalogue import load_model

    return load_model(str(tiny_model_dir))


async def test_forcing_a_token_rewrites_only_that_pane(lm):
    app = live_app(lm)
    async with app.run_test(size=(100, 30)) as pilot:
        await wait_until(pilot, lambda: app.stepper is not None)
        await steps(pilot, app, 8)
        before = {p.id: [r.token_id for r in p.records] for p in app.view.panes}
        await pilot.press("home", "right", "right", "right")  # cursor 3: inspect step 2
        await pilot.press("tab")  # the second pane, "nucleus"
        target = app.focused.pane_id
        assert app.view.panes[1].id == target
        await pilot.press("enter")
        await wait_until(pilot, lambda: isinstance(app.screen, InspectScreen))
        inspect = app.screen
        await wait_until(pilot, lambda: inspect.analysed, what="the analysis")
        assert inspect.step == 2
        # choose the most likely token that was not the one drawn
        index = next(i for i, r in enumerate(inspect.rows) if not r.chosen)
        forced_id = inspect.rows[index].token_id
        table = inspect.query_one("#top-table", DataTable)
        while table.cursor_row != index:
            await pilot.press("down" if table.cursor_row < index else "up")
        await pilot.press("enter")
        assert isinstance(app.screen, ConfirmDialog)
        await pilot.press("y")
        await wait_until(pilot, lambda: not isinstance(app.screen, (InspectScreen,
                                                                   ConfirmDialog)))
        await wait_until(pilot, lambda: idle(app) and app.view.step == 8,
                         what="the session to run back to step 8")

        after = {p.id: [r.token_id for r in p.records] for p in app.view.panes}
        forced_pane = next(p for p in app.view.panes if p.id == target)
        assert forced_pane.records[2].token_id == forced_id
        assert forced_pane.records[2].forced
        assert after[target][:2] == before[target][:2]
        assert not any(r.forced for i, r in enumerate(forced_pane.records) if i != 2)
        for pane_id, ids in before.items():
            if pane_id != target:
                assert after[pane_id] == ids, "the other panes write the same text again"
        # marked on screen ...
        body = app.grid.pane_for(target).query_one(".pane-body").content.plain
        assert body.count(FORCED_MARK) == 1
        # ... and in the transcript
        lines = [json.loads(line) for line in app.source.transcript_lines(app.view)]
        forced = [d for d in lines[1:] if d["forced"]]
        assert [(d["pane"], d["step"], d["token_id"]) for d in forced] == \
            [(target, 2, forced_id)]
