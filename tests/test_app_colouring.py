"""The token colour scheme: bands, the published palette, contrast, and mono styles.

References: Okabe & Ito 2008, "Color Universal Design" (the palette's sRGB values,
recalled from memory); W3C WCAG 2.1, sec. 1.4.3 and its definitions of relative
luminance and contrast ratio (the 4.5:1 minimum for text).
"""

from __future__ import annotations

import itertools

import pytest

from tui.app.colouring import (
    FINAL_BANDS,
    OKABE_ITO,
    RANK_BANDS,
    Scheme,
    blend,
    final_band,
    rank_band,
)


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


def test_palette_is_okabe_ito():
    # Okabe & Ito 2008 (values recalled from memory)
    assert OKABE_ITO == {
        "black": "#000000", "orange": "#E69F00", "sky_blue": "#56B4E9",
        "bluish_green": "#009E73", "yellow": "#F0E442", "blue": "#0072B2",
        "vermillion": "#D55E00", "reddish_purple": "#CC79A7",
    }
    hues = [b.colour for b in RANK_BANDS[1:]]
    assert set(hues) <= set(OKABE_ITO.values()) and len(set(hues)) == 4


@pytest.mark.parametrize("rank,band", [(1, 0), (2, 1), (3, 1), (4, 2), (10, 2), (11, 3),
                                       (50, 3), (51, 4), (49152, 4)])
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


@pytest.mark.parametrize("mono", [False, True])
def test_every_band_pair_looks_different(mono):
    scheme = Scheme(mono)
    for alternate in (False, True):
        styles = {scheme.token_style(r, p, alternate=alternate) for r, p in _cases()}
        assert len(styles) == len(RANK_BANDS) * len(FINAL_BANDS)


def test_mono_carries_the_rank_without_colour():
    # In mono the rank band must be readable from text attributes alone.
    scheme = Scheme(mono=True)
    attrs = {(s.bold, s.italic, s.underline)
             for s in (scheme.token_style(b.low, 0.9) for b in RANK_BANDS)}
    assert len(attrs) == len(RANK_BANDS)


@pytest.mark.parametrize("mono", [False, True])
def test_every_token_style_meets_the_text_contrast_minimum(mono):
    # WCAG 2.1 sec. 1.4.3: at least 4.5:1 for text
    scheme = Scheme(mono)
    for (r, p), alternate, forced in itertools.product(_cases(), (False, True), (False, True)):
        style = scheme.token_style(r, p, alternate=alternate, forced=forced)
        fg, bg = style.color.triplet.hex, style.bgcolor.triplet.hex
        assert contrast(fg, bg) >= 4.5, (r, p, alternate, forced, fg, bg)


def test_neighbouring_tokens_differ():
    # token boundaries: the same band pair, alternating, must not look the same
    scheme = Scheme()
    for r, p in _cases():
        assert scheme.token_style(r, p) != scheme.token_style(r, p, alternate=True)


def test_blend_ends():
    assert blend("#ffffff", "#000000", 0.0) == "#000000"
    assert blend("#ffffff", "#000000", 1.0) == "#ffffff"
    assert blend("#ffffff", "#000000", 0.5) == "#808080"
