"""The top bar: model (and dtype), seed, shared draws, step rate and time to the end, state, cursor."""

from __future__ import annotations

from dataclasses import dataclass

from rich.text import Text
from textual.widgets import Static

from tui.app.safe_text import shown_line


@dataclass(frozen=True)
class BarState:
    """Everything the top bar shows (None where not known yet)."""

    model: str = ""
    seed: int | None = None
    shared_draws: bool | None = None
    steps_per_second: float | None = None
    running: bool = False
    busy: str = ""  # the label of an operation under way, e.g. "fork"
    step: int = 0
    cursor: int = 0
    read_only: bool = False
    loading: bool = False
    mode: str = "read-only"  # the word shown for a read-only session (replay, recovered)
    dtype: str = ""  # shown when not float32, e.g. "bfloat16 (auto)"
    steps_left: int | None = None  # steps until every pane reaches max_new_tokens


def bar_text(state: BarState) -> Text:
    """The bar as one line of text; the most important facts come first."""
    text = Text()
    if state.loading:
        text.append(" \u25cc loading ", style="bold reverse")
    elif state.read_only:
        text.append(f" \u25a0 {state.mode} ", style="bold reverse")
    elif state.running:
        text.append(" \u25b6 running ", style="bold #0b0c0e on #009E73")
    else:
        text.append(" \u2016 paused ", style="bold #0b0c0e on #F0E442")
    text.append(" ")
    if state.busy:  # a chip of its own, apart from the model's name
        text.append(f" {state.busy}\u2026 ", style="italic #0b0c0e on #8fcbef")
        text.append("  ")
    if state.model:
        text.append(shown_line(state.model), style="bold")
    if state.dtype:
        text.append(f" {state.dtype}")
    if state.seed is not None:
        text.append(f"  seed {state.seed}")
    if state.shared_draws is not None:
        text.append(f"  shared draws {'on' if state.shared_draws else 'off'}")
    if state.loading:
        return text
    rate = state.steps_per_second
    if state.running and rate:  # a rate is only news while steps come (and paused
        text.append(f"  {rate:.1f} steps/s")  # screens stay the same from run to run)
        if state.steps_left:
            text.append(f" ({time_text(state.steps_left / rate)} to the end)")
    # counts of steps, not step numbers (those count from 0: the last of 12 steps is 11)
    where = f"{state.step} step{'s' if state.step != 1 else ''}"
    if state.cursor != state.step:
        where = f"cursor {state.cursor}/{state.step} steps"
    text.append(f"  {where}", style="bold")
    return text


def time_text(seconds: float) -> str:
    """A short duration: "40 s", "3 min", "1 h 5 min"."""
    if seconds < 90:
        return f"{max(1, round(seconds))} s"
    if seconds < 3600:
        return f"{round(seconds / 60)} min"
    hours, minutes = divmod(round(seconds / 60), 60)
    return f"{hours} h {minutes} min"


class TopBar(Static):
    """One line at the top of the main screen."""

    def __init__(self, id: str | None = None) -> None:
        super().__init__(Text(), id=id)
        self._state = BarState(loading=True)

    def set_state(self, state: BarState) -> None:
        if state != self._state:
            self._state = state
            self.update(bar_text(state))

    def on_mount(self) -> None:
        self.update(bar_text(self._state))
