"""The one token colouring scheme, as plain data: bands, Okabe–Ito colours, legend.

Every view of a token must read this module, so that a colour means the same thing
everywhere: the app's colouring (`tui/app/colouring.py`) must take its bands, colours
and washes from here and only turn them into Rich styles; the HTML and Markdown reports
turn them into CSS and words. Standard library only: no Textual, no Rich.

The scheme (the app's, first written in `tui/app/colouring.py`):

- colour = the token's rank in the raw model distribution, in five bands
  (1, 2-3, 4-10, 11-50, >50): plain light grey for the model's first choice, then sky
  blue, yellow, orange and reddish purple, from the palette of Okabe and Ito (2008),
  "Color Universal Design", which stays distinguishable under common colour blindness.
  (Its darker hues are too dark for text on the dark pane background.) Without colour
  each band is a text style instead (plain, italic, underline, bold, bold underline).
- background = the token's probability under the pane's final distribution, in three
  bands (>= 50 %, 5-50 %, < 5 %): none, a faint wash of the token's hue, or the hue as
  a full highlighter behind dark text. The less sure the draw, the louder.
- a token chosen by hand has a bluish green background and a marker before it;
  neighbouring tokens alternate between two close background shades.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

# Okabe & Ito 2008, the eight-colour palette. sRGB values as reprinted by Wong 2011,
# Nature Methods 8:441 (recalled from memory, as in tui/app/colouring.py).
OKABE_ITO: dict[str, str] = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
}

PANE_BACKGROUND = "#16181c"  # a pane's background (the app's app.tcss uses the same)
ALTERNATE_BACKGROUND = "#22252b"  # every other token, to show token boundaries
NEUTRAL = "#dcdfe4"  # rank 1: plain text
DARK_TEXT = "#0b0c0e"  # text on a highlighter background
PROMPT_COLOUR = "#7c828c"  # the prompt, in italics
FORCED_COLOUR = OKABE_ITO["bluish_green"]
FORCED_MARK = "\u25b8"  # BLACK RIGHT-POINTING SMALL TRIANGLE, before a forced token
MONO_WASH = "#b9bdc4"  # the grey that mono mode washes with


@dataclass(frozen=True)
class RankBand:
    """Raw ranks `low..high` (high None = no upper end); 1 = the model's first choice."""

    label: str
    low: int
    high: int | None
    colour: str  # hex text colour
    mono: tuple[str, ...]  # text attributes without colour: "italic", "underline", "bold"


@dataclass(frozen=True)
class FinalBand:
    """Final probabilities in [low, the previous band's low) and the wash behind them."""

    label: str
    low: float
    wash: float  # 0 = no wash, 1 = the band colour itself (a highlighter, dark text)


RANK_BANDS: tuple[RankBand, ...] = (
    RankBand("1", 1, 1, NEUTRAL, ()),
    RankBand("2-3", 2, 3, OKABE_ITO["sky_blue"], ("italic",)),
    RankBand("4-10", 4, 10, OKABE_ITO["yellow"], ("underline",)),
    RankBand("11-50", 11, 50, OKABE_ITO["orange"], ("bold",)),
    RankBand(">50", 51, None, OKABE_ITO["reddish_purple"], ("bold", "underline")),
)

FINAL_BANDS: tuple[FinalBand, ...] = (
    FinalBand(">=50%", 0.5, 0.0),
    FinalBand("5-50%", 0.05, 0.16),
    FinalBand("<5%", 0.0, 1.0),
)


@dataclass(frozen=True)
class TokenColours:
    """How one token is drawn in colour: text and background as #rrggbb, and weight."""

    foreground: str
    background: str
    bold: bool
    rank_band: int  # index into RANK_BANDS
    final_band: int  # index into FINAL_BANDS


def rank_band(rank: int) -> int:
    """Index into RANK_BANDS for a raw rank (1 = most likely)."""
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
    a, b = _rgb(colour), _rgb(base)
    mix = [round(y + (x - y) * amount) for x, y in zip(a, b)]
    return "#{:02x}{:02x}{:02x}".format(*mix)


def _rgb(hex_colour: str) -> tuple[int, int, int]:
    h = hex_colour.lstrip("#")
    if len(h) != 6:
        raise ValueError(f"colour must be #rrggbb, got {hex_colour!r}")
    return int(h[0:2], 16), int(h[2:4], 16), int(h[4:6], 16)


def token_colours(rank: int, final_prob: float, *, alternate: bool = False,
                  forced: bool = False, mono: bool = False) -> TokenColours:
    """The colours of one emitted token; `alternate` for every other token."""
    return band_colours(rank_band(rank), final_band(min(final_prob, 1.0)),
                        alternate=alternate, forced=forced, mono=mono)


@lru_cache(maxsize=256)
def band_colours(rank_i: int, final_i: int, *, alternate: bool = False, forced: bool = False,
                 mono: bool = False) -> TokenColours:
    """The colours for a rank band and a final band (indices into the two band tables)."""
    band, wash = RANK_BANDS[rank_i], FINAL_BANDS[final_i].wash
    hue = MONO_WASH if mono else band.colour
    base = ALTERNATE_BACKGROUND if alternate else PANE_BACKGROUND
    if forced:
        mark = "#ffffff" if mono else FORCED_COLOUR
        return TokenColours(DARK_TEXT, blend(mark, base, 0.85 if alternate else 1.0), True,
                            rank_i, final_i)
    if wash >= 1.0:  # highlighter: the band colour behind dark text
        return TokenColours(DARK_TEXT, blend(hue, base, 0.82 if alternate else 1.0), False,
                            rank_i, final_i)
    # a wash alternates by its strength (a lighter base would cost contrast)
    bg = blend(hue, PANE_BACKGROUND, wash - (0.06 if alternate else 0.0)) if wash else base
    return TokenColours(NEUTRAL if mono else band.colour, bg, False, rank_i, final_i)


LEGEND_TEXT = (
    "Text colour = the token's rank in the model's raw distribution "
    "(1, 2-3, 4-10, 11-50, >50: grey, sky blue, yellow, orange, reddish purple). "
    "Background = its probability under the pane's final distribution: none at >= 50%, "
    "a faint wash at 5-50%, a full highlighter below 5%. "
    f"Bluish green with {FORCED_MARK} = a token chosen by hand."
)
