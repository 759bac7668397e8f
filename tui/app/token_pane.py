"""One pane on the main screen: its title, the prompt's tail, coloured tokens, a status line.

The pane draws a `PaneView` snapshot up to the session cursor (tokens `0..upto-1`).
Every token carries its step number in its style's meta, so that a click on a token
posts `TokenPane.TokenClicked` and the app can open the inspect view there.
"""

from __future__ import annotations

import math

from rich.style import Style
from rich.text import Text
from textual import events
from textual.app import ComposeResult
from textual.containers import Vertical, VerticalScroll
from textual.message import Message
from textual.widgets import Static

from tui.app.colouring import FORCED_MARK, PROMPT_STYLE, Scheme
from tui.app.safe_text import shown, shown_line
from tui.session.record import StepRecord
from tui.session.views import PaneView, mean_logprob

PROMPT_TAIL_LINES = 2  # about this many lines of the prompt's end show above the text


def prompt_tail(prompt_text: str, limit: int) -> str:
    """The end of the prompt, cut at a word boundary, with an ellipsis when cut."""
    if len(prompt_text) <= limit:
        return prompt_text
    tail = prompt_text[-limit:]
    cut = tail.find(" ")
    return "\u2026" + (tail[cut + 1:] if 0 <= cut < limit // 2 else tail)


def pane_text(records: tuple[StepRecord, ...] | list[StepRecord], scheme: Scheme,
              prompt: str = "") -> Text:
    """The prompt's tail (dimmed) then each token in its style, alternate shades between."""
    text = Text()  # no base style: the prompt's italics must not reach the tokens
    if prompt:
        text.append(shown(prompt), PROMPT_STYLE)
    for i, rec in enumerate(records):
        meta = Style.from_meta({"step": rec.step})
        if rec.forced:
            text.append(FORCED_MARK, scheme.marker_style() + meta)
        style = scheme.token_style(rec.rank, rec.final_prob, alternate=bool(i % 2),
                                   forced=rec.forced)
        text.append(shown(rec.text), style + meta)
    return text


def status_text(records: tuple[StepRecord, ...] | list[StepRecord], total: int,
                width: int = 200) -> Text:
    """Step, kept-set size, final entropy, mean log-probability and the stop reason.

    Parts are joined with " · " and never split across lines at a narrow `width`.
    """
    if not records:
        return Text("no tokens yet", style="dim")
    last = records[-1]
    lp = mean_logprob(records)
    # the last step shown, numbered from 0 as everywhere (transcripts, reports, inspect)
    parts = [f"step {len(records) - 1}" + (f"/{total - 1}" if total != len(records) else ""),
             f"kept {last.kept}", f"H {abs(last.final_entropy):.2f}",
             f"logp {lp:.2f}" if math.isfinite(lp) else "logp -inf"]
    if last.stop:
        parts.append(f"stopped: {last.stop}")
    text = Text()
    line = 0
    for i, part in enumerate(parts):
        if i:
            if line + 3 + len(part) > width:
                text.append("\n")
                line = 0
            else:
                text.append(" \u00b7 ")
                line += 3
        text.append(part, style="bold" if part.startswith("stopped") else "")
        line += len(part)
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

    def __init__(self, pane_id: int, scheme: Scheme, prompt: str = "") -> None:
        super().__init__(id=f"pane-{pane_id}", classes="token-pane")
        self.pane_id = pane_id
        self.scheme = scheme
        self.prompt = prompt
        self._pane: PaneView | None = None
        self._upto = 0
        self._drawn: tuple[int, int, int] | None = None  # what the body shows now

    def compose(self) -> ComposeResult:
        scroll = VerticalScroll(Static(Text(), classes="pane-body"), classes="pane-scroll")
        scroll.can_focus = False
        yield Static(Text(), classes="pane-recipe")
        yield scroll
        yield Static(Text(), classes="pane-status")

    def on_mount(self) -> None:
        self._redraw()

    @property
    def pane(self) -> PaneView | None:
        return self._pane

    def show(self, pane: PaneView, upto: int) -> None:
        """Draw `pane`'s first `upto` tokens (fewer when the pane has fewer)."""
        self._pane, self._upto = pane, upto
        if self.is_mounted:
            self._redraw()

    def _redraw(self) -> None:
        pane = self._pane
        if pane is None:
            return
        records = pane.records[: self._upto]
        width = max(self.content_size.width, 12)
        key = (id(pane.records), len(records), width)
        self.border_title = Text(shown_line(pane.name), style="bold")
        self.query_one(".pane-recipe", Static).update(Text(shown_line(pane.recipe)))
        self.query_one(".pane-status", Static).update(
            status_text(records, len(pane.records), width))
        if key != self._drawn:
            self._drawn = key
            tail = prompt_tail(self.prompt, PROMPT_TAIL_LINES * width)
            self.query_one(".pane-body", Static).update(pane_text(records, self.scheme, tail))
            scroll = self.query_one(".pane-scroll", VerticalScroll)
            scroll.scroll_end(animate=False, x_axis=False)  # after the next layout

    def on_resize(self) -> None:
        self._redraw()

    def on_click(self, event: events.Click) -> None:
        step = event.style.meta.get("step") if event.style else None
        self.focus()
        if isinstance(step, int) and self._pane is not None:
            event.stop()
            self.post_message(self.TokenClicked(self, self.pane_id, step))
