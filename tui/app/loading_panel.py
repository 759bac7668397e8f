"""Shown while the model loads: what is being done and how far along, never a still screen.

The panel says only what the loader reports: a warm start (a converted cache, or a
model folder) reads "loading the weights", and only a first GGUF load, whose stages
name the conversion, gets the note that this happens once. The bar is indeterminate
until a fraction is known; from then on it only moves forward (a later stage without
a fraction keeps it where it was), and the percentage is written in the stage line,
so that the bar never shows an unknown "--%".
"""

from __future__ import annotations

from rich.text import Text
from textual.app import ComposeResult
from textual.containers import Vertical
from textual.widgets import ProgressBar, Static

from tui.app.safe_text import shown_line

CONVERSION_STAGES = ("rebuilding the tokenizer", "de-quantising", "writing the cache")
CONVERSION_NOTE = "converting the GGUF file once; later starts read the converted cache"


class LoadingPanel(Vertical):
    """A stage line and a progress bar (indeterminate while the fraction is unknown)."""

    def __init__(self, model: str = "", id: str | None = None) -> None:
        super().__init__(id=id)
        self.model = model
        self.stage = "finding the model"
        self.fraction: float | None = None  # the furthest fraction heard
        self.converting = False

    def compose(self) -> ComposeResult:
        yield Static(self._title(), id="loading-title")
        yield Static(self._stage_text(), id="loading-stage")
        yield ProgressBar(total=None, show_eta=False, show_percentage=False, id="loading-bar")

    def _title(self) -> Text:
        text = Text("Loading ", style="bold")
        text.append(shown_line(self.model) or "the model", style="bold")
        if self.converting:
            text.append(f"  ({CONVERSION_NOTE})", style="dim")
        return text

    def _stage_text(self) -> Text:
        text = Text(shown_line(self.stage))
        if self.fraction is not None:
            text.append(f"  {self.fraction * 100:.0f}%", style="bold")
        return text

    def set_progress(self, stage: str, fraction: float | None) -> None:
        self.stage = stage
        if stage.startswith(CONVERSION_STAGES) and not self.converting:
            self.converting = True
            self.query_one("#loading-title", Static).update(self._title())
        if fraction is not None:
            self.fraction = max(self.fraction or 0.0, min(1.0, max(0.0, fraction)))
        self.query_one("#loading-stage", Static).update(self._stage_text())
        if self.fraction is not None:
            self.query_one("#loading-bar", ProgressBar).update(total=100,
                                                               progress=self.fraction * 100)
