"""The help screen: the scenario, every key, the recipe stages, the colours, the caution."""

from __future__ import annotations

from rich.table import Table
from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import VerticalScroll
from textual.screen import ModalScreen
from textual.widgets import Static

from tui.app.colouring import FINAL_BANDS, FORCED_MARK, RANK_BANDS, Scheme
from tui.token_style import EDIT_MARK, FORK_MARK, PART_MARK
from tui.app.recipe_help import stage_table
from tui.app.safe_text import shown_line

CAUTION = ("Generated text is raw model output: it can be false, biased or offensive, and it "
           "is not filtered. Check any setting chosen here on your own data before use.")

INSPECT_KEYS = (
    ("\u2191 \u2193", "choose a row of the table (it starts on the chosen token)"),
    ("m", "100 more ranks of the distribution (a live session: the whole vocabulary)"),
    ("k", "the whole kept set, in raw order (again: back to the top ranks)"),
    ("/", "find tokens by their text; escape leaves the search"),
    ("enter", "force the chosen row's token at this step (asks first): the session rewinds "
              "there and the pane goes on from that token"),
    ("escape", "back to the panes"),
)


def keys_table(rows: list[tuple[str, str]]) -> Table:
    """Keys in one column, what they do in the next (wrapped with a hanging indent)."""
    table = Table.grid(padding=(0, 2))
    table.add_column(no_wrap=True, style="bold")
    table.add_column(ratio=1)
    for key, what in rows:
        table.add_row(Text(key), Text(what))
    return table


def scheme_text(scheme: Scheme) -> Text:
    """The legend, then each band in the style its tokens get, with what it means."""
    text = Text()
    text.append_text(scheme.legend(200))
    text.append("\n\nShape = the token's rank in the raw model distribution: ")
    for i, band in enumerate(RANK_BANDS):
        text.append(f"{band.name} ({band.label})", scheme.band_style(i, 0))
        text.append(", " if i < len(RANK_BANDS) - 1 else ".\n")
    text.append("Ink = its probability under the pane's final, truncated distribution (the "
                "one it was drawn from), one hue from pale to deep: ")
    for j, band in enumerate(FINAL_BANDS):
        text.append(f"{band.name} ({band.label})", scheme.band_style(0, j))
        text.append(", " if j < len(FINAL_BANDS) - 1 else ".\n")
    text.append("Neighbouring tokens alternate between two close shades, so token boundaries "
                "show. ")
    text.append(FORCED_MARK, scheme.marker_style())
    text.append(" marks a token forced from the inspect view; ")
    mark = scheme.annotation_style()
    text.append(PART_MARK, mark)
    text.append(" where a pane's text leaves the pane it is compared with (its fork source, "
                "a twin with the same recipe, or the first pane); ")
    text.append(FORK_MARK, mark)
    text.append(" the step a fork starts from; ")
    text.append(EDIT_MARK, mark)
    text.append(" a recipe change.\n")
    text.append("Status line: step, kept-set size and entropy H (nats) of the final "
                "distribution at the last step shown, mean log-probability (raw) of the "
                "chosen tokens, and why the pane stopped.")
    return text


class HelpScreen(ModalScreen[None]):
    """Keys, colours and the caution. Escape (or ?) closes it."""

    BINDINGS = [Binding("escape", "close", "close"), Binding("question_mark", "close", "close")]

    def __init__(self, main_keys: list[tuple[str, str]], scheme: Scheme,
                 scenario: tuple[str, str] = ("", "")) -> None:
        super().__init__(classes="dialog-screen")
        self.main_keys = main_keys
        self.scheme = scheme
        self.scenario = scenario  # (title, note) of the session shown

    def compose(self) -> ComposeResult:
        with VerticalScroll(classes="dialog help"):
            title, note = self.scenario
            if title:
                yield Static(Text(shown_line(title), style="bold"), id="help-title")
                if note:
                    yield Static(Text(shown_line(note), style="italic"), id="help-note")
                yield Static(Text())
            yield Static(Text("logitfork: keys", style="bold"))
            yield Static(keys_table(self.main_keys))
            yield Static(Text("In the inspect view", style="bold"))
            yield Static(keys_table(list(INSPECT_KEYS)))
            yield Static(Text("Recipes: stages apply in the order written, e.g. "
                              "`repetition_penalty=1.2 temperature=0.8 top_p=0.9`",
                              style="bold"))
            yield Static(stage_table(), id="help-stages")
            yield Static(Text("Colours", style="bold"))
            yield Static(scheme_text(self.scheme))
            yield Static(Text("\n" + CAUTION, style="bold"), id="caution")

    def action_close(self) -> None:
        self.dismiss(None)
