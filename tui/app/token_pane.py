"""One pane on the main screen: its title, the prompt's tail, the tokens, a status line.

The pane draws a `PaneView` snapshot up to the session cursor (tokens `0..upto-1`),
with the marks of `tui.session.parting` inside the text (where it parts from the pane
it is compared with, its fork point, its recipe changes). What it shows is held in
reactive attributes: the body is rebuilt only when `body_key` (the pane's version,
the cursor, the width, the marks) moves, so a stopped pane costs nothing per step.
Every token carries its step number in its style's meta, so that a click on a token
posts `TokenPane.TokenClicked` and the app can open the inspect view there.
"""

from __future__ import annotations

import math
from typing import Sequence

from rich.style import Style
from rich.text import Text
from textual import events
from textual.app import ComposeResult
from textual.containers import Vertical, VerticalScroll
from textual.message import Message
from textual.reactive import reactive
from textual.widgets import Static

from tui.app.colouring import FORCED_MARK, PROMPT_STYLE, Scheme
from tui.app.fitting import cut_items, fit_parts
from tui.app.safe_text import shown, shown_line
from tui.session.parting import EDIT, FORK, PART, TextMark
from tui.session.record import StepRecord, mean_logprob
from tui.session.views import PaneView
from tui.token_style import EDIT_MARK, FORK_MARK, PART_MARK

PROMPT_TAIL_LINES = 2  # about this many lines of the prompt's end show above the text
MARK_GLYPHS = {PART: PART_MARK, FORK: FORK_MARK, EDIT: EDIT_MARK}


def prompt_tail(prompt_text: str, limit: int) -> str:
    """The end of the prompt, cut at a word boundary, with an ellipsis when cut."""
    if len(prompt_text) <= limit:
        return prompt_text
    tail = prompt_text[-limit:]
    cut = tail.find(" ")
    return "\u2026" + (tail[cut + 1:] if 0 <= cut < limit // 2 else tail)


def pane_text(records: Sequence[StepRecord], scheme: Scheme, prompt: str = "",
              marks: Sequence[TextMark] = ()) -> Text:
    """The prompt's tail (dimmed) then each token in its style, alternate shades between,
    each mark drawn before the token of its step."""
    text = Text()  # no base style: the prompt's italics must not reach the tokens
    if prompt:
        text.append(shown(prompt), PROMPT_STYLE)
    by_step: dict[int, str] = {}
    for mark in marks:
        by_step[mark.step] = by_step.get(mark.step, "") + MARK_GLYPHS[mark.kind]
    mark_style = scheme.annotation_style()
    for i, rec in enumerate(records):
        meta = Style.from_meta({"step": rec.step})
        glyphs = by_step.get(rec.step)
        if glyphs:
            text.append(glyphs, mark_style + meta)
        if rec.forced:
            text.append(FORCED_MARK, scheme.marker_style() + meta)
        style = scheme.token_style(rec.rank, rec.final_prob, alternate=bool(i % 2),
                                   forced=rec.forced)
        text.append(shown(rec.text), style + meta)
    return text


def status_text(records: Sequence[StepRecord], total: int, width: int = 200) -> Text:
    """Step, kept-set size, final entropy, mean log-probability and the stop reason.

    Parts are joined with " · ", never split, in at most two lines: a narrow pane gets
    the short wording ("12/60 · k 40 · H 2.31") before anything is cut.
    """
    if not records:
        return Text(cut_items("no tokens yet", width), style="dim")
    last = records[-1]
    lp = mean_logprob(r.logprob for r in records)
    # the last step shown, numbered from 0 as everywhere (transcripts, reports, inspect)
    where = f"{len(records) - 1}" + (f"/{total - 1}" if total != len(records) else "")
    logp = f"{lp:.2f}" if math.isfinite(lp) else "-inf"
    full = [f"step {where}", f"kept {last.kept}", f"H {abs(last.final_entropy):.2f}",
            f"logp {logp}"]
    short = [where, f"k {last.kept}", f"H {abs(last.final_entropy):.2f}", f"lp {logp}"]
    if last.stop:
        full.append(f"stopped: {last.stop}")
        short.append(f"\u25a0 {last.stop}")
    lines = fit_parts([full, short], max(width, 8))
    text = Text("\n".join(lines))
    if last.stop:
        for word in (f"stopped: {last.stop}", f"\u25a0 {last.stop}"):
            text.highlight_words([word], "bold")
    return text


class TokenPane(Vertical, can_focus=True):
    """A pane of the session. Call `show` with each new snapshot."""

    class TokenClicked(Message):
        """A token was clicked: inspect `pane_id` at `step`."""

        def __init__(self, pane: "TokenPane", pane_id: int, step: int) -> None:
            super().__init__()
            self.pane = pane
            self.pane_id = pane_id
            self.step = step

        @property
        def control(self) -> "TokenPane":
            return self.pane

    body_key: reactive[tuple] = reactive((), repaint=False)
    """What the body shows: (version, upto, width, marks, prompt); redrawn when it moves."""
    status_key: reactive[tuple] = reactive((), repaint=False)
    recipe_line: reactive[str] = reactive("", repaint=False)

    def __init__(self, pane_id: int, scheme: Scheme, prompt: str = "") -> None:
        super().__init__(id=f"pane-{pane_id}", classes="token-pane")
        self.pane_id = pane_id
        self.scheme = scheme
        self.prompt = prompt
        self._pane: PaneView | None = None
        self._upto = 0
        self._version = 0
        self._marks: tuple[TextMark, ...] = ()
        self._titled: tuple[str, int] | None = None  # the name and width the title shows
        self.body_draws = 0  # how many times the body was rebuilt (tests, the bench)

    def compose(self) -> ComposeResult:
        scroll = VerticalScroll(Static(Text(), classes="pane-body"), classes="pane-scroll")
        scroll.can_focus = False
        yield Static(Text(), classes="pane-recipe")
        yield scroll
        yield Static(Text(), classes="pane-status")

    def on_mount(self) -> None:
        self._sync_keys()

    @property
    def pane(self) -> PaneView | None:
        return self._pane

    def show(self, pane: PaneView, upto: int, version: int | None = None,
             marks: tuple[TextMark, ...] = ()) -> None:
        """Draw `pane`'s first `upto` tokens (fewer when the pane has fewer).

        `version` moves when the pane's records changed (see `PaneVersions`); without
        one, every call counts as a change.
        """
        self._pane, self._upto = pane, upto
        self._version = self._version + 1 if version is None else version
        self._marks = marks
        if self.is_mounted:
            self._sync_keys()

    def _sync_keys(self) -> None:
        pane = self._pane
        if pane is None:
            return
        width = max(self.content_size.width, 12)
        upto = min(self._upto, len(pane.records))
        if self._titled != (pane.name, width):  # cut between words, never inside one
            self._titled = (pane.name, width)
            self.border_title = Text(cut_items(shown_line(pane.name), max(width - 4, 6)),
                                     style="bold")
        self.recipe_line = cut_items(shown_line(pane.recipe), width)
        self.status_key = (self._version, upto, width)
        self.body_key = (self._version, upto, width, self._marks, self.prompt)

    def watch_recipe_line(self, line: str) -> None:
        self.query_one(".pane-recipe", Static).update(Text(line))

    def watch_status_key(self, key: tuple) -> None:
        if self._pane is None or not key:
            return
        _, upto, width = key
        self.query_one(".pane-status", Static).update(
            status_text(self._pane.records[:upto], len(self._pane.records), width))

    def watch_body_key(self, key: tuple) -> None:
        if self._pane is None or not key:
            return
        _, upto, width, marks, _ = key
        self.body_draws += 1
        tail = prompt_tail(self.prompt, PROMPT_TAIL_LINES * width)
        shown_marks = tuple(m for m in marks if m.step < upto)
        self.query_one(".pane-body", Static).update(
            pane_text(self._pane.records[:upto], self.scheme, tail, shown_marks))
        scroll = self.query_one(".pane-scroll", VerticalScroll)
        scroll.scroll_end(animate=False, x_axis=False)  # after the next layout

    def on_resize(self) -> None:
        self._sync_keys()

    def on_click(self, event: events.Click) -> None:
        step = event.style.meta.get("step") if event.style else None
        self.focus()
        if isinstance(step, int) and self._pane is not None:
            event.stop()
            self.post_message(self.TokenClicked(self, self.pane_id, step))
