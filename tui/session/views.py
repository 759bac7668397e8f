"""What readers see of a session: immutable snapshots, with no torch behind them.

The engine hands these out; the app, transcripts, replay and reports read them. A
stored transcript can be turned into the same views without loading a model, which
is why this module imports nothing heavy.
"""

from __future__ import annotations

from dataclasses import dataclass

from tui.session.record import StepRecord


class EngineError(Exception):
    """An operation that cannot be done in the session's present state (told to the user)."""


@dataclass(frozen=True)
class PaneView:
    """A snapshot of one pane, safe to hand to another thread."""

    id: int
    name: str
    recipe: str
    seed: int | None
    records: tuple[StepRecord, ...]
    stop: str | None
    recipe_log: tuple[tuple[int, str], ...] = ()
    origin: tuple[int, int] | None = None

    @property
    def text(self) -> str:
        return "".join(r.text for r in self.records)


@dataclass(frozen=True)
class SessionView:
    step: int
    seed: int
    shared_draws: bool
    panes: tuple[PaneView, ...]
    draw_log: tuple[tuple[int, bool], ...] = ()  # (from step, shared draws on)

    @property
    def finished(self) -> bool:
        return all(p.stop is not None for p in self.panes)
