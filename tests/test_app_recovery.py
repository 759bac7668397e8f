"""Crash recovery in the app: the live session's log, and the offer to reopen a leftover one.

Driven with Textual's test harness on the tiny model, with the state folder in a temp
folder (`LOGITFORK_STATE_DIR`). What the log holds is read back with
`tui.transcripts.recovery_reader.read_recovery` and compared with the engine's own snapshots, i.e.
from outside the app. The rules checked (keep the log unless the session ended
cleanly with nothing unsaved; offer the newest log of a session no longer running)
are the project's own contract; no outside source applies.
"""

from __future__ import annotations

import json
import os
import threading
import time

import pytest
from textual.widgets import Input

from tui.app.app import make_app
from tui.app.confirm_dialog import ConfirmDialog
from tui.app.input_dialog import InputDialog
from tui.transcripts.recovery_log import RecoveryLog, recovery_dir
from tui.settings import STATE_DIR_ENV
from tui.transcripts.recovery_reader import read_recovery
from tui.workbench.stepper import Failed, Stepped, Stepper

try:
    from app_session import idle, live_source, scanned, steps, wait_until
except ImportError:
    from tests.app_session import idle, live_source, scanned, steps, wait_until


@pytest.fixture(scope="module")
def lm(tiny_model_dir):
    from tui.model.catalogue import load_model

    return load_model(str(tiny_model_dir))


@pytest.fixture
def state(tmp_path, monkeypatch):
    monkeypatch.setenv(STATE_DIR_ENV, str(tmp_path / "state"))
    return recovery_dir()


def ids(records) -> list[int]:
    return [r.token_id for r in records]


def logs(folder) -> list:
    return sorted(folder.glob("*.jsonl")) if folder.is_dir() else []


def leave_log(lm, n_steps: int) -> tuple:
    """A log as a crashed session leaves it: n steps, never closed cleanly."""
    source = live_source(lm, seed=8)
    engine = source.live_engine
    log = RecoveryLog(None, fsync=False)
    source.begin_log(log)
    for _ in range(n_steps):
        engine.step()
        log.sync(engine.view())
    log.close(delete=False)
    return log.path, engine.view()


async def test_a_live_session_writes_its_log_and_a_clean_quit_after_saving_deletes_it(
        lm, state, tmp_path):
    app = make_app(source=live_source(lm), recovery=True, save_folder=tmp_path)
    async with app.run_test(size=(100, 30)) as pilot:
        await wait_until(pilot, lambda: app.stepper is not None and len(logs(state)) == 1,
                         what="the recovery log")
        path = app.recovery.path
        await steps(pilot, app, 5)
        # flushed every 4 steps: at least 4 of the 5 are on disk while the session runs
        rec = read_recovery(path)
        assert rec.steps >= 4
        for pane in app.view.panes:
            assert ids(rec.records[pane.id]) == ids(pane.records[:rec.steps])
        # an operation is written at once
        await pilot.press("f")
        await pilot.press("enter")
        await wait_until(pilot, lambda: len(app.view.panes) == 5 and idle(app), what="fork")
        rec = read_recovery(path)
        assert len(rec.header.panes) == 5 and rec.steps == 5
        assert {p.id: ids(p.records) for p in app.view.panes} == \
            {pid: ids(r) for pid, r in rec.records.items()}
        # save, then a clean quit removes the log
        await pilot.press("w")
        assert isinstance(app.screen, InputDialog)
        target = tmp_path / "saved.jsonl"
        app.screen.query_one("#dialog-value", Input).value = str(target)
        await pilot.press("enter")
        await wait_until(pilot, lambda: target.exists() and not app.unsaved, what="the save")
        assert path.exists()
        await pilot.press("q")
        await wait_until(pilot, lambda: not app.is_running, what="exit")
    assert not path.exists()


async def test_quitting_without_saving_deletes_the_log_and_nothing_is_offered_next(lm, state):
    app = make_app(source=live_source(lm), recovery=True)
    async with app.run_test(size=(100, 30)) as pilot:
        await wait_until(pilot, lambda: app.stepper is not None)
        await steps(pilot, app, 3)
        path = app.recovery.path
        assert path.exists()
        await pilot.press("q")
        assert isinstance(app.screen, ConfirmDialog)
        await pilot.press("d")  # quit without saving: the user threw the session away
        await wait_until(pilot, lambda: not app.is_running, what="exit")
    assert not path.exists() and logs(state) == []
    again = make_app(source=live_source(lm), recovery=True)
    async with again.run_test(size=(100, 30)) as pilot:
        await scanned(pilot, again)
        assert not isinstance(again.screen, ConfirmDialog)  # no offer of the thrown-away log


async def test_an_unclean_end_keeps_every_step(lm, state):
    app = make_app(source=live_source(lm), recovery=True)
    async with app.run_test(size=(100, 30)) as pilot:
        await wait_until(pilot, lambda: app.stepper is not None)
        await steps(pilot, app, 3)
        view = app.view
        path = app.recovery.path
        app.exit(return_code=1)  # an error exit: the log is what is left of the session
        await wait_until(pilot, lambda: not app.is_running, what="exit")
    rec = read_recovery(path)  # closing flushed the step the periodic flush had not
    assert {p.id: ids(p.records) for p in view.panes} == \
        {pid: ids(r) for pid, r in rec.records.items()}


async def test_a_leftover_log_is_offered_and_reopens_read_only(lm, state):
    left, crashed = leave_log(lm, 6)
    app = make_app(source=live_source(lm), recovery=True)
    async with app.run_test(size=(100, 30)) as pilot:
        await wait_until(pilot, lambda: isinstance(app.screen, ConfirmDialog), what="the offer")
        question = app.screen.question
        assert left.name in question and "6 steps in 4 panes" in question
        await pilot.press("r")
        await wait_until(pilot, lambda: app.source is not None and app.source.engine is None
                         and app.view is not None and len(app.grid.panes()) == 4,
                         what="the replay")
        assert app.stepper is None
        assert {p.id: ids(p.records) for p in app.view.panes} == \
            {p.id: ids(p.records) for p in crashed.panes}
        told = len(app._notifications)
        await pilot.press("n")
        await pilot.pause()
        assert app.view.step == 6
        assert "no model loaded" in [n.message for n in app._notifications][told]
    assert left.exists()  # reopening keeps the log: `logitfork recover` can still save it
    assert logs(state) == [left]  # the replaced live session had nothing to keep


async def test_reopening_while_the_model_loads_ends_as_the_replay(lm, state, tiny_model_dir):
    left, crashed = leave_log(lm, 3)
    app = make_app(None, model=str(tiny_model_dir), recovery=True)
    async with app.run_test(size=(100, 30)) as pilot:
        await wait_until(pilot, lambda: isinstance(app.screen, ConfirmDialog), what="the offer")
        await pilot.press("r")
        await wait_until(pilot, lambda: not any(w.group in ("load", "recovery")
                                                and not w.is_finished for w in app.workers)
                         and app.source is not None and app.source.engine is None,
                         what="the load and the replay")
        await pilot.pause(0.1)
        assert app.source.engine is None and app.stepper is None  # a late model is ignored
        assert {p.id: ids(p.records) for p in app.view.panes} == \
            {p.id: ids(p.records) for p in crashed.panes}
    assert logs(state) == [left]


@pytest.mark.parametrize("answer,kept", [("d", False), ("k", True)])
async def test_the_offer_can_discard_or_keep(lm, state, answer, kept):
    left, _ = leave_log(lm, 2)
    app = make_app(source=live_source(lm), recovery=True)
    async with app.run_test(size=(100, 30)) as pilot:
        await wait_until(pilot, lambda: isinstance(app.screen, ConfirmDialog), what="the offer")
        await pilot.press(answer)
        await wait_until(pilot, lambda: app.screen is app.grid.screen)
        assert app.stepper is not None  # the live session goes on
        await steps(pilot, app, 1)
    assert left.exists() is kept


async def test_a_log_of_a_running_session_is_not_offered(lm, state):
    left, _ = leave_log(lm, 2)
    lines = left.read_text().splitlines()
    head = json.loads(lines[0])
    head["recovery"]["pid"] = os.getppid()  # a process that is still running
    left.write_text("\n".join([json.dumps(head), *lines[1:]]) + "\n")
    app = make_app(source=live_source(lm), recovery=True)
    async with app.run_test(size=(100, 30)) as pilot:
        await scanned(pilot, app)
        assert not isinstance(app.screen, ConfirmDialog)  # nothing offered


def test_the_stepper_hands_every_snapshot_to_on_view_and_survives_its_failure(lm):
    engine = live_source(lm).live_engine
    events: list = []
    seen: list = []

    def on_view(view) -> None:
        seen.append(view)
        if len(seen) == 2:
            raise OSError("disk full")

    stepper = Stepper(engine, events.append, on_view)
    thread = threading.Thread(target=stepper.serve, daemon=True)
    thread.start()
    try:
        for _ in range(3):
            stepper.step_once()
        end = time.monotonic() + 20
        while sum(isinstance(e, Stepped) for e in events) < 3:
            assert time.monotonic() < end, "timed out"
            time.sleep(0.01)
    finally:
        stepper.close()
        thread.join(5)
    stepped = [e.view for e in events if isinstance(e, Stepped)]
    assert seen == stepped[:2]  # dropped after it raised; the steps went on
    failed = [e for e in events if isinstance(e, Failed)]
    assert len(failed) == 1 and failed[0].label == "recovery log"
