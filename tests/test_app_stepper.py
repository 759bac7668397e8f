"""The worker loop on its own, with a stand-in engine: order, pausing, failures.

Hand-made cases (no outside source applies: this is the app's own contract). The
loop must run queued operations before the next step and in order, stop within one
step of a pause, stop at `until` and when every pane has stopped, and turn a failing
step into a report with the engine rewound to the step before it.
"""

from __future__ import annotations

import threading
import time

import pytest

from tui.session.views import EngineError, PaneView, SessionView
from tui.workbench.operations import Call
from tui.workbench.stepper import (Failed, StepFailed, OperationDone, RunChanged, Stepped, Stepper,
                                   describe)


class FakeEngine:
    """Counts steps; stops at `limit`; can fail at one step or block inside steps."""

    def __init__(self, limit: int = 50, fail_at: int | None = None) -> None:
        self.n = 0
        self.limit = limit
        self.fail_at = fail_at
        self.rewinds: list[int] = []
        self.gate = threading.Event()
        self.gate.set()
        self.inside = threading.Event()

    @property
    def step_index(self) -> int:
        return self.n

    def step(self) -> None:
        self.inside.set()
        self.gate.wait(5)
        self.inside.clear()
        if self.n == self.fail_at:
            raise MemoryError()
        self.n += 1

    def rewind(self, step: int) -> None:
        self.rewinds.append(step)
        self.n = step

    def view(self) -> SessionView:
        stop = "length" if self.n >= self.limit else None
        return SessionView(self.n, 0, True, (PaneView(0, "p", "greedy", None, (), stop),))


class Harness:
    def __init__(self, engine: FakeEngine) -> None:
        self.engine = engine
        self.events: list[object] = []
        self.stepper = Stepper(engine, self.events.append)  # type: ignore[arg-type]
        self.thread = threading.Thread(target=self.stepper.serve, daemon=True)
        self.thread.start()

    def wait(self, condition, what: str = "condition") -> None:
        end = time.monotonic() + 5
        while not condition():
            assert time.monotonic() < end, f"timed out waiting for {what}"
            time.sleep(0.002)

    def close(self) -> None:
        self.stepper.close()
        self.thread.join(5)


@pytest.fixture
def harness():
    made: list[Harness] = []

    def make(**kw) -> Harness:
        made.append(Harness(FakeEngine(**kw)))
        return made[-1]

    yield make
    for h in made:
        h.engine.gate.set()
        h.close()


def test_runs_until_every_pane_stops(harness):
    h = harness(limit=6)
    h.stepper.run()
    h.wait(lambda: h.stepper.idle and h.engine.n == 6, "the end")
    steps = [e for e in h.events if isinstance(e, Stepped)]
    assert [e.view.step for e in steps] == [1, 2, 3, 4, 5, 6]
    assert h.events[0] == RunChanged(True)
    assert h.events[-1] == RunChanged(False, "every pane has stopped")


def test_run_until_a_step(harness):
    h = harness()
    h.stepper.run(until=4)
    h.wait(lambda: h.stepper.idle, "stop at 4")
    assert h.engine.n == 4 and h.events[-1] == RunChanged(False, "reached step 4")


def test_pause_takes_effect_after_the_step_under_way(harness):
    h = harness(limit=10**9)
    h.stepper.run()
    h.wait(lambda: h.engine.n >= 2)
    h.engine.gate.clear()
    h.wait(h.engine.inside.is_set, "a step under way")
    under_way = h.engine.n
    h.stepper.pause()
    h.engine.gate.set()
    h.wait(lambda: h.stepper.idle, "idle")
    time.sleep(0.05)
    assert h.engine.n == under_way + 1


def test_operations_run_between_steps_in_order(harness):
    h = harness()
    order: list[str] = []
    h.stepper.submit(Call("a", lambda e: order.append(f"a@{e.n}") or "A"))
    h.stepper.submit(Call("b", lambda e: order.append(f"b@{e.n}") or "B"))
    h.stepper.step_once()
    h.wait(lambda: h.stepper.idle and h.engine.n == 1)
    assert order == ["a@0", "b@0"]
    done = [e for e in h.events if isinstance(e, OperationDone)]
    assert [(e.label, e.result) for e in done] == [("a", "A"), ("b", "B")]
    assert isinstance(h.events[-1], Stepped)


def test_a_failing_operation_is_reported_and_the_loop_goes_on(harness):
    h = harness()

    def bad(engine):
        raise EngineError("a session holds at most 8 panes")

    h.stepper.submit(Call("fork", bad))
    h.stepper.step_once()
    h.wait(lambda: h.stepper.idle and h.engine.n == 1)
    failed = [e for e in h.events if isinstance(e, Failed)]
    assert [(e.label, e.message) for e in failed] == [("fork", "a session holds at most 8 panes")]


def test_a_failing_step_pauses_and_rewinds_to_the_step_before(harness):
    h = harness(fail_at=3)
    h.stepper.run()
    h.wait(lambda: h.stepper.idle and any(isinstance(e, Failed) for e in h.events))
    failed = next(e for e in h.events if isinstance(e, Failed))
    assert isinstance(failed, StepFailed) and failed.message == "out of memory"
    assert h.engine.rewinds == [3] and h.engine.n == 3
    assert RunChanged(False, "a step failed") in h.events
    assert not h.stepper.running


def test_describe_gives_one_line():
    assert describe(ValueError("top_p must be in (0, 1], got 1.5\nmore")) == \
        "top_p must be in (0, 1], got 1.5"
    assert describe(RuntimeError("boom")) == "RuntimeError: boom"
    assert describe(MemoryError()) == "out of memory"
