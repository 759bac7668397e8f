"""What the app shows: a live session on an engine, or a session that can only be read.

The app is built on a `SessionSource`. `LiveSource` wraps a running `Engine`; the app
then offers every control. `StaticSource` holds fixed `SessionView` snapshots (a stored
transcript, or a test's hand-made records): the app shows and inspects it, and turns
off every control that would change it, telling why (`unavailable`). A `SessionLoader`
makes a `LiveSource` on the app's loading worker, so that the screen appears before the
model has loaded. Replays of transcripts and recovery logs are built in `replay_source`.
No Textual, and no torch until a model is loaded.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Iterator, Protocol

from tui.progress import ProgressCallback, ProgressEvent
from tui.session.views import SessionView

if TYPE_CHECKING:
    import numpy as np

    from tui.decoding import StageResult
    from tui.model.loaded import LoadedModel
    from tui.session.engine import Engine
    from tui.session.opening import SessionInfo
    from tui.session.scenario import Scenario
    from tui.transcripts.recovery_log import RecoveryLog



class SessionSource(Protocol):
    """The app's view of a session. `engine` is None when the session is read-only."""

    title: str
    note: str  # the scenario's one-line note ("" when none)
    model_name: str
    prompt_text: str
    scenario_name: str

    @property
    def engine(self) -> Engine | None: ...

    def first_view(self) -> SessionView: ...

    def logits_at(self, pane_id: int, step: int) -> np.ndarray | None: ...

    def history(self, pane_id: int, step: int) -> tuple[int, ...] | None: ...

    def trace_at(self, pane_id: int, step: int,
                 logits: np.ndarray | None = None) -> list[StageResult] | None: ...

    def transcript_lines(self, view: SessionView) -> Iterator[str] | None: ...

    def unavailable(self, action: str) -> str:
        """Why `action` cannot be done on this session ("" when it can)."""
        ...


@dataclass
class LiveSource:
    """A session on a live engine: every control is on.

    With `model`, the prompt can be edited (`restart_with`): the prompt must be encoded.
    """

    live_engine: Engine
    info: "SessionInfo"
    prompt_text: str
    model: "LoadedModel | None" = None
    notes: tuple[str, ...] = ()  # told once when the app opens (which forward path, the dtype)

    def restart_with(self, scenario: "Scenario") -> None:
        """Restart the session on `scenario`'s prompt, length limit and stop strings (call
        on the engine's worker: it prefills). The old setup is kept in `info.prompt_edits`."""
        from dataclasses import replace

        from tui.session.scenario import EarlierSetup
        from tui.session.views import EngineError

        if self.model is None:
            raise EngineError("this session was opened without its model's tokenizer")
        ids = self.model.encode_prompt(scenario.prompt, scenario.message_dicts)
        earlier = EarlierSetup.of(self.info.scenario, self.live_engine.step_index)
        self.live_engine.set_prompt(ids, max_new_tokens=scenario.max_new_tokens,
                                    stop_strings=scenario.stop)
        self.info = replace(self.info, scenario=scenario,
                            prompt_edits=self.info.prompt_edits + (earlier,))
        self.prompt_text = self.model.decode(list(ids))

    @property
    def engine(self) -> Engine:
        return self.live_engine

    @property
    def title(self) -> str:
        return self.info.scenario.title

    @property
    def note(self) -> str:
        return self.info.scenario.note

    @property
    def model_name(self) -> str:
        return self.info.model_name

    @property
    def scenario_name(self) -> str:
        path = self.info.scenario.path
        return path.stem if path is not None else "session"

    def first_view(self) -> SessionView:
        return self.live_engine.view()

    def logits_at(self, pane_id: int, step: int) -> np.ndarray | None:
        """Call from a worker: may run a forward pass, and takes the engine's lock."""
        return self.live_engine.logits_at(pane_id, step)

    def history(self, pane_id: int, step: int) -> tuple[int, ...] | None:
        return self.live_engine.history(pane_id, step)

    def trace_at(self, pane_id: int, step: int,
                 logits: np.ndarray | None = None) -> list[StageResult] | None:
        """The pane's recipe stage by stage at the step, in the sampler state of then
        (on `logits` when the caller has that step's already, else `logits_at`'s)."""
        return self.live_engine.trace_at(pane_id, step, logits)

    def token_text(self, token_id: int) -> str:
        """One token decoded on its own (the inspect view's search over every token)."""
        return self.live_engine.token_text(token_id)

    def transcript_lines(self, view: SessionView) -> Iterator[str]:
        from tui.transcripts.format import lines

        return lines(view, self.info, self.live_engine.prompt_ids)

    def unavailable(self, action: str) -> str:
        return ""

    def begin_log(self, log: "RecoveryLog") -> None:
        """Start the crash-recovery log on this session (call on the engine's worker)."""
        log.begin(self.live_engine.view(), self.info, self.live_engine.prompt_ids)


READ_ONLY = "this session is read-only"


@dataclass
class StaticSource:
    """A session that can be shown and inspected but not changed (no logits, no model).

    With `prompt_ids`, `history` answers (prompt and the pane's tokens), which lets the
    inspect view approximate other recipes from the stored top-20 lists.
    """

    view: SessionView
    title: str
    model_name: str
    prompt_text: str
    scenario_name: str = "transcript"
    prompt_ids: tuple[int, ...] | None = None
    reason: str = READ_ONLY  # why the controls that change the session are off
    save_reason: str = ""  # why saving is off, when that differs from `reason`
    notes: tuple[str, ...] = ()  # told once when the app opens (reader warnings, the reason)
    label: str = "read-only"  # the top bar's mode word
    note: str = ""  # a transcript keeps the title only

    @property
    def engine(self) -> None:
        return None

    def first_view(self) -> SessionView:
        return self.view

    def logits_at(self, pane_id: int, step: int) -> np.ndarray | None:
        return None

    def history(self, pane_id: int, step: int) -> tuple[int, ...] | None:
        if self.prompt_ids is None:
            return None
        pane = next((p for p in self.view.panes if p.id == pane_id), None)
        if pane is None or not 0 <= step <= len(pane.records):
            return None
        return self.prompt_ids + tuple(r.token_id for r in pane.records[:step])

    def trace_at(self, pane_id: int, step: int,
                 logits: np.ndarray | None = None) -> list[StageResult] | None:
        return None

    def transcript_lines(self, view: SessionView) -> Iterator[str] | None:
        return None

    def unavailable(self, action: str) -> str:
        return (self.save_reason or self.reason) if action == "save" else self.reason


@dataclass(frozen=True)
class SessionLoader:
    """Loads a model and opens a session on a scenario (slow: run it in a worker)."""

    scenario: "Scenario"
    model: str | None = None  # overrides the scenario's model
    seed: int | None = None  # overrides the scenario's seed
    dtype: str = "auto"
    allow_pickle: bool = False
    max_new_tokens: int | None = None

    @property
    def model_name(self) -> str:
        from tui.model.catalogue import DEFAULT_MODEL

        return self.model or self.scenario.model or DEFAULT_MODEL

    def load(self, progress: ProgressCallback) -> LiveSource:
        from tui.model.catalogue import load_model
        from tui.session.opening import open_session

        lm = load_model(self.model_name, dtype=self.dtype, allow_pickle=self.allow_pickle,
                        progress=progress)
        progress(ProgressEvent("reading the prompt", 0))
        engine, info = open_session(lm, self.scenario, seed=self.seed,
                                    max_new_tokens=self.max_new_tokens)
        notes = tuple(n for n in (lm.path_note, lm.dtype_note) if n)
        return LiveSource(engine, info, lm.decode(list(engine.prompt_ids)), lm, notes=notes)
