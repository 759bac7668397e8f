"""A question with a few one-key answers (quit without saving, remove a pane, force)."""

from __future__ import annotations

from rich.text import Text
from textual import on
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.events import Key
from textual.screen import ModalScreen
from textual.widgets import Button, Static

from tui.app.safe_text import shown


class ConfirmDialog(ModalScreen[str | None]):
    """Returns the chosen answer's key, or None on Escape."""

    BINDINGS = [Binding("escape", "cancel", "cancel")]

    def __init__(self, question: str, answers: list[tuple[str, str]]) -> None:
        super().__init__(classes="dialog-screen")
        self.question = question
        self.answers = answers  # (key, label), e.g. ("y", "remove")

    def compose(self) -> ComposeResult:
        with Vertical(classes="dialog"):
            yield Static(Text(shown(self.question)), classes="dialog-title")
            with Horizontal(classes="dialog-buttons"):
                for i, (key, label) in enumerate(self.answers):
                    yield Button(Text(f"{label} ({key})"), id=f"answer-{key}",
                                 variant="primary" if i == 0 else "default")

    def on_mount(self) -> None:
        self.query(Button).first().focus()

    def on_key(self, event: Key) -> None:
        for key, _label in self.answers:
            if event.key == key:
                event.stop()
                self.dismiss(key)
                return

    @on(Button.Pressed)
    def _pressed(self, event: Button.Pressed) -> None:
        if event.button.id and event.button.id.startswith("answer-"):
            self.dismiss(event.button.id.removeprefix("answer-"))

    def action_cancel(self) -> None:
        self.dismiss(None)
