"""The token colour scheme: a token's raw rank and its final probability -> a Rich style.

Two facts are shown for every emitted token:

- its rank in the raw model distribution, in five bands (1, 2-3, 4-10, 11-50, >50).
  In colour the band is the text's hue, from the colour-blind-safe palette of Okabe and
  Ito (2008), "Color Universal Design": rank 1 is plain light grey, then sky blue,
  yellow, orange and reddish purple as the token strays from the model's first choice.
  (The palette's darker hues, blue, bluish green and vermillion, are too dark for text
  on a dark background: they would miss the WCAG 2.1 contrast minimum of 4.5:1.) Without colour (`--mono`, NO_COLOR) the band is a text style: plain,
  italic, underline, bold, bold underline.
- its probability under the pane's final (truncated) distribution, in three bands
  (>= 50 %, 5-50 %, < 5 %), as a background behind the token: none, a faint wash of the
  token's hue, or a full highlighter with dark text. The less sure the draw, the louder.
  Mono uses grey washes for the same three bands.

Token boundaries: consecutive tokens alternate between two close background shades
(of the band's wash), so that neighbours never merge. A forced token gets the palette's
bluish green as its background and is preceded by a marker.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

from rich.style import Style
from rich.text import Text

from tui import token_style as ts

# The scheme itself is plain data in `tui.token_style` (the reports read it too); this
# module only turns it into Rich styles.
OKABE_ITO = ts.OKABE_ITO
PANE_BACKGROUND = ts.PANE_BACKGROUND  # app.tcss uses the same value
PROMPT_STYLE = Style(color=ts.PROMPT_COLOUR, bgcolor=PANE_BACKGROUND, italic=True)
FORCED_MARK = ts.FORCED_MARK
FINAL_BANDS = ts.FINAL_BANDS
rank_band = ts.rank_band
final_band = ts.final_band
blend = ts.blend


@dataclass(frozen=True)
class RankBand:
    """Ranks `low..high` (high None = no upper end) and how they are drawn."""

    label: str
    low: int
    high: int | None
    colour: str
    mono: Style


RANK_BANDS: tuple[RankBand, ...] = tuple(
    RankBand(b.label, b.low, b.high, b.colour, Style(**{a: True for a in b.mono}))
    for b in ts.RANK_BANDS
)


@dataclass(frozen=True)
class Scheme:
    """The style of every token, in colour or in mono."""

    mono: bool = False

    def token_style(self, rank: int, final_prob: float, *, alternate: bool = False,
                    forced: bool = False) -> Style:
        """The style of one emitted token; `alternate` for every other token."""
        return _token_style(self.mono, rank_band(rank), final_band(min(final_prob, 1.0)),
                            alternate, forced)

    def rank_style(self, rank: int) -> Style:
        """Rank alone (the inspect table's token column), on the plain background."""
        return _token_style(self.mono, rank_band(rank), 0, False, False)

    def marker_style(self) -> Style:
        colour = "#ffffff" if self.mono else ts.FORCED_COLOUR
        return Style(color=colour, bgcolor=PANE_BACKGROUND, bold=True)

    def legend(self) -> Text:
        """The always-visible key to the scheme, one short line."""
        text = Text("rank ", style="bold")
        for i, band in enumerate(RANK_BANDS):
            text.append(band.label, _token_style(self.mono, i, 0, False, False))
            text.append(" ")
        text.append("\u2502 final p ", style="bold")
        sample = 0 if self.mono else 1  # in colour, a hue shows the wash best
        for j, band in enumerate(FINAL_BANDS):
            text.append(band.label, _token_style(self.mono, sample, j, False, False))
            text.append(" ")
        text.append("\u2502 ", style="bold")
        text.append(FORCED_MARK, self.marker_style())
        text.append("forced", _token_style(self.mono, 0, 0, False, True))
        return text


@lru_cache(maxsize=256)
def _token_style(mono: bool, rank_i: int, final_i: int, alternate: bool, forced: bool) -> Style:
    c = ts.band_colours(rank_i, final_i, alternate=alternate, forced=forced, mono=mono)
    style = Style(color=c.foreground, bgcolor=c.background, bold=c.bold or None)
    return style + RANK_BANDS[rank_i].mono if mono else style
