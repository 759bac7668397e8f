"""The token encoding: bands, one hue's ramp, depths, contrast, colour blindness, mono.

References:
- W3C WCAG 2.1, sec. 1.4.3 and its definitions of relative luminance and contrast ratio
  (the 4.5:1 minimum for text).
- Machado, Oliveira & Fernandes 2009, "A physiologically-based model for simulation of
  color vision deficiency" (IEEE TVCG 15(6)), as implemented by the PyPI library
  colorspacious 1.1.2 (`sRGB1+CVD`, severity 100 = dichromacy); colour distances in its
  CAM02-UCS space (Luo, Cui & Li 2006) with `colorspacious.deltaE`.
- Okabe & Ito 2008, "Color Universal Design" (the palette's sRGB values, recalled from
  memory as reprinted by Wong 2011).
- xterm's 256-colour palette and Rich's 16 standard colours: Rich 15 (`Color.downgrade`)
  does what a terminal's colour reduction does.
"""

from __future__ import annotations

import colorsys
import itertools

import colorspacious
import numpy as np
import pytest
from rich.color import Color, ColorSystem

from tui import token_style as ts
from tui.app.colouring import FINAL_BANDS, OKABE_ITO, RANK_BANDS, Scheme, final_band, rank_band


def relative_luminance(hex_colour: str) -> float:
    # WCAG 2.1, definition "relative luminance" (sRGB linearisation, Rec. 709 weights)
    r, g, b = (int(hex_colour[i:i + 2], 16) / 255 for i in (1, 3, 5))
    lin = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in (r, g, b)]
    return 0.2126 * lin[0] + 0.7152 * lin[1] + 0.0722 * lin[2]


def contrast(a: str, b: str) -> float:
    # WCAG 2.1, definition "contrast ratio": (L1 + 0.05) / (L2 + 0.05), L1 the lighter
    hi, lo = sorted((relative_luminance(a), relative_luminance(b)), reverse=True)
    return (hi + 0.05) / (lo + 0.05)


def test_contrast_formula_on_known_pairs():
    assert contrast("#000000", "#ffffff") == pytest.approx(21.0)  # WCAG: the maximum
    assert contrast("#777777", "#ffffff") == pytest.approx(4.48, abs=0.01)  # a famous near-miss


def test_palette_is_okabe_ito_and_the_ink_is_one_hue():
    # Okabe & Ito 2008 (values recalled from memory)
    assert OKABE_ITO == {
        "black": "#000000", "orange": "#E69F00", "sky_blue": "#56B4E9",
        "bluish_green": "#009E73", "yellow": "#F0E442", "blue": "#0072B2",
        "vermillion": "#D55E00", "reddish_purple": "#CC79A7",
    }
    # the true-colour ramp: the coloured steps share sky blue's hue (HLS hue within 4
    # degrees, by the standard library's colorsys), not a hue per band
    def hue(h: str) -> float:
        return colorsys.rgb_to_hls(*(c / 255 for c in ts.rgb(h)))[0] * 360

    sky = hue(OKABE_ITO["sky_blue"])
    for step in ts.PALETTES["truecolor"].ink[1:]:
        assert abs(hue(step) - sky) < 4, step


@pytest.mark.parametrize("depth", ["truecolor", "256", "mono"])
def test_the_ink_is_a_lightness_ramp(depth):
    # lighter = more likely under the recipe; each step at least 1.3 times darker in WCAG
    # contrast terms (a visible step: common practice, no source)
    ink = ts.PALETTES[depth].ink
    for lighter, darker in zip(ink, ink[1:]):
        assert contrast(lighter, darker) >= 1.3, (depth, lighter, darker)


@pytest.mark.parametrize("rank,band", [(1, 0), (2, 1), (3, 1), (10, 1), (11, 2), (50, 2),
                                       (49152, 2)])
def test_rank_bands(rank, band):
    assert rank_band(rank) == band


@pytest.mark.parametrize("p,band", [(1.0, 0), (0.5, 0), (0.4999, 1), (0.05, 1), (0.0499, 2),
                                    (0.0, 2)])
def test_final_bands(p, band):
    assert final_band(p) == band


def test_bad_band_inputs_are_refused():
    with pytest.raises(ValueError, match="rank"):
        rank_band(0)
    with pytest.raises(ValueError, match="final probability"):
        final_band(1.5)


def _cases():
    ranks = [b.low for b in RANK_BANDS]
    probs = [0.9, 0.2, 0.01]
    return list(itertools.product(ranks, probs))


@pytest.mark.parametrize("depth", ts.DEPTHS)
def test_every_band_pair_looks_different(depth):
    scheme = Scheme(depth)
    for alternate in (False, True):
        styles = {scheme.token_style(r, p, alternate=alternate) for r, p in _cases()}
        assert len(styles) == len(RANK_BANDS) * len(FINAL_BANDS)


@pytest.mark.parametrize("depth", ts.DEPTHS)
def test_the_rank_reads_from_shape_alone_at_every_depth(depth):
    # the rank channel needs no colour: plain, underline, bold underline
    scheme = Scheme(depth)
    shapes = {(bool(s.bold), bool(s.underline))
              for s in (scheme.token_style(b.low, 0.9) for b in RANK_BANDS)}
    assert shapes == {(False, False), (False, True), (True, True)}


@pytest.mark.parametrize("system,depth", [(ColorSystem.EIGHT_BIT, "256"),
                                          (ColorSystem.STANDARD, "16")])
def test_the_ink_survives_the_terminals_colour_reduction(system, depth):
    # Rich maps each colour to the nearest one of the smaller palette, as a terminal
    # would; the three ink steps and both backgrounds must land on the colours chosen
    # (each is a palette entry itself), so that no two steps merge
    from rich._palettes import EIGHT_BIT_PALETTE, STANDARD_PALETTE

    table = EIGHT_BIT_PALETTE if depth == "256" else STANDARD_PALETTE
    pal = ts.PALETTES[depth]
    for colour in (*pal.ink, pal.background, pal.alternate, pal.forced):
        reduced = Color.parse(colour).downgrade(system)
        assert table[reduced.number].hex == colour.lower(), (depth, colour)
    numbers = [Color.parse(c).downgrade(system).number for c in pal.ink]
    assert len(set(numbers)) == 3
    if depth == "16":  # white, bright cyan, cyan: three different slots
        assert numbers == [7, 14, 6]
    else:  # the token boundary shade stays apart from the pane's
        assert Color.parse(pal.alternate).downgrade(system).number != \
            Color.parse(pal.background).downgrade(system).number


@pytest.mark.parametrize("depth", ts.DEPTHS)
@pytest.mark.parametrize("cvd", ["protanomaly", "deuteranomaly", "tritanomaly"])
def test_the_ink_steps_stay_apart_under_colour_blindness(depth, cvd):
    # Machado et al. 2009 at full severity (colorspacious); neighbouring steps at least
    # 10 CAM02-UCS units apart (distinct at a glance: common practice, no source)
    space = {"name": "sRGB1+CVD", "cvd_type": cvd, "severity": 100}
    ink = [np.array(ts.rgb(c)) / 255 for c in ts.PALETTES[depth].ink]
    for a, b in zip(ink, ink[1:]):
        assert colorspacious.deltaE(a, b, input_space=space) >= 10, (depth, cvd)


@pytest.mark.parametrize("depth", ts.DEPTHS)
def test_every_token_style_meets_the_text_contrast_minimum(depth):
    # WCAG 2.1 sec. 1.4.3: at least 4.5:1 for text (16 colours: on Rich's standard
    # palette; a terminal's own theme decides there)
    scheme = Scheme(depth)
    for (r, p), alternate, forced in itertools.product(_cases(), (False, True), (False, True)):
        style = scheme.token_style(r, p, alternate=alternate, forced=forced)
        fg, bg = style.color.triplet.hex, style.bgcolor.triplet.hex
        assert contrast(fg, bg) >= 4.5, (depth, r, p, alternate, forced, fg, bg)
    for style in (scheme.marker_style(), scheme.annotation_style()):
        assert contrast(style.color.triplet.hex, style.bgcolor.triplet.hex) >= 4.5


def test_neighbouring_tokens_differ():
    # token boundaries: the same band pair, alternating, must not look the same
    for depth in ("truecolor", "256", "mono"):
        scheme = Scheme(depth)
        for r, p in _cases():
            assert scheme.token_style(r, p) != scheme.token_style(r, p, alternate=True)


@pytest.mark.parametrize("depth", ts.DEPTHS)
def test_the_legend_shows_each_band_in_the_style_its_tokens_get(depth):
    scheme = Scheme(depth)
    legend = scheme.legend(200)
    plain = legend.plain
    for i, band in enumerate(RANK_BANDS):
        start = plain.index(band.label)
        assert legend.get_style_at_offset(_console(), start) == scheme.band_style(i, 0)
    for j, band in enumerate(FINAL_BANDS):
        start = plain.index(band.label)
        assert legend.get_style_at_offset(_console(), start) == scheme.band_style(0, j)
    assert len(scheme.legend(80).plain) <= 78  # one line at the smallest screen


def _console():
    from rich.console import Console

    return Console()


@pytest.mark.parametrize("system,depth", [("truecolor", "truecolor"), ("256", "256"),
                                          ("standard", "16"), ("windows", "16"), (None, "mono")])
def test_depth_from_the_colour_system(system, depth):
    assert ts.depth_of(system) == depth
    assert ts.depth_of(system, mono=True) == "mono"


def test_blend_ends():
    assert ts.blend("#ffffff", "#000000", 0.0) == "#000000"
    assert ts.blend("#ffffff", "#000000", 1.0) == "#ffffff"
    assert ts.blend("#ffffff", "#000000", 0.5) == "#808080"
