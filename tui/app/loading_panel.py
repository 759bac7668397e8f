"""Shown while the model loads: what is being done and how far along, never a still screen."""

from __future__ import annotations

from rich.text import Text
from textual.app import ComposeResult
from textual.containers import Vertical
from textual.widgets import ProgressBar, Static

from tui.app.safe_text import shown_line


class LoadingPanel(Vertical):
    """A stage line and a progress bar (indeterminate while the fraction is unknown)."""

    def __init__(self, model: str = "", id: str | None = None) -> None:
        super().__init__(id=id)
        self.model = model
        self.stage = "starting"
        self.fraction: float | None = None

    def compose(self) -> ComposeResult:
        yield Static(self._title(), id="loading-title")
        yield Static(Text(self.stage), id="loading-stage")
        yield ProgressBar(total=None, show_eta=False, id="loading-bar")

    def _title(self) -> Text:
        text = Text("Loading ", style="bold")
        text.append(shown_line(self.model) or "the model", style="bold")
        text.append("  (the first load of a GGUF model converts it once: about 40 s)",
                    style="dim")
        return text

    def set_progress(self, stage: str, fraction: float | None) -> None:
        self.stage, self.fraction = stage, fraction
        self.query_one("#loading-stage", Static).update(Text(shown_line(stage)))
        bar = self.query_one("#loading-bar", ProgressBar)
        if fraction is None:
            bar.update(total=None)
        else:
            bar.update(total=100, progress=max(0.0, min(1.0, fraction)) * 100)
