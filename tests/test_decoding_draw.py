"""The inverse-CDF draw and the mass search behind it.

Sources: the inverse-CDF method's definition (common practice, no source) for the
check values; scipy.stats.chisquare for the goodness of fit; a brute-force full
sort as the reference for the partition-free search.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from tui.decoding import Recipe, RecipeError, draw, draw_order
from tui.decoding.ranking import first_reaching

FAST = settings(max_examples=60, deadline=None)


def test_inverse_cdf_check_values() -> None:
    # the method's definition (common practice, no source): [0.5, 0.3, 0.2] splits [0, 1)
    # into [0, 0.5), [0.5, 0.8), [0.8, 1)
    probs = [0.5, 0.3, 0.2]
    assert draw(probs, 0.49) == 0
    assert draw(probs, 0.79) == 1
    assert draw(probs, 0.81) == 2
    assert draw(probs, 0.0) == 0


def test_draw_orders_by_descending_probability_then_token_id() -> None:
    # the order: descending probability, ties by ascending token id; hand computation:
    # order is 2 (0.5), 0 (0.25), 1 (0.25), so [0, .5) -> 2, [.5, .75) -> 0, [.75, 1) -> 1
    probs = np.array([0.25, 0.25, 0.5, 0.0])
    assert [draw(probs, u) for u in (0.49, 0.6, 0.8)] == [2, 0, 1]
    assert draw_order(probs).tolist() == [2, 0, 1]


def test_draw_near_one_returns_the_last_kept_token_never_a_zero() -> None:
    # float rounding: the CDF may end below 1; u just under 1 must still land on a kept token
    probs = np.array([0.0, 0.3, 0.0, 0.7 - 1e-9, 0.0])  # sums to slightly less than 1
    u = math.nextafter(1.0, 0.0)
    assert draw(probs, u) == 1  # the last token in draw order (the smallest non-zero)
    big = np.zeros(60000)
    big[::7] = np.random.default_rng(0).random(big[::7].size)
    big /= big.sum()
    last = draw(big, u)
    assert big[last] > 0 and last == int(draw_order(big)[-1])


@pytest.mark.parametrize("u", [1.0, -0.1, float("nan"), 2])
def test_draw_refuses_u_outside_the_unit_interval(u: float) -> None:
    with pytest.raises(RecipeError, match=r"u must be a number in \[0, 1\)"):
        draw([0.5, 0.5], u)


def test_draw_refuses_a_vector_with_nothing_to_draw() -> None:
    with pytest.raises(RecipeError, match="all zero"):
        draw([0.0, 0.0], 0.5)
    with pytest.raises(RecipeError, match="non-negative"):
        draw([0.5, -0.1, 0.6], 0.5)


def test_twenty_thousand_draws_fit_the_distribution() -> None:
    # reference: scipy.stats.chisquare goodness of fit at p = 0.001 (the check)
    logits = np.random.default_rng(11).standard_normal(2000) * 2.5
    probs = Recipe.parse("temperature=0.9 top_k=12").distribution(logits)
    kept = np.flatnonzero(probs)
    assert kept.size == 12
    rng = np.random.default_rng(12345)
    tokens = [draw(probs, float(u)) for u in rng.random(20000)]
    observed = np.array([tokens.count(int(t)) for t in kept])
    assert observed.sum() == 20000  # never a token outside the kept set
    expected = probs[kept] * 20000
    assert scipy.stats.chisquare(observed, expected).pvalue > 0.001


def test_a_biased_draw_would_fail_the_fit() -> None:
    # the same chi-square check rejects draws from a slightly different distribution,
    # so the fit test above can fail
    probs = np.array([0.4, 0.3, 0.2, 0.1])
    skewed = np.array([0.43, 0.29, 0.19, 0.09])
    rng = np.random.default_rng(5)
    tokens = np.array([draw(skewed, float(u)) for u in rng.random(20000)])
    observed = np.bincount(tokens, minlength=4)
    assert scipy.stats.chisquare(observed, probs * 20000).pvalue < 0.001


# --- the mass search against a full sort -----------------------------------------------


def brute_force(keys: np.ndarray, mass: np.ndarray, target: float, inclusive: bool, descending: bool) -> int:
    order = np.argsort(-keys if descending else keys, kind="stable")
    running = np.cumsum(mass[order])
    i = int(np.searchsorted(running, target, side="left" if inclusive else "right"))
    return int(order[min(i, order.size - 1)])


@FAST
@given(
    size=st.sampled_from([1, 5, 600, 5000, 49152]),
    kind=st.sampled_from(["normal", "peaked", "ties", "flat"]),
    seed=st.integers(0, 2**32 - 1),
    target=st.floats(0.0, 1.0),
    inclusive=st.booleans(),
    descending=st.booleans(),
)
def test_first_reaching_matches_a_full_sort(
    size: int, kind: str, seed: int, target: float, inclusive: bool, descending: bool
) -> None:
    # reference: a full stable sort and cumulative sum (the definition, common practice)
    rng = np.random.default_rng(seed)
    keys = rng.standard_normal(size) * (8.0 if kind == "peaked" else 1.0)
    if kind == "ties":
        keys = np.round(keys * 3)
    elif kind == "flat":
        keys = np.zeros(size)
    mass = np.exp(keys if descending else -keys)
    mass /= mass.sum()
    expected = brute_force(keys, mass, target, inclusive, descending)
    running = np.cumsum(mass[np.argsort(-keys if descending else keys, kind="stable")])
    if np.min(np.abs(running - target)) < 1e-12:
        return  # the target sits on a boundary: summation order may decide, both are right
    assert first_reaching(keys, mass, target, inclusive=inclusive, descending=descending) == expected


@FAST
@given(seed=st.integers(0, 2**32 - 1), u=st.floats(0.0, 1.0, exclude_max=True))
def test_draw_matches_a_full_sort_on_a_large_vocabulary(seed: int, u: float) -> None:
    # reference: full stable sort by descending probability (ties by id), then the CDF
    rng = np.random.default_rng(seed)
    probs = Recipe.parse("").distribution(rng.standard_normal(49152) * 3)
    order = draw_order(probs)
    running = np.cumsum(probs[order])
    target = u * running[-1]
    if np.min(np.abs(running - target)) < 1e-12:
        return  # on a boundary: either neighbour is right
    expected = int(order[min(int(np.searchsorted(running, target, side="right")), order.size - 1)])
    assert draw(probs, u) == expected
