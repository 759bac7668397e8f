"""Facts of the trade and worked examples for the stages, checked against outside sources.

Sources: scipy (softmax, entropy), hand computation from the papers' definitions,
and common practice where no paper exists (marked so).
"""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
import scipy.special
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from tui.decoding import Recipe, RecipeError, entropy

FAST = settings(max_examples=60, deadline=None)

finite_logits = arrays(
    np.float64,
    st.integers(2, 400),
    elements=st.floats(-30, 30, allow_nan=False, allow_infinity=False),
)


def dist(text: str, x: object, history: list[int] | tuple = ()) -> np.ndarray:
    return Recipe.parse(text).distribution(x, history)


# --- temperature ---------------------------------------------------------------------


@FAST
@given(finite_logits)
def test_temperature_one_is_the_softmax(x: np.ndarray) -> None:
    # common practice, no source: T = 1 leaves the softmax unchanged; reference: scipy.special.softmax
    np.testing.assert_allclose(dist("temperature=1", x), scipy.special.softmax(x), rtol=1e-12, atol=1e-300)
    np.testing.assert_allclose(dist("", x), scipy.special.softmax(x), rtol=1e-12, atol=1e-300)


def test_temperature_toward_zero_approaches_one_hot_on_the_argmax() -> None:
    # common practice, no source: as T falls to 0 the distribution tends to one-hot on the argmax
    x = np.random.default_rng(0).standard_normal(1000)
    top = int(np.argmax(x))
    tops = [dist(f"temperature={t}", x)[top] for t in (1.0, 0.3, 0.1, 0.03, 0.01)]
    assert tops == sorted(tops) and tops[0] < 0.1 and tops[-1] > 1 - 1e-6


@FAST
@given(finite_logits.filter(lambda x: np.ptp(x) > 1e-3), st.floats(1.05, 5.0))
def test_temperature_above_one_raises_the_entropy(x: np.ndarray, t: float) -> None:
    # common practice, no source: T > 1 flattens, so entropy rises; reference: scipy.stats.entropy
    before = scipy.stats.entropy(dist("", x))
    assert scipy.stats.entropy(dist(f"temperature={t!r}", x)) > before


@pytest.mark.parametrize("text", ["greedy", "temperature=0"])
def test_greedy_is_one_hot_on_the_argmax_lowest_id_on_ties(text: str) -> None:
    # common practice, no source: greedy picks the argmax; ties go to the lowest token id
    assert dist(text, np.array([0.5, 2.0, 1.0, 2.0])).tolist() == [0.0, 1.0, 0.0, 0.0]
    assert Recipe.parse("temperature=0") == Recipe.parse("greedy")


# --- truncation facts ------------------------------------------------------------------


@FAST
@given(finite_logits)
def test_top_p_one_and_top_k_zero_keep_everything(x: np.ndarray) -> None:
    # common practice, no source: top_p = 1 and top_k = 0 are "off"
    assert np.count_nonzero(Recipe.parse("top_p=1").trace(x)[-1].kept_mask) == x.size
    assert np.count_nonzero(Recipe.parse("top_k=0").trace(x)[-1].kept_mask) == x.size


def test_nucleus_keeps_fewer_tokens_on_a_peaked_than_on_a_flat_distribution() -> None:
    # common practice, no source (Holtzman et al. 2020 motivate nucleus by exactly this)
    rng = np.random.default_rng(1)
    flat = rng.standard_normal(5000) * 0.2
    peaked = flat.copy()
    peaked[:5] += 8.0
    kept = {name: int((dist("top_p=0.9", x) > 0).sum()) for name, x in (("peaked", peaked), ("flat", flat))}
    assert kept["peaked"] < kept["flat"]


def test_top_p_worked_example() -> None:
    # Holtzman et al. 2020, sec. 3.1: smallest set whose mass reaches p; hand computation
    x = np.log([0.5, 0.3, 0.15, 0.05])
    assert (dist("top_p=0.75", x) > 0).tolist() == [True, True, False, False]  # 0.5+0.3 >= 0.75
    assert (dist("top_p=0.85", x) > 0).tolist() == [True, True, True, False]  # 0.8 < 0.85 <= 0.95
    np.testing.assert_allclose(dist("top_p=0.75", x)[:2], [0.5 / 0.8, 0.3 / 0.8], rtol=1e-12)


def test_min_p_worked_example() -> None:
    # Nguyen et al. 2024: threshold = min_p * p_max; hand computation 0.2 * 0.5 = 0.1
    x = np.log([0.5, 0.3, 0.15, 0.05])
    assert (dist("min_p=0.2", x) > 0).tolist() == [True, True, True, False]


def test_typical_p_can_cut_the_most_likely_token() -> None:
    # Meister et al. 2023: tokens are ranked by |-log p - H|, not by p; hand computation:
    # p = [0.6, 0.1 x 4], H = 1.2275 nats; -log 0.1 = 2.303 (distance 1.075), -log 0.6 = 0.511 (0.717)
    x = np.log([0.6, 0.1, 0.1, 0.1, 0.1])
    assert (dist("typical_p=0.5", x) > 0).tolist() == [True, False, False, False, False]
    # with one token slightly more likely than the rest of a flat tail, the top is the outlier
    y = np.log([0.3] + [0.7 / 20] * 20)
    kept = dist("typical_p=0.5", y) > 0
    assert not kept[0] and kept[1:].all()


def test_epsilon_and_eta_worked_examples() -> None:
    # Hewitt et al. 2022: epsilon keeps P > epsilon; eta keeps P > min(eps, sqrt(eps) exp(-H))
    x = np.log([0.7, 0.2, 0.06, 0.04])
    assert (dist("epsilon=0.05", x) > 0).tolist() == [True, True, True, False]
    h = -sum(p * math.log(p) for p in (0.7, 0.2, 0.06, 0.04))
    eta = min(0.1, math.sqrt(0.1) * math.exp(-h))  # sqrt(0.1) exp(-0.869) = 0.133, so eta = 0.1
    assert eta == 0.1
    assert (dist("eta=0.1", x) > 0).tolist() == [True, True, False, False]
    # a flatter step: H = 1.902 nats, sqrt(0.1) exp(-1.902) = 0.0472 < 0.1, so eta cuts
    # at 0.0472 and keeps the 0.06 that a bare epsilon of 0.1 would cut (worked by hand)
    x = np.log([0.3, 0.2, 0.1, 0.1, 0.1, 0.1, 0.06, 0.04])
    assert (dist("eta=0.1", x) > 0).tolist() == [True] * 7 + [False]
    assert (dist("epsilon=0.1", x) > 0).tolist() == [True, True] + [False] * 6


@FAST
@given(
    finite_logits,
    st.sampled_from(
        ["top_p=1e-9", "top_k=1", "min_p=1", "typical_p=1e-9", "epsilon=0.999", "eta=0.999",
         "mirostat(tau=0.001,learning_rate=0.1)", "greedy"]
    ),
)
def test_every_truncating_stage_keeps_at_least_one_token(x: np.ndarray, text: str) -> None:
    # the rule: every truncating stage keeps at least one token, even at extreme settings
    probs = dist(text, x)
    assert np.count_nonzero(probs) >= 1 and math.isclose(probs.sum(), 1.0, rel_tol=1e-12)


@FAST
@given(
    arrays(np.float64, st.integers(2, 60), elements=st.sampled_from([-2.0, 0.0, 0.5, 1.0, 3.0])),
    st.sampled_from(["top_k=3", "top_p=0.6", "min_p=0.3", "typical_p=0.7", "epsilon=0.1", "eta=0.05"]),
    st.randoms(use_true_random=False),
)
def test_truncation_ignores_token_ids(x: np.ndarray, text: str, rnd: object) -> None:
    # the papers (Fan et al. 2018; Holtzman et al. 2020; Nguyen et al. 2024; Meister et al. 2023;
    # Hewitt et al. 2022) define the kept set by probabilities alone, so relabelling the tokens
    # relabels the result; these vectors are full of ties, where an id-based rule would show
    perm = np.array(rnd.sample(range(x.size), x.size))  # type: ignore[attr-defined]
    relabelled, original = dist(text, x[perm]), dist(text, x)[perm]
    np.testing.assert_array_equal(relabelled > 0, original > 0)
    np.testing.assert_allclose(relabelled, original, rtol=1e-12)  # summation order may differ


# --- penalties -----------------------------------------------------------------------


def test_presence_and_frequency_penalties_worked_example() -> None:
    # additive penalties of common API practice, no paper: logit -= presence * [count > 0]
    # and logit -= frequency * count; hand computation on a flat vector
    x = np.zeros(4)
    history = [0, 0, 2]
    np.testing.assert_allclose(
        dist("presence_penalty=0.5", x, history), scipy.special.softmax([-0.5, 0, -0.5, 0]), rtol=1e-12
    )
    np.testing.assert_allclose(
        dist("frequency_penalty=0.5", x, history), scipy.special.softmax([-1.0, 0, -0.5, 0]), rtol=1e-12
    )


def test_repetition_penalty_applies_once_per_token() -> None:
    # Keskar et al. 2019: theta divides the logit of a token in the history, however often it occurs
    x = np.array([2.0, 1.0, 0.0])
    once = dist("repetition_penalty=2", x, [0])
    np.testing.assert_allclose(dist("repetition_penalty=2", x, [0, 0, 0]), once, rtol=0)
    np.testing.assert_allclose(once, scipy.special.softmax([1.0, 1.0, 0.0]), rtol=1e-12)


@pytest.mark.parametrize(
    ("n", "banned"),
    [(1, {1, 2, 3}), (2, {3}), (3, {3}), (4, set()), (6, set())],
)
def test_no_repeat_ngram_worked_examples(n: int, banned: set[int]) -> None:
    # hand computation from the rule of transformers' NoRepeatNGramLogitsProcessor (fairseq):
    # history 1 2 3 1 2; the last n-1 tokens followed by t must not form an n-gram already seen
    history = [1, 2, 3, 1, 2]
    probs = dist(f"no_repeat_ngram={n}", np.zeros(6), history)
    assert {t for t in range(6) if probs[t] == 0} == banned


def test_a_penalty_reads_the_whole_history_it_is_given() -> None:
    # transformers 5.24.0 (decoder-only) penalises over the whole context, prompt included;
    # the engine passes the prompt and the pane's tokens as one history (tui/session/engine.py)
    x = np.zeros(3)
    assert dist("presence_penalty=1", x, [2])[2] < dist("", x)[2]


# --- entropy and input checks -------------------------------------------------------------


@FAST
@given(arrays(np.float64, st.integers(1, 300), elements=st.floats(0, 10, allow_nan=False)).filter(lambda p: p.sum() > 0))
def test_entropy_matches_scipy(p: np.ndarray) -> None:
    # reference: scipy.stats.entropy (normalises its input; zeros add nothing)
    assert math.isclose(entropy(p), scipy.stats.entropy(p), rel_tol=1e-9, abs_tol=1e-12)
    assert math.isclose(entropy(p, base=2), scipy.stats.entropy(p, base=2), rel_tol=1e-9, abs_tol=1e-12)


def test_entropy_with_a_subnormal_entry() -> None:
    # reference: scipy.stats.entropy; a subnormal probability rounds to 0 after normalising
    p = np.array([5e-324, 0.5, 0.5])
    assert math.isclose(entropy(p), scipy.stats.entropy(p), rel_tol=1e-12)
    assert entropy([0.0, 1.0]) == 0.0


@pytest.mark.parametrize(
    ("bad", "word"),
    [(np.array([0.0, np.nan, 1.0]), "NaN"), (np.array([0.0, np.inf]), "+inf"), (np.full(3, -np.inf), "-inf")],
)
def test_nan_and_infinite_logits_are_refused(bad: np.ndarray, word: str) -> None:
    # the issue: NaN or infinite logits are refused with a clear message, never sampled from
    with pytest.raises(RecipeError, match=re.escape(word)):
        dist("top_p=0.9", bad)


def test_masked_logits_get_exact_zeros_and_float32_equals_float64() -> None:
    # -inf marks a masked token (common practice, no source): probability exactly 0
    x = np.array([1.0, -np.inf, 0.5, -np.inf], dtype=np.float32)
    probs = dist("temperature=0.7", x)
    assert probs.dtype == np.float64 and probs[1] == 0.0 and probs[3] == 0.0
    np.testing.assert_array_equal(probs, dist("temperature=0.7", x.astype(np.float64)))
    np.testing.assert_allclose(probs[[0, 2]], scipy.special.softmax(np.array([1.0, 0.5]) / 0.7), rtol=1e-7)


def test_history_must_hold_vocabulary_ids() -> None:
    with pytest.raises(RecipeError, match="outside the vocabulary 0..2"):
        dist("presence_penalty=1", np.zeros(3), [1, 3])
    with pytest.raises(RecipeError, match="integer token ids"):
        dist("presence_penalty=1", np.zeros(3), [1.5])
    # a recipe without penalties never looks at the history
    assert dist("", np.zeros(3), [99]).tolist() == pytest.approx([1 / 3] * 3)
