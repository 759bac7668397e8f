"""Order warnings of `to_generation_config()`: given exactly where the order matters.

A GenerationConfig runs its stages in transformers' fixed order (5.24.0,
`GenerationMixin._get_logits_processor`). A recipe written in another order gets the
same distribution when every pair that the fixed order swaps commutes, and then
nothing may be said; otherwise the warning must name the pair. Two checks:

- the table (`tui.decoding.hf.COMMUTING`) against our own stages: a pair listed as
  commuting gives the same distribution in both orders on many random inputs, and
  every other pair has a witness input where the two orders differ;
- both kinds of recipe against transformers itself: generate() with the exported
  config on a tiny random llama reproduces a commuting recipe at every step, and
  departs from a non-commuting one.
"""

from __future__ import annotations

import itertools
import warnings

import numpy as np
import pytest
import torch
from tiny_model import tiny_llama

from tui.decoding import (Epsilon, Eta, MinP, NoRepeatNGram, Recipe, RepetitionPenalty, Temperature,
                          TopK, TopP, TypicalP)
from tui.decoding.hf import COMMUTING, LIBRARY_ORDER, RecipeWarning

# two active settings per stage kind (each changes the distribution on these inputs)
ACTIVE = {
    RepetitionPenalty: (RepetitionPenalty(1.8), RepetitionPenalty(0.6)),
    NoRepeatNGram: (NoRepeatNGram(2), NoRepeatNGram(1)),
    Temperature: (Temperature(0.5), Temperature(1.7)),
    TopK: (TopK(8), TopK(3)),
    TopP: (TopP(0.7), TopP(0.95)),
    MinP: (MinP(0.1), MinP(0.3)),
    TypicalP: (TypicalP(0.8), TypicalP(0.4)),
    Epsilon: (Epsilon(0.02), Epsilon(0.1)),
    Eta: (Eta(0.02), Eta(0.1)),
}
assert set(ACTIVE) == set(LIBRARY_ORDER)


def random_inputs(count: int) -> list[tuple[np.ndarray, list[int]]]:
    """Logits of mixed sign (a random shift on top of a spread) and a history drawn from a
    small pool, so that tokens repeat and bigrams recur."""
    rng = np.random.default_rng(11)
    out = []
    for _ in range(count):
        x = rng.standard_normal(40) * rng.choice([0.5, 2.0, 4.0]) + rng.uniform(-6, 6)
        pool = rng.choice(40, size=5, replace=False)
        out.append((x, [int(t) for t in rng.choice(pool, size=int(rng.integers(2, 12)))]))
    return out


INPUTS = random_inputs(150)


def warns_about_order(text: str) -> str | None:
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        Recipe.parse(text).to_generation_config()
    messages = [str(w.message) for w in caught if issubclass(w.category, RecipeWarning)]
    return messages[0] if messages else None


def same(a: np.ndarray, b: np.ndarray) -> bool:
    return bool(np.array_equal(a > 0, b > 0) and np.allclose(a, b, rtol=0, atol=1e-12))


@pytest.mark.parametrize("first, second", [
    (a, b) for a, b in itertools.permutations(LIBRARY_ORDER, 2)
    if list(LIBRARY_ORDER).index(a) > list(LIBRARY_ORDER).index(b)  # the fixed order swaps them
], ids=lambda kind: kind.name)
def test_a_swapped_pair_is_named_exactly_when_its_order_changes_the_distribution(first, second) -> None:
    commutes = frozenset({first, second}) in COMMUTING
    witnesses = 0
    for a, b in itertools.product(ACTIVE[first], ACTIVE[second]):
        written, swapped = Recipe.of([a, b]), Recipe.of([b, a])
        differs = [not same(written.distribution(x, h), swapped.distribution(x, h)) for x, h in INPUTS]
        message = warns_about_order(str(written))
        if commutes:
            assert not any(differs), f"{written} and {swapped} differ on input {differs.index(True)}"
            assert message is None
        else:
            witnesses += any(differs)
            assert message is not None and f"{b.text()} will run before {a.text()}" in message
    assert commutes or witnesses, f"no witness that {first.name} and {second.name} do not commute"


def test_pairs_far_apart_are_checked_too() -> None:
    # top_p ... temperature are not neighbours here, and do not commute
    message = warns_about_order("top_p=0.9 top_k=40 temperature=0.7")
    assert message is not None
    assert "temperature=0.7 will run before top_p=0.9" in message
    assert "top_k=40 will run before top_p=0.9" in message
    assert "temperature=0.7 will run before top_k=40" not in message  # these two commute
    # a stage at its neutral value commutes with everything
    assert warns_about_order("top_p=1 temperature=0.7") is None


# --- against transformers itself ------------------------------------------------------

PROMPT = torch.tensor([[5, 17, 5, 17, 40, 5, 9, 17]])
STEPS = 8
COMMUTING_RECIPES = [
    "top_k=40 temperature=0.7",
    "temperature=0.7 repetition_penalty=1.2",
    "min_p=0.1 top_k=20",
    "temperature=0.8 no_repeat_ngram=2",
    "no_repeat_ngram=2 repetition_penalty=1.5",
    "top_p=1 temperature=0.7",
]
ORDER_CHANGING_RECIPES = [
    "top_p=0.8 temperature=0.5",
    "top_k=10 repetition_penalty=3",
    "min_p=0.2 temperature=2",
    "top_p=0.6 top_k=5",
]


@pytest.fixture(scope="module")
def model():
    lm = tiny_llama(bos_token_id=None, eos_token_id=None, pad_token_id=0)
    lm.generation_config.update(top_k=5, temperature=0.3, top_p=0.7, repetition_penalty=2.0)  # must not leak in
    return lm


def steps_against_the_recipe(model, text: str, seed: int) -> list[bool]:
    """For each step of generate() under the exported config: does it give the recipe's distribution?"""
    recipe = Recipe.parse(text)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RecipeWarning)
        config = recipe.to_generation_config()
    config.update(max_new_tokens=STEPS, output_scores=True, output_logits=True, return_dict_in_generate=True)
    torch.manual_seed(seed)
    out = model.generate(PROMPT, attention_mask=torch.ones_like(PROMPT), generation_config=config)
    agrees = []
    for step in range(STEPS):
        ours = recipe.distribution(out.logits[step][0].numpy(), out.sequences[0, : PROMPT.shape[1] + step].numpy())
        scores = out.scores[step][0]
        theirs = torch.softmax(scores.double(), dim=-1).numpy()
        agrees.append(bool(np.array_equal(torch.isfinite(scores).numpy(), ours > 0)
                           and np.allclose(theirs, ours, rtol=0, atol=1e-6)))
    return agrees


@pytest.mark.parametrize("text", COMMUTING_RECIPES)
def test_a_commuting_recipe_exports_without_warning_and_generate_reproduces_it(model, text: str) -> None:
    # reference: transformers 5.24.0 generate() with the GenerationConfig alone
    assert warns_about_order(text) is None
    assert all(steps_against_the_recipe(model, text, seed=3))


@pytest.mark.parametrize("text", ORDER_CHANGING_RECIPES)
def test_an_order_changing_recipe_warns_and_generate_departs_from_it(model, text: str) -> None:
    # reference: transformers 5.24.0 generate(); the fixed order gives another distribution
    message = warns_about_order(text)
    assert message is not None and "transformers' fixed order" in message
    assert not all(steps_against_the_recipe(model, text, seed=3))
