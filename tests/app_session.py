"""Helpers for the app's tests: a live app on the tiny model, and waiting on the worker.

Not a test module. `live_app` opens a session on a shipped scenario with the tiny
random-weight model (see `tiny_model.py`) and builds the app through `make_app`, the
same factory the `watch` command uses. The model name shown is fixed, so that
snapshots do not depend on the temporary folder the model was built in.
"""

from __future__ import annotations

import asyncio
from dataclasses import replace
from typing import Callable

from textual.pilot import Pilot

from tui.app.app import LogitforkApp, make_app
from tui.session.opening import open_session
from tui.session.scenario import Scenario, find_scenario, load_scenario
from tui.workbench.source import LiveSource

TEST_MODEL_NAME = "tiny-llama (test)"


def scenario(name: str = "harbour-town", **changes: object) -> Scenario:
    return replace(load_scenario(find_scenario(name)), **changes)


def live_source(lm, sc: Scenario | None = None, *, seed: int = 3) -> LiveSource:
    engine, info = open_session(lm, sc or scenario(), seed=seed)
    info = replace(info, model_name=TEST_MODEL_NAME)
    return LiveSource(engine, info, lm.decode(list(engine.prompt_ids)), lm)


def live_app(lm, sc: Scenario | None = None, *, seed: int = 3, mono: bool = False,
             save_folder=None, depth: str = "truecolor") -> LogitforkApp:
    """The app on the tiny model; `depth` pinned, so that the terminal running the tests
    does not decide the colours."""
    return make_app(source=live_source(lm, sc, seed=seed), mono=mono, save_folder=save_folder,
                    depth=depth)


async def wait_until(pilot: Pilot, condition: Callable[[], bool], timeout: float = 20.0,
                     what: str = "condition") -> None:
    """Let the app run until `condition()` holds (fails the test after `timeout` s)."""
    loop = asyncio.get_running_loop()
    end = loop.time() + timeout
    while not condition():
        if loop.time() > end:
            raise AssertionError(f"timed out waiting for {what}")
        await pilot.pause(0.02)
    await pilot.pause()


def idle(app: LogitforkApp) -> bool:
    """The worker has nothing queued or under way, and the screen shows the last snapshot."""
    return (app.stepper is not None and app.stepper.idle and not app.busy
            and not app.redraw_due)


async def scanned(pilot: Pilot, app: LogitforkApp) -> None:
    """Wait until the session is open and the scan for leftover recovery logs has ended."""
    await wait_until(pilot, lambda: app.stepper is not None and not any(
        w.group == "recovery" and not w.is_finished for w in app.workers),
        what="the scan for leftover logs")
    await pilot.pause()


async def opened(pilot: Pilot, app: LogitforkApp, n: int = 0) -> None:
    """Wait until the session is open, then run `n` steps."""
    await wait_until(pilot, lambda: app.stepper is not None)
    await steps(pilot, app, n)


async def steps(pilot: Pilot, app: LogitforkApp, n: int) -> None:
    """Press the one-step key n times, waiting for each step to show."""
    for _ in range(n):
        before = app.view.step
        await pilot.press("n")
        await wait_until(pilot, lambda: app.view.step == before + 1 and idle(app),
                         what="one step")


class StepGate:
    """Holds the engine's forward step at a gate: the worker blocks mid-step, lock held.

    `close()` makes the next `runner.step` wait (setting `waiting`) until `open()`.
    """

    def __init__(self, runner) -> None:
        import threading

        self._inner = runner.step
        self._open = threading.Event()
        self._open.set()
        self._waiting = threading.Event()
        runner.step = self._step

    def _step(self, kv, tokens):
        if not self._open.is_set():
            self._waiting.set()
            self._open.wait(timeout=30)
            self._waiting.clear()
        return self._inner(kv, tokens)

    @property
    def waiting(self) -> bool:
        return self._waiting.is_set()

    def close(self) -> None:
        self._open.clear()

    def open(self) -> None:
        self._open.set()


async def run_to(pilot: Pilot, app: LogitforkApp, step: int) -> None:
    """Run the session to `step` at full speed and wait for it to show (for set-ups)."""
    await wait_until(pilot, lambda: app.stepper is not None, what="the session")
    app.stepper.run(until=step)
    await wait_until(pilot, lambda: app.view.step == step and idle(app), what=f"step {step}")
