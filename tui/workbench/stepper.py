"""The engine's one worker: runs steps while running and the app's operations between them.

The app never calls a locking engine method on its own thread, so a key is answered
while a step (or a slow rewind) is under way. Everything that changes the engine goes
through one `Stepper` (readers such as the inspect view take the engine's lock briefly): its `serve` loop runs in a Textual thread worker and does, in
order, any queued operation (fork, edit, force, ...) and then, while running, one step.
Pausing takes effect after the step under way. After each unit of work it hands a
`SessionView` snapshot to `emit` (thread-safe in the app: `post_message`).

If given, `on_view` is called on the worker with each new snapshot, after it was handed
to `emit`: the app's crash-recovery log writes what changed there (a flush fsyncs, so
it must not run on the UI thread). If it raises, it is dropped and the error reported.

A failing step (out of memory, a bad recipe reaching the engine) pauses the session,
rewinds the engine to the step before the failure so that no pane is left half-stepped,
and reports the error. No Textual here: the loop is tested on its own.
"""

from __future__ import annotations

import threading
import time
from collections import deque
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Callable

from tui.errors import UserError
from tui.files import crash_note
from tui.session.views import EngineError, SessionView
from tui.workbench.operations import Operation

if TYPE_CHECKING:
    from tui.session.engine import Engine


@dataclass(frozen=True)
class Stepped:
    """One step was taken; `seconds` is its wall time."""

    view: SessionView
    seconds: float


@dataclass(frozen=True)
class OperationDone:
    """A queued operation finished; `result` is what it returned."""

    operation: Operation
    view: SessionView
    result: Any = None

    @property
    def label(self) -> str:
        return self.operation.label


@dataclass(frozen=True)
class Failed:
    """An operation (or the recovery log) raised; the session is as it was before.

    `operation` is the one that failed (None for the recovery log)."""

    label: str
    message: str
    view: SessionView | None = None
    operation: Operation | None = None


@dataclass(frozen=True)
class StepFailed(Failed):
    """A step raised: the session is paused and rewound to the step before."""


@dataclass(frozen=True)
class RunChanged:
    """The session started or stopped running (`reason` says why it stopped)."""

    running: bool
    reason: str = ""


StepperEvent = Stepped | OperationDone | Failed | RunChanged
STOPPED_ALL = "every pane has stopped"  # the RunChanged reason when the session is done


def describe(exc: BaseException, doing: str | None = None) -> str:
    """One line for an error from the engine or the model.

    Anything but an expected kind (out of memory, the engine's, the user's, a bad value)
    is a bug: with `doing` given, its traceback goes to a crash report that the line names.
    """
    if isinstance(exc, MemoryError):
        return "out of memory"
    text = str(exc).strip().splitlines()
    first = text[0] if text else ""
    if isinstance(exc, (EngineError, UserError, ValueError)) and first:
        return first
    if doing is not None:
        return crash_note(doing, exc)
    return f"{type(exc).__name__}: {first}" if first else type(exc).__name__


class Stepper:
    """Serialises all engine work on one thread. See the module docstring."""

    def __init__(self, engine: "Engine", emit: Callable[[StepperEvent], None],
                 on_view: Callable[[SessionView], None] | None = None) -> None:
        self.engine = engine
        self._emit = emit
        self._on_view = on_view
        self._wake = threading.Condition()
        self._ops: deque[Operation] = deque()
        self._running = False
        self._until: int | None = None  # stop running once the session reaches this step
        self._single = 0  # single steps asked for while paused
        self._closed = False
        self.busy = False  # True while a step or an operation is under way

    # ----- asked for by the app (any thread) ---------------------------------------------

    @property
    def running(self) -> bool:
        return self._running

    @property
    def idle(self) -> bool:
        """Nothing queued, nothing under way, not running."""
        with self._wake:
            return not (self._running or self.busy or self._ops or self._single)

    def run(self, until: int | None = None) -> None:
        """Step until paused, until every pane stops, or until step `until`."""
        with self._wake:
            changed = not self._running
            self._running, self._until = True, until
            self._wake.notify_all()
        if changed:
            self._emit(RunChanged(True))

    def pause(self, reason: str = "paused") -> None:
        """Stop after the step under way (if any)."""
        with self._wake:
            changed = self._running
            self._running, self._until, self._single = False, None, 0
        if changed:
            self._emit(RunChanged(False, reason))

    def step_once(self) -> None:
        """One step, when paused."""
        with self._wake:
            if not self._running:
                self._single += 1
                self._wake.notify_all()

    def submit(self, operation: Operation) -> None:
        """Run `operation(engine)` on the worker thread before the next step."""
        with self._wake:
            self._ops.append(operation)
            self._wake.notify_all()

    def close(self) -> None:
        with self._wake:
            self._closed = True
            self._running = False
            self._wake.notify_all()

    # ----- the worker's loop ------------------------------------------------------------

    def serve(self, cancelled: Callable[[], bool] = lambda: False) -> None:
        """The worker body: returns when closed or cancelled."""
        while True:
            with self._wake:
                while not (self._closed or self._ops or self._running or self._single):
                    self._wake.wait(timeout=0.25)
                    if cancelled():
                        return
                if self._closed or cancelled():
                    return
                op = self._ops.popleft() if self._ops else None
                single = False
                if op is None and not self._running:
                    self._single -= 1
                    single = True
                self.busy = True
            try:
                if op is not None:
                    self._do_operation(op)
                else:
                    self._do_step(single)
            finally:
                self.busy = False

    def _do_operation(self, operation: Operation) -> None:
        try:
            result = operation(self.engine)
        except Exception as exc:  # noqa: BLE001 - shown to the user, session kept
            view = self._safe_view()
            self._emit(Failed(operation.label, describe(exc, f"{operation.label} in the app"), view, operation))
            self._follow(view)
            return
        view = self.engine.view()
        self._emit(OperationDone(operation, view, result))
        self._follow(view)

    def _do_step(self, single: bool) -> None:
        engine = self.engine
        before = engine.step_index
        if engine.view().finished:
            self.pause(STOPPED_ALL)
            return
        started = time.perf_counter()
        try:
            engine.step()
        except Exception as exc:  # noqa: BLE001 - shown to the user, session kept
            self.pause("a step failed")
            self._recover(before)
            view = self._safe_view()
            self._emit(StepFailed("step", describe(exc, "a step in the app"), view))
            self._follow(view)
            return
        view = engine.view()
        self._emit(Stepped(view, time.perf_counter() - started))
        self._follow(view)
        if not single and self._running:
            if view.finished:
                self.pause(STOPPED_ALL)
            elif self._until is not None and view.step >= self._until:
                self.pause(f"reached step {self._until}")

    def _follow(self, view: SessionView | None) -> None:
        """Hand a new snapshot to `on_view` (the recovery log); drop it if it fails."""
        if self._on_view is None or view is None:
            return
        try:
            self._on_view(view)
        except Exception as exc:  # noqa: BLE001 - the session goes on without it
            self._on_view = None
            self._emit(Failed("recovery log", describe(exc)))

    def _recover(self, step: int) -> None:
        """Bring every pane back to `step` after a failed step (best effort)."""
        try:
            self.engine.rewind(step)  # drops records of panes stepped before the failure
        except Exception:  # noqa: BLE001 - the error already reported is the one that matters
            pass

    def _safe_view(self) -> SessionView | None:
        try:
            return self.engine.view()
        except Exception:  # noqa: BLE001
            return None
