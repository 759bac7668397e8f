"""The changes the app asks of the engine, as typed values the `Stepper` runs in order.

Each operation is a small frozen class: what it changes is in its fields, `label` is
the word the top bar shows while it is queued or under way, and calling it with the
engine does the work (on the engine's worker). The app reacts to a finished one by
its type (`isinstance`), never by comparing label strings. No Textual here.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Callable, ClassVar

if TYPE_CHECKING:
    from tui.session.engine import Engine
    from tui.session.scenario import Scenario
    from tui.transcripts.recovery_log import RecoveryLog
    from tui.workbench.source import LiveSource


class Operation:
    """The base: `label` for the screen, `__call__(engine)` for the work."""

    label: ClassVar[str] = "operation"

    def __call__(self, engine: "Engine") -> Any:
        raise NotImplementedError


@dataclass(frozen=True)
class Call(Operation):
    """Any function of the engine under a label of its own (for one-off work)."""

    name: str
    run: Callable[["Engine"], Any]

    def __call__(self, engine: "Engine") -> Any:
        return self.run(engine)

    @property
    def label(self) -> str:  # type: ignore[override]
        return self.name


@dataclass(frozen=True)
class Fork(Operation):
    """A new pane sharing `pane_id`'s first `at` steps, decoding on with `recipe`."""

    pane_id: int
    recipe: str
    name: str | None
    at: int | None = None
    label: ClassVar[str] = "fork"

    def __call__(self, engine: "Engine") -> int:
        return engine.fork(self.pane_id, self.recipe, self.name, at=self.at)


@dataclass(frozen=True)
class AddPane(Operation):
    recipe: str
    name: str | None
    label: ClassVar[str] = "add"

    def __call__(self, engine: "Engine") -> int:
        return engine.add_pane(self.recipe, self.name)


@dataclass(frozen=True)
class EditRecipe(Operation):
    pane_id: int
    recipe: str
    label: ClassVar[str] = "edit"

    def __call__(self, engine: "Engine") -> None:
        engine.set_recipe(self.pane_id, self.recipe)


@dataclass(frozen=True)
class RemovePane(Operation):
    pane_id: int
    label: ClassVar[str] = "remove"

    def __call__(self, engine: "Engine") -> None:
        engine.remove_pane(self.pane_id)


@dataclass(frozen=True)
class Rewind(Operation):
    step: int
    label: ClassVar[str] = "rewind"

    def __call__(self, engine: "Engine") -> None:
        engine.rewind(self.step)


@dataclass(frozen=True)
class SetDraws(Operation):
    shared: bool
    label: ClassVar[str] = "draws"

    def __call__(self, engine: "Engine") -> None:
        engine.set_shared_draws(self.shared)


@dataclass(frozen=True)
class Restart(Operation):
    """Back to the prompt with a new seed."""

    seed: int
    label: ClassVar[str] = "restart"

    def __call__(self, engine: "Engine") -> None:
        engine.restart(self.seed)


@dataclass(frozen=True)
class Force(Operation):
    pane_id: int
    step: int
    token_id: int
    label: ClassVar[str] = "force"

    def __call__(self, engine: "Engine") -> None:
        engine.force(self.pane_id, self.step, self.token_id)


@dataclass(frozen=True)
class EditPrompt(Operation):
    """Restart on an edited scenario's prompt; the recovery log (if any) starts over."""

    source: "LiveSource"
    scenario: "Scenario"
    log: "RecoveryLog | None" = None
    label: ClassVar[str] = "prompt"

    def __call__(self, engine: "Engine") -> None:
        self.source.restart_with(self.scenario)
        if self.log is not None:  # the old prompt's records no longer apply
            self.log.restart(engine.view(), self.source.info, engine.prompt_ids)
