"""The Textual app: the panes side by side, the top bar, the legend and the keys.

`LogitforkApp` is built on a session source (see `source.py`): a `SessionLoader`
(the model loads in a worker while a progress panel shows), a `LiveSource` on a ready
engine, or a read-only `StaticSource` (a replay, see `replay_source.py`). Every change
to the engine runs on one worker thread through a `Stepper` (the inspect view only reads,
on its own worker); this module only shows snapshots
and turns keys into requests. The key actions live in `actions.py`, the crash-recovery
log and the reopen offer in `recovery_offer.py`; `make_app` is the one factory used by
the `watch` and `replay` commands and by the tests. Importing it loads no torch.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

from rich.text import Text
from textual import events, on, work
from textual.app import App, ComposeResult
from textual.binding import Binding
from textual.filter import Monochrome
from textual.message import Message
from textual.widgets import Static
from textual.worker import get_current_worker

from tui.app.actions import CHANGES, SessionActions
from tui.app.colouring import Scheme, console_depth
from tui.app.key_bar import KeyBar
from tui.app.legend import Legend
from tui.app.loading_panel import LoadingPanel
from tui.app.pane_grid import PaneGrid
from tui.app.recovery_offer import RecoveryActions
from tui.app.safe_text import shown_line
from tui.app.token_pane import TokenPane
from tui.app.top_bar import BarState, TopBar
from tui.progress import ProgressEvent
from tui.session.views import SessionView
from tui.workbench.source import SessionLoader, SessionSource
from tui.workbench.stepper import (STOPPED_ALL, Failed, OperationDone, RunChanged, StepFailed,
                                   Stepped, Stepper, StepperEvent)
from tui.workbench.operations import Operation

if TYPE_CHECKING:
    from tui.token_style import Depth
    from tui.transcripts.recovery_log import RecoveryLog

REDRAW_SECONDS = 1 / 30  # the panes redraw at most this often, however fast steps come
RATE_SMOOTHING = 0.3  # weight of the newest step in the steps-per-second average


class LogitforkApp(SessionActions, RecoveryActions, App[int]):
    """The live side-by-side view of a decoding session."""

    CSS_PATH = ["app.tcss", "dialogs.tcss", "inspect.tcss"]
    TITLE = "logitfork"
    ENABLE_COMMAND_PALETTE = False
    BINDINGS = [
        Binding("space", "run_pause", "run/pause", tooltip="run, or pause after the step "
                "under way"),
        Binding("n", "one_step", "step", tooltip="one step in every pane (when running: "
                "pause after the step under way)"),
        Binding("left", "cursor(-1)", "cursor", key_display="\u2190",
                tooltip="cursor one step back: the panes show the text up to the cursor"),
        Binding("right", "cursor(1)", "cursor", key_display="\u2192",
                tooltip="cursor one step forward"),
        Binding("home", "cursor_to('start')", "jump", tooltip="cursor to the start"),
        Binding("end", "cursor_to('end')", "jump", tooltip="cursor to the end (follows new "
                "steps)"),
        Binding("enter", "inspect", "inspect", key_display="\u23ce", tooltip="inspect the "
                "focused pane at the cursor (or click a token)"),
        # priority: ahead of the screen's own tab (focus_next, hidden from the key bar);
        # in a dialog the action is off, and tab moves between its fields as usual
        Binding("tab", "next_pane", "pane", priority=True,
                tooltip="focus the next pane (the keys act on the focused pane)"),
        Binding("shift+tab", "next_pane(-1)", "previous pane", show=False, priority=True,
                tooltip="focus the previous pane"),
        Binding("f", "fork", "fork", tooltip="fork the focused pane at the cursor into a new "
                "pane, with a recipe you give (it catches up to the present step)"),
        Binding("e", "edit", "edit", tooltip="edit the focused pane's recipe (from the "
                "next step on)"),
        Binding("a", "add_pane", "add", tooltip="add a pane that decodes from the prompt "
                "(it catches up at once)"),
        Binding("x", "remove_pane", "remove", tooltip="remove the focused pane (asks first)"),
        Binding("r", "rewind", "rewind", tooltip="rewind the session to the cursor (asks "
                "first, saying what it throws away)"),
        Binding("d", "toggle_draws", "draws", tooltip="shared draws on or off: the same "
                "uniform number for every pane at a step"),
        Binding("S", "reseed", "seed", tooltip="restart from the prompt with a new seed"),
        Binding("p", "edit_prompt", "prompt", tooltip="edit the prompt (text or chat), the "
                "length limit and the stop strings: the session restarts from the new "
                "prompt; or save the scenario as a TOML file"),
        Binding("w", "save", "save", tooltip="save the transcript (JSON Lines)"),
        Binding("c", "copy_text", "copy", tooltip="copy the focused pane's text up to the "
                "cursor: to the clipboard (where the terminal allows) or to a file"),
        Binding("question_mark", "help", "help", key_display="?", tooltip="this help"),
        Binding("q", "quit_app", "quit", tooltip="quit (asks to save an unsaved session)"),
    ]

    class EngineEvent(Message):
        """A `StepperEvent` from the engine's worker thread."""

        def __init__(self, event: StepperEvent) -> None:
            super().__init__()
            self.event = event

    class LoadProgress(Message):
        """A `ProgressEvent` from the model's loading worker."""

        def __init__(self, event: ProgressEvent) -> None:
            super().__init__()
            self.event = event

    class LoadDone(Message):
        def __init__(self, source: SessionSource | None, error: str = "") -> None:
            super().__init__()
            self.source = source
            self.error = error

    def __init__(self, source: SessionSource | SessionLoader, *, mono: bool = False,
                 save_folder: Path | None = None, recovery: bool = False,
                 depth: Depth | None = None) -> None:
        super().__init__()
        self.keep_recovery = recovery  # keep a crash-recovery log, offer leftover ones
        self.recovery: RecoveryLog | None = None
        self.recovery_told = False  # the log's failure was told
        # the terminal's colour depth, as Rich found it (tests and --mono may pin it)
        no_colour = mono or self.no_color
        self.scheme = Scheme("mono" if no_colour else depth or console_depth(self.console))
        if mono and not self.no_color:
            self._filters.append(Monochrome())  # --mono: no colour anywhere, as NO_COLOR
        self._loader = source if isinstance(source, SessionLoader) else None
        self.source: SessionSource | None = None if self._loader else source
        self.save_folder = save_folder
        self.stepper: Stepper | None = None
        self.view: SessionView | None = None
        self.cursor = 0  # tokens shown in every pane
        self.follow = True  # the cursor moves with new steps
        self.version = 0  # counts changes to the session, for "unsaved"
        self.saved_version = 0
        self.discarded = False  # the user quit without saving: the session is thrown away
        self.busy: list[Operation] = []  # operations queued or under way
        self.steps_per_second: float | None = None
        self.error_message: str | None = None  # set when the model failed to load
        self.redraw_due = False
        self.focus_wanted: int | None = None  # a new pane to focus once it is mounted
        self.grid = PaneGrid(self.scheme, id="panes")

    # ----- building the screen -------------------------------------------------------

    def compose(self) -> ComposeResult:
        yield TopBar(id="top-bar")
        yield Static(Text(), id="scenario-line")
        if self._loader is not None:
            yield LoadingPanel(self._loader.model_name, id="loading")
        yield self.grid
        yield Legend(self.scheme, id="legend")
        yield KeyBar(id="keys")

    def on_mount(self) -> None:
        self.theme = "textual-dark"
        self._plan_recovery()
        if self._loader is not None:
            self.redraw()
            self._load_model(self._loader)
        elif self.source is not None:
            self._start(self.source)

    def _start(self, source: SessionSource) -> None:
        self.source = source
        self.grid.prompt = source.prompt_text
        self.show_scenario(source)
        self.view = source.first_view()
        self.cursor = self.view.step
        if source.engine is not None:
            on_view = self.recovery.sync if self.recovery is not None else None
            self.stepper = Stepper(source.engine, self._emit, on_view)
            self._serve(self.stepper, source)
        for panel in self.grid.screen.query(LoadingPanel):
            panel.remove()
        self.redraw()
        for note in getattr(source, "notes", ()):
            self.notify(note, timeout=8, markup=False)
        self.call_after_refresh(self._focus_first_pane)

    def show_scenario(self, source: SessionSource) -> None:
        """The scenario's title and note, on the line under the top bar."""
        line = Text(shown_line(source.title), style="bold")
        if source.note:
            line.append("  \u2014  " + shown_line(source.note), style="italic")
        self.grid.screen.query_one("#scenario-line", Static).update(line)

    def _focus_first_pane(self) -> None:
        panes = self.grid.panes()
        if panes and not isinstance(self.focused, TokenPane):
            panes[0].focus()

    # ----- workers ------------------------------------------------------------------------

    @work(thread=True, exclusive=True, exit_on_error=False, group="load")
    def _load_model(self, loader: SessionLoader) -> None:
        def progress(event: ProgressEvent) -> None:
            self.post_message(self.LoadProgress(event))

        try:
            source = loader.load(progress)
        except Exception as exc:  # noqa: BLE001 - any failure ends the app with one line
            from tui.workbench.stepper import describe

            self.post_message(self.LoadDone(None, describe(exc, "opening the session in the app")))
            return
        self.post_message(self.LoadDone(source))

    @work(thread=True, exclusive=True, exit_on_error=False, group="stepper")
    def _serve(self, stepper: Stepper, source: SessionSource) -> None:
        worker = get_current_worker()
        self._begin_recovery(source)  # here: creating the file fsyncs
        stepper.serve(lambda: worker.is_cancelled)

    def _emit(self, event: StepperEvent) -> None:
        """Called on the worker thread: hand the event to the app's own thread."""
        self.post_message(self.EngineEvent(event))

    @on(LoadProgress)
    def _load_progress(self, message: LoadProgress) -> None:
        for panel in self.grid.screen.query(LoadingPanel):
            panel.set_progress(message.event.text(), message.event.fraction)

    @on(LoadDone)
    def _load_done(self, message: LoadDone) -> None:
        if self.source is not None:
            return  # replaced meanwhile by a reopened recovery log: the model is not needed
        if message.source is None:
            self.error_message = message.error
            self.exit(return_code=2)
            return
        self._start(message.source)

    @on(EngineEvent)
    def _engine_event(self, message: EngineEvent) -> None:
        if self.stepper is None:
            return  # from a session that was replaced
        event = message.event
        if isinstance(event, Stepped):
            self._take_view(event.view)
            rate = 1.0 / max(event.seconds, 1e-6)
            old = self.steps_per_second
            self.steps_per_second = rate if old is None else old + RATE_SMOOTHING * (rate - old)
        elif isinstance(event, OperationDone):
            self._finish_operation(event.operation)
            self._take_view(event.view)
            self.after_operation(event.operation, event.result)
        elif isinstance(event, Failed):
            if event.operation is not None:
                self._finish_operation(event.operation)
            if event.view is not None:
                self._take_view(event.view)
            if isinstance(event, StepFailed):
                text = f"a step failed: {event.message}. The session is paused and unchanged."
            else:
                text = f"{event.label} failed: {event.message}"
            self.notify(text, severity="error", timeout=10, markup=False)
        elif isinstance(event, RunChanged):
            if not event.running and event.reason == STOPPED_ALL:
                self.notify(event.reason, timeout=4, markup=False)
        if self.recovery is not None and self.recovery.error:
            self._recovery_failed()
        self.schedule_redraw()

    def _finish_operation(self, operation: Operation) -> None:
        if operation in self.busy:
            self.busy.remove(operation)

    def _take_view(self, view: SessionView) -> None:
        if self.view is not None and view == self.view:
            return
        self.view = view
        self.version += 1
        if self.follow:
            self.cursor = view.step
        self.cursor = min(self.cursor, view.step)

    # ----- drawing ------------------------------------------------------------------------

    def schedule_redraw(self) -> None:
        """Redraw soon, at most every REDRAW_SECONDS, so fast steps cannot flood the UI."""
        if not self.redraw_due:
            self.redraw_due = True
            self.set_timer(REDRAW_SECONDS, self.redraw)

    def redraw(self) -> None:
        self.redraw_due = False
        view = self.view
        rate = self.steps_per_second
        running = self.stepper.running if self.stepper else False
        state = BarState(
            model=self.source.model_name if self.source else
            (self._loader.model_name if self._loader else ""),
            seed=view.seed if view else None,
            shared_draws=view.shared_draws if view else None,
            steps_per_second=rate, running=running, busy=", ".join(op.label for op in self.busy),
            step=view.step if view else 0, cursor=self.cursor,
            read_only=self.source is not None and self.source.engine is None,
            loading=self.source is None, mode=getattr(self.source, "label", "read-only"),
            dtype=_dtype_shown(self.source), steps_left=_steps_left(self.source, view))
        self.grid.screen.query_one(TopBar).set_state(state)
        if view is not None:
            self.grid.sync(view, self.cursor)
            widget = self.grid.pane_for(self.focus_wanted) if self.focus_wanted is not None \
                else None
            if widget is not None:
                self.focus_wanted = None
                self.call_after_refresh(widget.focus)
        self.refresh_bindings()

    # ----- helpers used by the actions ------------------------------------------------------

    @property
    def unsaved(self) -> bool:
        has_text = self.view is not None and any(p.records for p in self.view.panes)
        return has_text and self.version != self.saved_version

    def focused_pane(self) -> TokenPane | None:
        """The focused pane on the main screen (the first pane when none has focus)."""
        focused = self.grid.screen.focused
        if isinstance(focused, TokenPane):
            return focused
        panes = self.grid.panes()
        return panes[0] if panes else None

    def on_key(self, event: events.Key) -> None:
        """A key of a control that is off (read-only session): say why, once per press."""
        source = self.source
        if source is None or source.engine is not None or self.screen is not self.grid.screen:
            return
        action = next((MODEL_KEYS[k] for k in (event.key, *event.aliases) if k in MODEL_KEYS),
                      None)
        if action is not None:
            event.stop()
            self.notify(source.unavailable(action), severity="warning", timeout=6,
                        markup=False)

    def on_unmount(self) -> None:
        if self.stepper is not None:
            self.stepper.close()
        self._close_recovery()


MODEL_KEYS: dict[str, str] = {  # key -> action, for the controls a read-only session turns off
    key.strip(): b.action.split("(")[0] for b in LogitforkApp.BINDINGS
    if isinstance(b, Binding) and b.action.split("(")[0] in CHANGES for key in b.key.split(",")}


def _dtype_shown(source: SessionSource | None) -> str:
    """The dtype for the top bar: nothing for float32, "(auto)" when auto chose it."""
    info = getattr(source, "info", None)
    if info is None or info.dtype == "float32":
        return ""
    return f"{info.dtype} (auto)" if info.dtype_note else info.dtype


def _steps_left(source: SessionSource | None, view: SessionView | None) -> int | None:
    engine = source.engine if source is not None else None
    if engine is None or view is None:
        return None
    return max(0, engine.max_new_tokens - view.step)


def make_app(scenario: str | None = None, *, model: str | None = None, seed: int | None = None,
             mono: bool = False, dtype: str = "auto", allow_pickle: bool = False,
             max_new_tokens: int | None = None, source: SessionSource | None = None,
             save_folder: Path | None = None, recovery: bool = False,
             depth: Depth | None = None) -> LogitforkApp:
    """The app on a scenario (by name or path; the default one when None), or on `source`.

    `depth` pins the colour depth (tests); by default it is the terminal's.
    With `recovery`, a live session keeps a crash-recovery log and the app offers to
    reopen one left by an earlier session (see `recovery_offer.py`).
    Scenario errors raise `UserError` here, before any screen is drawn.
    """
    if source is not None:
        return LogitforkApp(source, mono=mono, save_folder=save_folder, recovery=recovery,
                            depth=depth)
    from tui.session.scenario import find_scenario, load_scenario

    loader = SessionLoader(load_scenario(find_scenario(scenario)), model=model, seed=seed,
                           dtype=dtype, allow_pickle=allow_pickle, max_new_tokens=max_new_tokens)
    return LogitforkApp(loader, mono=mono, save_folder=save_folder, recovery=recovery,
                        depth=depth)
