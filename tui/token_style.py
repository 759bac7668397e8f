"""The one token encoding, as plain data: two channels, one per question, at every colour depth.

Every view of a token reads this module, so that a look means the same thing everywhere:
the app (`tui/app/colouring.py` turns these into Rich styles), the HTML report (CSS) and
the Markdown report (words). Standard library only: no Textual, no Rich.

The encoding ("shape for the model, ink for the recipe"):

- shape = the token's rank under the model (the raw distribution), in three bands chosen
  for this job: the model's own pick (rank 1) is plain text; a plausible alternative
  (ranks 2-10) is underlined; a long shot the recipe let in (rank > 10) is bold and
  underlined. Shape needs no colour, so it reads the same in every depth and in mono.
- ink = the token's probability under the pane's final (truncated) distribution, as a
  lightness ramp of one hue (sky blue, from Okabe and Ito's colour-blind-safe palette,
  2008): >= 50 % the plain pale ink, 5-50 % pale sky, < 5 % deep sky in italics. A ramp
  of lightness survives every common colour-vision deficiency (only lightness is needed),
  and the italics of the last step make it readable where the ink is not (mono, a
  16-colour palette the terminal chose).
- a token chosen by hand: a marker before it and a bluish green chip behind it (dark text).
- token boundaries: neighbours alternate between two close background shades.

Colour depth: a terminal with 256 or 16 colours maps a true colour to the nearest one it
has, which merged close shades before. So each depth has its own ink, picked from that
depth's own palette (xterm's 256-colour cube and grey ramp; the 16 standard slots, as
Rich numbers them), so that nothing is merged by the terminal. Mono uses greys (the app's
monochrome filter keeps lightness) and the same shapes.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from typing import Literal

Depth = Literal["truecolor", "256", "16", "mono"]
DEPTHS: tuple[Depth, ...] = ("truecolor", "256", "16", "mono")

# Okabe & Ito 2008, the eight-colour palette. sRGB values as reprinted by Wong 2011,
# Nature Methods 8:441 (recalled from memory).
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
NEUTRAL = "#dcdfe4"  # plain text: the pale ink
DARK_TEXT = "#0b0c0e"  # text on a chip (a forced token)
PROMPT_COLOUR = "#7c828c"  # the prompt, in italics
FORCED_COLOUR = OKABE_ITO["bluish_green"]
FORCED_MARK = "\u25b8"  # BLACK RIGHT-POINTING SMALL TRIANGLE, before a forced token
PART_MARK = "\u2260"  # NOT EQUAL TO: this pane's text leaves the compared pane's here
FORK_MARK = "\u21b1"  # UPWARDS ARROW WITH TIP RIGHT: this pane was forked here
EDIT_MARK = "\u0394"  # GREEK CAPITAL DELTA: the recipe changed from here on


@dataclass(frozen=True)
class Palette:
    """The colours of one depth: backgrounds, the ink ramp, the chips, as #rrggbb."""

    background: str  # a pane's background as the terminal shows it
    alternate: str  # every other token
    ink: tuple[str, str, str]  # one per final band, most likely first
    forced: str  # the chip behind a forced token
    dark_text: str  # text on the chip
    mark: str  # annotation marks (parting, fork, edit)


# xterm's 256 colours: 231 = #ffffff, 117 = #87d7ff, 74 = #5fafd7 (cube steps 0, 95, 135,
# 175, 215, 255), 233 = #121212, 235 = #262626, 36 = #00af87, 232 = #080808, 180 = #d7af87.
# The 16 standard colours as Rich numbers them (rich._palettes.STANDARD_PALETTE, the VGA
# values): 7 white #aaaaaa, 14 bright cyan #55ffff, 6 cyan #00aaaa, 0 black, 10 bright
# green #55ff55, 11 bright yellow #ffff55. The terminal shows its own shades for these
# slots; the slots are what stay apart.
PALETTES: dict[Depth, Palette] = {
    "truecolor": Palette(PANE_BACKGROUND, "#22252b", (NEUTRAL, "#8fcbef", "#3d9be0"),
                         FORCED_COLOUR, DARK_TEXT, "#e0b878"),
    "256": Palette("#121212", "#262626", ("#ffffff", "#87d7ff", "#5fafd7"),
                   "#00af87", "#080808", "#d7af87"),
    "16": Palette("#000000", "#000000", ("#aaaaaa", "#55ffff", "#00aaaa"),
                  "#55ff55", "#000000", "#ffff55"),
    "mono": Palette(PANE_BACKGROUND, "#22252b", ("#dcdcdc", "#ababab", "#8f8f8f"),
                    "#ffffff", DARK_TEXT, "#ffffff"),
}


@dataclass(frozen=True)
class RankBand:
    """Raw ranks `low..high` (high None = no upper end); 1 = the model's first choice."""

    name: str  # what the band means, for legends
    label: str  # the ranks, short
    low: int
    high: int | None
    underline: bool
    bold: bool


@dataclass(frozen=True)
class FinalBand:
    """Final probabilities in [low, the previous band's low), and their step of the ramp."""

    name: str
    label: str
    low: float
    italic: bool


RANK_BANDS: tuple[RankBand, ...] = (
    RankBand("the model's own pick", "1", 1, 1, False, False),
    RankBand("a plausible alternative", "2-10", 2, 10, True, False),
    RankBand("a long shot the recipe let in", ">10", 11, None, True, True),
)

FINAL_BANDS: tuple[FinalBand, ...] = (
    FinalBand("likely under the recipe", ">=50%", 0.5, False),
    FinalBand("an open draw", "5-50%", 0.05, False),
    FinalBand("a lucky draw", "<5%", 0.0, True),
)


@dataclass(frozen=True)
class TokenColours:
    """How one token is drawn: text and background as #rrggbb, and its shape."""

    foreground: str
    background: str
    bold: bool
    underline: bool
    italic: bool
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
    a, b = rgb(colour), rgb(base)
    mix = [round(y + (x - y) * amount) for x, y in zip(a, b)]
    return "#{:02x}{:02x}{:02x}".format(*mix)


def rgb(hex_colour: str) -> tuple[int, int, int]:
    """#rrggbb as three 0-255 integers."""
    h = hex_colour.lstrip("#")
    if len(h) != 6:
        raise ValueError(f"colour must be #rrggbb, got {hex_colour!r}")
    return int(h[0:2], 16), int(h[2:4], 16), int(h[4:6], 16)



def token_colours(rank: int, final_prob: float, *, alternate: bool = False,
                  forced: bool = False, depth: Depth = "truecolor") -> TokenColours:
    """The look of one emitted token; `alternate` for every other token."""
    return band_colours(rank_band(rank), final_band(min(final_prob, 1.0)),
                        alternate=alternate, forced=forced, depth=depth)


@lru_cache(maxsize=256)
def band_colours(rank_i: int, final_i: int, *, alternate: bool = False, forced: bool = False,
                 depth: Depth = "truecolor") -> TokenColours:
    """The look for a rank band and a final band (indices into the two band tables)."""
    pal = PALETTES[depth]
    rank, final = RANK_BANDS[rank_i], FINAL_BANDS[final_i]
    if forced:  # the chip: dark text on bluish green; the shape still tells the rank
        return TokenColours(pal.dark_text, pal.forced, rank.bold, rank.underline, final.italic,
                            rank_i, final_i)
    return TokenColours(pal.ink[final_i], pal.alternate if alternate else pal.background,
                        rank.bold, rank.underline, final.italic, rank_i, final_i)


def depth_of(color_system: str | None, mono: bool = False) -> Depth:
    """The depth for a terminal's colour system (Rich's names: truecolor, 256, standard,
    windows; None for no colour)."""
    if mono or color_system is None:
        return "mono"
    return {"truecolor": "truecolor", "256": "256"}.get(color_system, "16")  # type: ignore[return-value]


LEGEND_TEXT = (
    "Shape = the token's rank under the model: plain for the model's own pick (rank 1), "
    "underlined for a plausible alternative (2-10), bold and underlined for a long shot "
    "the recipe let in (>10). Ink = its probability under the pane's final distribution, "
    "one hue from pale to deep: the plain pale ink at >= 50%, pale sky blue at 5-50%, "
    "deep sky blue in italics below 5%. "
    f"A bluish green chip with {FORCED_MARK} = a token chosen by hand."
)
