"""Keys answer while the worker steps, and pausing takes effect within one step.

The engine's forward step is held at a gate (`StepGate`), so the worker sits inside a
step with the engine's lock held. Every key must still take effect while that one
step is under way: an app that called a locking engine method on its own thread would
hang here instead. The gate, not the clock, makes the test decisive; how fast a key
answers is a speed figure and is not timed here.
"""

from __future__ import annotations

import asyncio
import time

import pytest
from textual import events

from tui.app.help_screen import HelpScreen

try:
    from app_session import StepGate, idle, live_app, steps, wait_until
except ImportError:
    from tests.app_session import StepGate, idle, live_app, steps, wait_until

@pytest.fixture(scope="module")
def lm(tiny_model_dir):
    from tui.model.catalogue import load_model

    return load_model(str(tiny_model_dir))


async def press_until(app, key: str, effect, char: str | None = None) -> None:
    """Post a key and wait until `effect()` holds (fails after 5 s).

    The key is posted as the terminal driver posts it (Pilot.press would add its own
    waits for the whole screen to settle, which is not what a user waits for).
    """
    started = time.perf_counter()
    app.post_message(events.Key(key, char))
    while not effect():
        if time.perf_counter() - started > 5:
            raise AssertionError(f"key {key!r} had no effect")
        await asyncio.sleep(0.001)


async def test_keys_answer_while_a_step_is_under_way(lm):
    app = live_app(lm)
    async with app.run_test(size=(100, 30)) as pilot:
        await wait_until(pilot, lambda: app.stepper is not None)
        await steps(pilot, app, 3)
        gate = StepGate(app.stepper.engine.runner)
        gate.close()
        try:
            await pilot.press("space")
            await wait_until(pilot, lambda: gate.waiting, what="the worker to block mid-step")
            assert app.stepper.busy and app.stepper.running
            panes = app.grid.panes()
            assert app.focused is panes[0]
            await press_until(app, "left", lambda: app.cursor == 2)
            await press_until(app, "right", lambda: app.cursor == 3)
            await press_until(app, "tab", lambda: app.focused is panes[1], "\t")
            await press_until(app, "tab", lambda: app.focused is panes[2], "\t")
            await press_until(app, "question_mark", lambda: isinstance(app.screen, HelpScreen), "?")
            helped = dict(app.screen.main_keys)  # the help lists every key of the main screen
            assert [app.get_key_display(b) in helped for b in app.BINDINGS] == [True] * len(app.BINDINGS)
            back = next(b for b in app.BINDINGS if b.key == "shift+tab")  # not on the key bar
            assert helped[app.get_key_display(back)] == "focus the previous pane"
            await press_until(app, "escape", lambda: not isinstance(app.screen, HelpScreen))
            await press_until(app, "home", lambda: app.cursor == 0)
            assert gate.waiting, "every key above was answered during one and the same step"

            # Pause while the step is under way: that step finishes, no other starts.
            before = app.view.step
            await pilot.press("space")
            assert not app.stepper.running
        finally:
            gate.open()
        await wait_until(pilot, lambda: idle(app), what="the step under way to end")
        await pilot.pause(0.2)
        assert app.view.step == before + 1
