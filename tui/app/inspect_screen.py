"""The inspect view: one pane at one step, and the way to force another token there.

It shows the context's tail and the chosen token with its `u`; a table of raw tokens
(rank, the token made visible, raw and final probability, cumulative raw mass, kept or
cut and which stage cut it), first the 20 most likely, then as many more as asked
(`m`), the whole kept set (`k`) or the tokens whose text matches a search (`/`); the
row cursor starts on the chosen token. Beside it: sparklines of entropy and kept-set
size over the pane's steps, and the step under every pane's recipe. What needs the
logits (the whole distribution, the stage trace, the other recipes) is computed on a
worker and filled in when ready. Choosing a row (Enter) asks, then closes the view
with (pane, step, token) to force.

On a read-only session (a replay) there are no logits: the table comes from the stored
top-20 alone (kept or cut from the stored final probabilities), the table's heading
says that ranks past it need the model, and the other recipes are approximated from
the stored list (`tui/session/approx_recipes.py`) and labelled so; forcing is off, with the reason.
"""

from __future__ import annotations

import math

from rich.style import Style
from rich.text import Text
from textual import on, work
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Container, Vertical, VerticalScroll
from textual.message import Message
from textual.screen import Screen
from textual.widgets import DataTable, Input, Sparkline, Static

from tui.app.colouring import FORCED_MARK, Scheme
from tui.app.confirm_dialog import ConfirmDialog
from tui.app.fitting import cut_apart, cut_items
from tui.app.key_bar import KeyBar
from tui.app.safe_text import shown_line, shown_token
from tui.app.token_pane import pane_text, prompt_tail
from tui.session.distribution import StepDistribution
from tui.session.record import TOP_N
from tui.session.step_analysis import (RecipeRow, TopRow, format_prob, recipe_at, recipe_rows,
                                       top_rows)
from tui.session.views import SessionView
from tui.workbench.source import SessionSource
from tui.workbench.stepper import describe

WIDE_COLUMNS = 110  # from this width on, the side panel sits beside the table
RECIPES_LABEL = "this step under every recipe"
READ_ONLY_NOTE = ("no model: kept/cut from the stored final probabilities; the stage that cut "
                  "a token (-) needs the model")
PAGE_ROWS = 100  # rows added by "more"
STORED_ONLY = (f"the transcript stores the top {TOP_N} of each step: further ranks, the whole "
               "kept set and search past them need the model")


class InspectScreen(Screen[tuple[int, int, int] | None]):
    """Inspect `pane_id` at `step`; dismissed with a (pane, step, token) to force, or None."""

    BINDINGS = [
        Binding("escape", "close", "back"),
        Binding("up", "move(-1)", "choose row", key_display="\u2191\u2193", priority=True),
        Binding("down", "move(1)", "choose row", show=False, priority=True),
        Binding("enter", "force_row", "force this token", key_display="\u23ce", priority=True),
        Binding("m", "more", "more ranks", tooltip=f"{PAGE_ROWS} more rows of the distribution"),
        Binding("k", "kept_set", "kept set", tooltip="list the whole kept set (again: the "
                "top of the distribution)"),
        Binding("slash", "search", "search", key_display="/", tooltip="find tokens by text"),
    ]

    class Analysed(Message):
        """The worker's results: the table with stage cuts, and the recipe rows."""

        def __init__(self, rows: tuple[TopRow, ...], recipes: tuple[RecipeRow, ...] | None,
                     note: str = "", label: str = "",
                     dist: StepDistribution | None = None) -> None:
            super().__init__()
            self.rows = rows
            self.recipes = recipes
            self.note = note
            self.label = label  # replaces the recipe panel's heading when set
            self.dist = dist  # the whole distribution, when the logits were there

    class Found(Message):
        """The search worker's matches for `query`."""

        def __init__(self, query: str, rows: tuple[TopRow, ...]) -> None:
            super().__init__()
            self.query = query
            self.rows = rows

    def __init__(self, source: SessionSource, view: SessionView, pane_id: int, step: int,
                 scheme: Scheme) -> None:
        super().__init__(classes="inspect")
        self.source = source
        self.view = view
        self.pane = next(p for p in view.panes if p.id == pane_id)
        self.step = step
        self.record = self.pane.records[step]
        self.scheme = scheme
        self._recipe_note = ""  # why the other recipes' rows are approximate, if they are
        self.rows: tuple[TopRow, ...] = top_rows(self.record)
        self.recipes: tuple[RecipeRow, ...] | None = None
        self.analysed = False
        self.read_only = source.engine is None
        self.dist = StepDistribution.from_record(self.record)
        self.listing = "top"  # "top" (the first `shown` ranks), "kept" or "search"
        self.shown = TOP_N
        self.search_text = ""
        self._cursor_placed = False  # the row cursor starts on the chosen token, once

    # ----- layout -------------------------------------------------------------------

    def compose(self) -> ComposeResult:
        yield Static(self._title(), id="inspect-title")
        yield VerticalScroll(Static(self._context_text(), id="inspect-context-text"),
                             id="inspect-context")
        yield Static(self._chosen_line(), id="inspect-chosen")
        if self.read_only:
            yield Static(Text(READ_ONLY_NOTE, style="italic"), id="inspect-note")
        with Container(id="inspect-body"):
            with Vertical(id="inspect-list"):
                yield Static(id="table-label")
                yield Input(placeholder="token text to find (enter: back to the table)",
                            id="token-search")
                yield DataTable(id="top-table", cursor_type="row", zebra_stripes=True)
            with Container(id="inspect-side"):
                with Vertical(id="inspect-sparks"):
                    yield Static(id="entropy-label")
                    yield Sparkline([r.raw_entropy for r in self.pane.records], id="entropy-spark")
                    yield Static(id="kept-label")
                    yield Sparkline([math.log10(max(r.kept, 1)) for r in self.pane.records],
                                    id="kept-spark")
                with Vertical(id="inspect-recipes"):
                    yield Static(Text(RECIPES_LABEL, style="bold"), id="recipes-label")
                    yield DataTable(id="recipe-table", cursor_type="none", show_cursor=False)
        yield KeyBar(id="inspect-keys")

    def on_mount(self) -> None:
        table = self.query_one("#top-table", DataTable)
        table.add_columns("#", "token", "raw", "final", "cum raw", "kept", "cut by")
        self._fill_table()
        recipes = self.query_one("#recipe-table", DataTable)
        recipes.add_columns("pane", "kept", "p(chosen)", "recipe")
        self._fill_recipes("working\u2026")
        self._fill_spark_labels()
        self.query_one("#inspect-context", VerticalScroll).scroll_end(animate=False,
                                                                      x_axis=False)
        table.focus()
        self._apply_width(self.size.width)
        self.query_one("#inspect-title", Static).update(self._title(self.size.width))
        self._analyse()

    def on_resize(self) -> None:
        self._apply_width(self.size.width)
        self.query_one("#inspect-title", Static).update(self._title(self.size.width))
        if self.is_mounted:
            self._fill_recipes()

    def _apply_width(self, width: int) -> None:
        self.set_class(width >= WIDE_COLUMNS, "-wide")

    # ----- content --------------------------------------------------------------------

    def _title(self, width: int = 200) -> Text:
        """One line: the pane, the step and its recipe, cut between items with "…"."""
        room = max(width - 2, 20)
        where = f"  step {self.step} of 0-{len(self.pane.records) - 1}  recipe "
        name = cut_items(shown_line(self.pane.name), max(room // 3, 8))
        text = Text("Inspect ", style="bold")
        text.append(name, style="bold")
        text.append(where)
        rest = room - len("Inspect ") - len(name) - len(where)
        text.append(cut_items(shown_line(recipe_at(self.pane, self.step)), max(rest, 2)),
                    style="italic")
        return text

    def _context_text(self) -> Text:
        prompt = prompt_tail(self.source.prompt_text, 240)
        text = pane_text(self.pane.records[: self.step], self.scheme, prompt)
        rec = self.record
        style = self.scheme.token_style(rec.rank, rec.final_prob, forced=rec.forced)
        if rec.forced:
            text.append(FORCED_MARK, self.scheme.marker_style())
        text.append(shown_token(rec.text), style + Style(reverse=True))
        return text

    def _chosen_line(self) -> Text:
        rec = self.record
        text = Text("chosen ", style="bold")
        text.append(shown_token(rec.text), self.scheme.rank_style(rec.rank))
        text.append(f"  id {rec.token_id}  u {rec.u:.5f}  rank {rec.rank}  "
                    f"raw {format_prob(rec.raw_prob)}  final {format_prob(rec.final_prob)}  "
                    f"kept {rec.kept}")
        if rec.forced:
            text.append("  ")
            text.append(FORCED_MARK + " forced", self.scheme.marker_style())
        return text

    def _fill_table(self) -> None:
        table = self.query_one("#top-table", DataTable)
        cursor = table.cursor_row
        table.clear()
        for row in self.rows:
            token_style = self.scheme.rank_style(row.rank)
            rank = Text(("\u25b6" if row.chosen else "") + str(row.rank),
                        style="bold" if row.chosen else "")
            kept = Text("kept" if row.kept else "cut", style="" if row.kept else "dim")
            cut = row.cut_by if row.cut_by else ("" if row.kept else
                                                 "-" if self.read_only else
                                                 "" if self.analysed else "\u2026")
            table.add_row(rank, Text(shown_token(row.text), token_style),
                          Text(format_prob(row.raw_prob), justify="right"),
                          Text(format_prob(row.final_prob), justify="right"),
                          Text(format_prob(row.cum_raw), justify="right"),
                          kept, Text(shown_line(cut), style="italic"),
                          key=str(row.token_id))
        if self.rows:
            if not self._cursor_placed:  # the first time: on the chosen token's row
                cursor = next((i for i, r in enumerate(self.rows) if r.chosen), 0)
                self._cursor_placed = True
            table.move_cursor(row=min(max(cursor, 0), len(self.rows) - 1))
        self.query_one("#table-label", Static).update(self._table_label())

    def _table_label(self) -> Text:
        """What the table lists now, out of what, and how to see more."""
        dist = self.dist
        if self.listing == "search":
            what = (f"{len(self.rows)} tokens matching {self.search_text!r}" if self.search_text
                    else "type to find tokens by text")
        elif self.listing == "kept":
            what = f"the kept set: {len(self.rows)} of {dist.kept} tokens"
            if len(self.rows) < dist.kept:
                what += f" (the first {len(self.rows)} by rank)"
        else:
            ranks = sum(1 for r in self.rows if not (r.chosen and r.cum_raw is None))
            what = f"ranks 1-{ranks} of {dist.size if dist.complete else '?'}"
        text = Text(what, style="bold")
        if not dist.complete:
            text.append("  " + (STORED_ONLY if self.read_only else "working\u2026"),
                        style="italic")
        else:
            text.append(f"  kept {dist.kept}  m more \u00b7 k kept set \u00b7 / search",
                        style="dim")
        return text

    def _fill_recipes(self, note: str | None = None) -> None:
        if note is not None:
            self._recipe_note = note
        note = self._recipe_note
        table = self.query_one("#recipe-table", DataTable)
        table.clear()
        if self.recipes is None:
            table.add_row(Text(note, style="italic"), "", "", "")
            return
        # the recipe column gets what the panel leaves (cell padding: 2 per column)
        panel = self.query_one("#inspect-recipes").content_size.width
        side = panel or (62 if self.size.width >= WIDE_COLUMNS else self.size.width * 2 // 3 - 2)
        names = max((len(shown_line(r.name)) for r in self.recipes), default=4)
        name_width = min(max(names, 4), max(12, side // 4))
        recipe_width = max(side - name_width - 5 - 9 - 8, 12)  # kept, p(chosen), padding
        recipes = cut_apart([shown_line(r.recipe) for r in self.recipes], recipe_width)
        for row, recipe in zip(self.recipes, recipes):
            name = Text(cut_items(shown_line(row.name), name_width),
                        style="bold" if row.own else "")
            if row.error:
                table.add_row(name, "", Text("error", style="bold"),
                              Text(cut_items(shown_line(row.error), recipe_width)))
                continue
            approx = "\u2248" if row.approx else ""
            # a token the recipe cuts reads "cut", never a bare 0 beside a percentage
            p = Text(approx + (format_prob(row.chosen_prob) if row.chosen_prob > 0 else "cut"),
                     justify="right", style="" if row.chosen_prob > 0 else "bold")
            kept = f"{row.kept}+" if row.kept_beyond else str(row.kept)
            table.add_row(name, Text(approx + kept, justify="right"), p,
                          Text(recipe, style="dim"))

    def _fill_spark_labels(self) -> None:
        rec = self.record
        ent = [r.raw_entropy for r in self.pane.records]
        kept = [r.kept for r in self.pane.records]
        self.query_one("#entropy-label", Static).update(Text(
            f"raw entropy (nats): here {rec.raw_entropy:.2f}, final {abs(rec.final_entropy):.2f}; "
            f"range {min(ent):.2f}-{max(ent):.2f}"))
        self.query_one("#kept-label", Static).update(Text(
            f"kept-set size (log scale): here {rec.kept}; range {min(kept)}-{max(kept)}"))

    # ----- the worker -------------------------------------------------------------------

    @work(thread=True, exclusive=True, exit_on_error=False, group="inspect")
    def _analyse(self) -> None:
        """Stage cuts and the other recipes need the logits: maybe a forward pass."""
        source, pane, step = self.source, self.pane, self.step
        try:
            logits = source.logits_at(pane.id, step)
            history = source.history(pane.id, step)
            if logits is None or history is None:
                self.post_message(self._without_logits(history))
                return
            trace = source.trace_at(pane.id, step, logits)
            dist = StepDistribution.from_trace(self.record, logits, trace)
            rows = dist.rows(TOP_N, self._text_of)
            recipes = recipe_rows(logits, history, self.record, pane, self.view.panes)
        except Exception as exc:  # noqa: BLE001 - shown in the view
            failed = f"failed: {describe(exc, 'the inspect view analysis')}"
            self.post_message(self.Analysed(self.rows, None, failed))
            return
        self.post_message(self.Analysed(rows, recipes, dist=dist))

    def _text_of(self, token_id: int) -> str:
        """A token's text: the stored list's, else decoded by the live source."""
        for tok in self.record.top:
            if tok.token_id == token_id:
                return tok.text
        text_of = getattr(self.source, "token_text", None)
        return text_of(token_id) if text_of is not None else f"#{token_id}"

    def _without_logits(self, history: tuple[int, ...] | None) -> Analysed:
        """A read-only session: approximate the recipes from the stored top-20 if it can."""
        rows = top_rows(self.record)
        if history is None:
            return self.Analysed(rows, None, "needs the model (read-only session)")
        from tui.session.approx_recipes import approx_recipe_rows, partial_logits

        recipes = approx_recipe_rows(self.record, history, self.pane, self.view.panes)
        mass = partial_logits(self.record).stored_mass
        label = (f"this step under every recipe, \u2248 approximate: from the stored top-20 "
                 f"({format_prob(mass)} of the raw mass)")
        return self.Analysed(rows, recipes, label=label)

    @on(Analysed)
    def _analysed(self, message: Analysed) -> None:
        self.rows, self.recipes, self.analysed = message.rows, message.recipes, True
        if message.dist is not None:
            self.dist = message.dist
        self._fill_table()
        self._fill_recipes(message.note)
        if message.label:
            self.query_one("#recipes-label", Static).update(Text(message.label, style="bold"))

    # ----- actions ------------------------------------------------------------------------

    def action_close(self) -> None:
        if self.listing == "search":  # escape leaves the search first
            self._list("top")
            return
        self.dismiss(None)

    def action_more(self) -> None:
        if not self.dist.complete:
            self.notify(STORED_ONLY if self.read_only else "still working\u2026", markup=False)
            return
        self.shown = self.shown + PAGE_ROWS if self.listing == "top" else self.shown
        self._list("top")
        table = self.query_one("#top-table", DataTable)
        table.move_cursor(row=min(self.shown - PAGE_ROWS, len(self.rows) - 1))

    def action_kept_set(self) -> None:
        self._list("top" if self.listing == "kept" else "kept")

    def action_search(self) -> None:
        self.listing = "search"
        search = self.query_one("#token-search", Input)
        self.set_class(True, "-searching")
        search.focus()
        self._fill_table()

    def _list(self, listing: str) -> None:
        self.listing = listing
        self.set_class(False, "-searching")
        if listing == "kept":
            self.rows = self.dist.kept_rows(self._text_of)
        else:
            self.rows = self.dist.rows(self.shown, self._text_of)
        self._cursor_placed = listing != "top"  # back on top: the chosen row again
        self._fill_table()
        self.query_one("#top-table", DataTable).focus()

    @on(Input.Changed, "#token-search")
    def _search_changed(self, event: Input.Changed) -> None:
        self.search_text = event.value
        self._search(event.value)

    @on(Input.Submitted, "#token-search")
    def _search_submitted(self, event: Input.Submitted) -> None:
        event.stop()
        self.query_one("#top-table", DataTable).focus()

    @work(thread=True, exclusive=True, exit_on_error=False, group="search")
    def _search(self, query: str) -> None:
        """Decoding a whole vocabulary once takes a moment: off the app's thread."""
        try:
            rows = self.dist.search(query, self._text_of)
        except Exception as exc:  # noqa: BLE001 - shown in the view
            self.app.call_from_thread(self.notify, f"search failed: {describe(exc)}",
                                      severity="error", markup=False)
            return
        self.post_message(self.Found(query, rows))

    @on(Found)
    def _found(self, message: Found) -> None:
        if self.listing != "search" or message.query != self.search_text:
            return  # an older query's answer
        self.rows = message.rows
        self._cursor_placed = True
        self._fill_table()

    def action_move(self, delta: int) -> None:
        table = self.query_one("#top-table", DataTable)
        table.move_cursor(row=max(0, min(len(self.rows) - 1, table.cursor_row + delta)))

    @on(DataTable.RowSelected, "#top-table")
    def _row_selected(self, event: DataTable.RowSelected) -> None:
        event.stop()
        self.action_force_row()

    def check_action(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        if isinstance(self.focused, Input) and action in ("move", "force_row"):
            return False  # typing a search: arrows and enter belong to the input
        if action == "force_row" and self.read_only:
            return None  # shown dimmed; Enter says why
        return True

    def action_force_row(self) -> None:
        if self.read_only:
            self.notify(self.source.unavailable("force"), severity="warning", timeout=6,
                        markup=False)
            return
        table = self.query_one("#top-table", DataTable)
        if not 0 <= table.cursor_row < len(self.rows):
            return
        row = self.rows[table.cursor_row]
        if row.chosen:
            self.notify("that is the token chosen here already", markup=False)
            return
        forward = f"; every pane runs again to step {self.view.step - 1}" if self.view.step > \
            self.step + 1 else ""
        question = (f"Force {shown_token(row.text)} (rank {row.rank}) at step {self.step} "
                    f"of {self.pane.name}? The session rewinds to that step{forward}; the "
                    "other panes draw the same numbers and write the same text again.")
        token = row.token_id

        def done(answer: str | None) -> None:
            if answer == "y":
                self.dismiss((self.pane.id, self.step, token))

        self.app.push_screen(ConfirmDialog(question, [("y", "force"), ("n", "cancel")]), done)
