"""The token encoding as Rich styles, at the terminal's colour depth.

The encoding itself is plain data in `tui.token_style` (the reports read it too): shape
(underline, weight) for the token's rank under the model, ink (a lightness ramp of one
hue, italics on its last step) for its probability under the pane's final distribution.
This module only turns that into Rich styles for one depth, builds the legend from the
very styles the tokens get (so that mono's legend shows each style as it renders), and
finds the depth from the console Textual writes to.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

from rich.console import Console
from rich.style import Style
from rich.text import Text

from tui import token_style as ts
from tui.token_style import Depth

OKABE_ITO = ts.OKABE_ITO
PANE_BACKGROUND = ts.PANE_BACKGROUND  # app.tcss uses the same value
PROMPT_STYLE = Style(color=ts.PROMPT_COLOUR, bgcolor=PANE_BACKGROUND, italic=True)
FORCED_MARK = ts.FORCED_MARK
RANK_BANDS = ts.RANK_BANDS
FINAL_BANDS = ts.FINAL_BANDS
rank_band = ts.rank_band
final_band = ts.final_band
blend = ts.blend

# The legend at two widths: every band's meaning from WIDE_LEGEND columns on, else its ranks.
WIDE_LEGEND = 150
SHORT_NAMES = ("own pick", "alternative", "long shot")


def console_depth(console: Console) -> Depth:
    """The depth of the terminal behind `console` (Rich found it from TERM, COLORTERM...)."""
    return ts.depth_of(console.color_system)  # "truecolor", "256", "standard", "windows" or None


@dataclass(frozen=True)
class Scheme:
    """The style of every token at one depth ("mono": shapes and greys only)."""

    depth: Depth = "truecolor"

    @property
    def mono(self) -> bool:
        return self.depth == "mono"

    def token_style(self, rank: int, final_prob: float, *, alternate: bool = False,
                    forced: bool = False) -> Style:
        """The style of one emitted token; `alternate` for every other token."""
        return _token_style(self.depth, rank_band(rank), final_band(min(final_prob, 1.0)),
                            alternate, forced)

    def band_style(self, rank_i: int, final_i: int, *, forced: bool = False) -> Style:
        """The style of a band pair (indices into the band tables), on the plain background."""
        return _token_style(self.depth, rank_i, final_i, False, forced)

    def rank_style(self, rank: int) -> Style:
        """Rank alone (the inspect table's token column), in the plain ink."""
        return _token_style(self.depth, rank_band(rank), 0, False, False)

    def marker_style(self) -> Style:
        pal = ts.PALETTES[self.depth]
        return Style(color=pal.forced, bgcolor=pal.background, bold=True)

    def annotation_style(self) -> Style:
        """The parting, fork and edit marks inside a pane's text."""
        pal = ts.PALETTES[self.depth]
        return Style(color=pal.mark, bgcolor=pal.background, bold=True)

    def legend(self, width: int = 80) -> Text:
        """The always-visible key, one line: each sample in the style tokens get."""
        wide = width >= WIDE_LEGEND
        text = Text("model rank ", style="bold")
        for i, band in enumerate(RANK_BANDS):
            label = f"{SHORT_NAMES[i]} {band.label}" if wide else band.label
            text.append(label, self.band_style(i, 0))
            text.append(" ")
        text.append("\u2502 pane p ", style="bold")
        for j, band in enumerate(FINAL_BANDS):
            text.append(band.label, self.band_style(0, j))
            text.append(" ")
        text.append("\u2502 ", style="bold")
        text.append(FORCED_MARK, self.marker_style())
        text.append("forced", self.band_style(0, 0, forced=True))
        mark = self.annotation_style()
        text.append(" ")
        text.append(ts.PART_MARK, mark)
        text.append("parts " if wide else " ")
        text.append(ts.FORK_MARK, mark)
        text.append("fork " if wide else " ")
        text.append(ts.EDIT_MARK, mark)
        text.append("edit" if wide else "")
        return text


@lru_cache(maxsize=512)
def _token_style(depth: Depth, rank_i: int, final_i: int, alternate: bool,
                 forced: bool) -> Style:
    c = ts.band_colours(rank_i, final_i, alternate=alternate, forced=forced, depth=depth)
    return Style(color=c.foreground, bgcolor=c.background, bold=c.bold, underline=c.underline,
                 italic=c.italic)
