"""The recipe dialog: fork, add a pane or edit a recipe; a RecipeError keeps it open.

The recipe text is parsed with `Recipe.parse` before the dialog closes, so an invalid
recipe never reaches the engine: the error shows under the field, with the listing
line of the stage it is about, and the session is left as it was. Under the buttons
the dialog lists every stage (from `tui.decoding.STAGES`), and stage names complete.
"""

from __future__ import annotations

from dataclasses import dataclass

from rich.text import Text
from textual.app import ComposeResult
from textual.containers import VerticalScroll
from textual.widgets import Input, Static

from tui.app.input_dialog import InputDialog
from tui.app.recipe_help import StageNames, explain, stage_table
from tui.app.safe_text import shown_line

RECIPE_HINT = ("Stages apply in the order written, separated by spaces, e.g. "
               "`temperature=0.8 top_p=0.9`. A stage name completes as you type (\u2192 takes "
               "it). Enter to accept, Escape to cancel. The stages:")


@dataclass(frozen=True)
class RecipeChoice:
    """What the dialog returns: the canonical recipe text and the pane name (if asked)."""

    recipe: str
    name: str | None = None


def check_recipe(text: str) -> str | None:
    """The RecipeError's message for a bad recipe text, or None for a good one."""
    from tui.decoding import Recipe, RecipeError

    if not text.strip():
        return "the recipe is empty: give at least one stage, e.g. `greedy`"
    try:
        Recipe.parse(text)
    except RecipeError as exc:
        return explain(text, str(exc))
    return None


def canonical(text: str) -> str:
    from tui.decoding import Recipe

    return str(Recipe.parse(text))


class RecipeDialog(InputDialog):
    """Ask for a recipe (and, for a new pane, a name)."""

    def __init__(self, title: str, recipe: str = "", *, name: str | None = None) -> None:
        super().__init__(title, recipe, hint=RECIPE_HINT, check=check_recipe)
        self.ask_name = name is not None
        self.initial_name = name or ""
        self.add_class("recipe-dialog")

    def value_field(self) -> Input:
        return Input(self.initial, id="dialog-value", select_on_focus=False,
                     suggester=StageNames())

    def below(self) -> ComposeResult:
        with VerticalScroll(id="stage-list", can_focus=False):
            yield Static(stage_table())

    def extra_fields(self) -> ComposeResult:
        if self.ask_name:
            yield Static(Text("name"), classes="dialog-label")
            yield Input(shown_line(self.initial_name), id="dialog-name", select_on_focus=False)
            yield Static(Text("recipe"), classes="dialog-label")

    def result(self) -> RecipeChoice:
        name = None
        if self.ask_name:
            name = self.query_one("#dialog-name", Input).value.strip() or None
        return RecipeChoice(canonical(self.value()), name)
