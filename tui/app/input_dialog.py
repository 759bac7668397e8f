"""A small modal dialog: one text field, a check, the check's error shown in place.

The base of the recipe, save and seed dialogs. The dialog closes only on a value that
passes `check`; an error keeps it open with the message under the field, so that a
bad entry changes nothing. Escape cancels (the result is None).
"""

from __future__ import annotations

from typing import Callable

from rich.text import Text
from textual import on
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.screen import ModalScreen
from textual.widgets import Button, Input, Static

from tui.app.safe_text import shown

Check = Callable[[str], str | None]  # the error message, or None when the value is good


def no_check(value: str) -> str | None:
    return None


class InputDialog(ModalScreen[str | None]):
    """Ask for one value. Subclasses add fields by overriding `extra_fields`."""

    BINDINGS = [Binding("escape", "cancel", "cancel")]

    def __init__(self, title: str, value: str = "", *, hint: str = "",
                 check: Check = no_check, ok_label: str = "OK") -> None:
        super().__init__(classes="dialog-screen")
        self.title_text = title
        self.initial = value
        self.hint = hint
        self.check = check
        self.ok_label = ok_label
        self._error = ""

    def compose(self) -> ComposeResult:
        with Vertical(classes="dialog"):
            yield Static(Text(self.title_text, style="bold"), classes="dialog-title")
            yield from self.extra_fields()
            yield self.value_field()
            yield Static(Text(), id="dialog-error", classes="dialog-error")
            if self.hint:
                yield Static(Text(self.hint), classes="dialog-hint")
            with Horizontal(classes="dialog-buttons"):
                yield Button(self.ok_label, variant="primary", id="dialog-ok")
                yield Button("Cancel", id="dialog-cancel")
            yield from self.below()

    def extra_fields(self) -> ComposeResult:
        """Fields above the value's (none here)."""
        return iter(())

    def value_field(self) -> Input:
        return Input(self.initial, id="dialog-value", select_on_focus=False)

    def below(self) -> ComposeResult:
        """What shows under the buttons (nothing here)."""
        return iter(())

    def on_mount(self) -> None:
        """Focus the first field, so that Tab walks the fields in the order shown."""
        for field in self.query(Input):
            field.cursor_position = len(field.value)
        self.query(Input).first().focus()

    @property
    def error(self) -> str:
        """The error shown now ("" when none)."""
        return self._error

    def show_error(self, message: str) -> None:
        self._error = message
        self.query_one("#dialog-error", Static).update(Text(shown(message), style="bold"))

    def value(self) -> str:
        return self.query_one("#dialog-value", Input).value

    def result(self) -> object:
        """What the dialog returns once `check` passes (the text by default)."""
        return self.value().strip()

    def submit(self) -> None:
        problem = self.check(self.value().strip())
        if problem:
            self.show_error(problem)
            return
        self.dismiss(self.result())  # type: ignore[arg-type]

    @on(Input.Submitted)
    def _submitted(self, event: Input.Submitted) -> None:
        event.stop()
        self.submit()

    @on(Button.Pressed, "#dialog-ok")
    def _ok(self) -> None:
        self.submit()

    @on(Button.Pressed, "#dialog-cancel")
    def _cancel_button(self) -> None:
        self.dismiss(None)

    def action_cancel(self) -> None:
        self.dismiss(None)
