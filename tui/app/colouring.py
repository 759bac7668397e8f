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

from rich.color import Color
from rich.style import Style
from rich.text import Text

# Okabe & Ito 2008, "Color Universal Design", the eight-colour palette. The sRGB values
# are recalled from memory (they are the ones Wong 2011, Nature Methods 8:441, reprints).
OKABE_ITO = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
}

PANE_BACKGROUND = "#16181c"  # the pane body's background (app.tcss uses the same value)
ALTERNATE_BACKGROUND = "#22252b"  # every other token, to show token boundaries
NEUTRAL = "#dcdfe4"  # rank 1: the model's own first choice, plain text
DARK_TEXT = "#0b0c0e"  # text on a highlighter background
PROMPT_STYLE = Style(color="#7c828c", bgcolor=PANE_BACKGROUND, italic=True)
FORCED_MARK = "\u25b8"  # BLACK RIGHT-POINTING SMALL TRIANGLE, before a forced token


@dataclass(frozen=True)
class RankBand:
    """Ranks `low..high` (high None = no upper end) and how they are drawn."""

    label: str
    low: int
    high: int | None
    colour: str
    mono: Style


RANK_BANDS: tuple[RankBand, ...] = (
    RankBand("1", 1, 1, NEUTRAL, Style()),
    RankBand("2-3", 2, 3, OKABE_ITO["sky_blue"], Style(italic=True)),
    RankBand("4-10", 4, 10, OKABE_ITO["yellow"], Style(underline=True)),
    RankBand("11-50", 11, 50, OKABE_ITO["orange"], Style(bold=True)),
    RankBand(">50", 51, None, OKABE_ITO["reddish_purple"], Style(bold=True, underline=True)),
)


@dataclass(frozen=True)
class FinalBand:
    """Final probabilities in [low, next band's low) and the wash drawn behind them."""

    label: str
    low: float
    wash: float  # 0 = no wash, 1 = the band colour itself (a highlighter)


FINAL_BANDS: tuple[FinalBand, ...] = (
    FinalBand(">=50%", 0.5, 0.0),
    FinalBand("5-50%", 0.05, 0.16),
    FinalBand("<5%", 0.0, 1.0),
)
MONO_WASH = "#b9bdc4"  # the grey that mono mode washes with


def rank_band(rank: int) -> int:
    """Index into RANK_BANDS for a rank (1 = most likely)."""
    if rank < 1:
        raise ValueError(f"rank must be >= 1, got {rank}")
    for i, band in enumerate(RANK_BANDS):
        if band.high is None or rank <= band.high:
            return i
    return len(RANK_BANDS) - 1


def final_band(prob: float) -> int:
    """Index into FINAL_BANDS for a final probability in [0, 1]."""
    if not 0.0 <= prob <= 1.0 + 1e-9:
        raise ValueError(f"final probability must be in [0, 1], got {prob}")
    for i, band in enumerate(FINAL_BANDS):
        if prob >= band.low:
            return i
    return len(FINAL_BANDS) - 1


def blend(colour: str, base: str, amount: float) -> str:
    """`amount` of `colour` over `base` (0 = base, 1 = colour), as #rrggbb."""
    a = Color.parse(colour).get_truecolor()
    b = Color.parse(base).get_truecolor()
    mix = [round(y + (x - y) * amount) for x, y in zip(a, b)]
    return "#{:02x}{:02x}{:02x}".format(*mix)


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
        colour = "#ffffff" if self.mono else OKABE_ITO["bluish_green"]
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
    band = RANK_BANDS[rank_i]
    wash = FINAL_BANDS[final_i].wash
    hue = MONO_WASH if mono else band.colour
    base = ALTERNATE_BACKGROUND if alternate else PANE_BACKGROUND
    if forced:
        colour = "#ffffff" if mono else OKABE_ITO["bluish_green"]
        bg = blend(colour, base, 0.85 if alternate else 1.0)
        style = Style(color=DARK_TEXT, bgcolor=bg, bold=True)
    elif wash >= 1.0:  # highlighter: the band colour behind dark text
        bg = blend(hue, base, 0.82 if alternate else 1.0)
        style = Style(color=DARK_TEXT, bgcolor=bg)
    else:
        # a wash alternates by its strength (a lighter base would cost contrast)
        bg = blend(hue, PANE_BACKGROUND, wash - (0.06 if alternate else 0.0)) if wash else base
        style = Style(color=NEUTRAL if mono else band.colour, bgcolor=bg)
    return style + band.mono if mono else style
