"""Recipe text, values, traces, samplers and the `recipe check` command.

Sources: the issue's grammar and messages (e.g. ``top_p must be in (0, 1], got 1.5``),
hand-computed traces, and Python's own float repr for the canonical numbers.
"""

from __future__ import annotations

import argparse
import dataclasses
import pickle

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tui.commands import recipe as recipe_command
from tui.decoding import (INPUT, STAGES, Epsilon, Eta, FrequencyPenalty, Greedy, MinP, MirostatV2,
                          NoRepeatNGram, PresencePenalty, Recipe, RecipeError, RepetitionPenalty,
                          Temperature, TopK, TopP, TypicalP, cut_by)

finite = st.floats(allow_nan=False, allow_infinity=False)
unit_open_closed = st.floats(0.0, 1.0, exclude_min=True)
stages = st.one_of(
    st.builds(Temperature, st.floats(0.0, 100.0)),
    st.builds(TopK, st.integers(0, 10**6)),
    st.builds(TopP, unit_open_closed),
    st.builds(MinP, st.floats(0.0, 1.0)),
    st.builds(TypicalP, unit_open_closed),
    st.builds(Epsilon, st.floats(0.0, 1.0, exclude_max=True)),
    st.builds(Eta, st.floats(0.0, 1.0, exclude_max=True)),
    st.builds(MirostatV2, st.floats(1e-3, 1e3), st.floats(1e-3, 10.0)),
    st.builds(RepetitionPenalty, st.floats(1e-3, 1e3)),
    st.builds(PresencePenalty, finite),
    st.builds(FrequencyPenalty, finite),
    st.builds(NoRepeatNGram, st.integers(0, 50)),
    st.just(Greedy()),
)


@settings(max_examples=150, deadline=None)
@given(st.lists(stages, max_size=6))
def test_canonical_text_parses_back_to_an_equal_recipe(chain: list) -> None:
    # the issue: str(recipe) is a canonical text that parses back to an equal recipe
    recipe = Recipe.of(chain)
    again = Recipe.parse(str(recipe))
    assert again == recipe and hash(again) == hash(recipe)
    assert str(again) == str(recipe)


def test_written_order_is_kept_and_separators_are_free() -> None:
    recipe = Recipe.parse("  repetition_penalty=1.2\ttemperature=0.8 ,top_p=0.9  ")
    assert [s.name for s in recipe.stages] == ["repetition_penalty", "temperature", "top_p"]
    assert str(recipe) == "repetition_penalty=1.2 temperature=0.8 top_p=0.9"
    assert Recipe.parse("top_p=0.9 temperature=0.8") != Recipe.parse("temperature=0.8 top_p=0.9")


@pytest.mark.parametrize(
    ("text", "canonical"),
    [
        ("temperature=1.0", "temperature=1"),  # shortest float text (Python repr), no ".0"
        ("epsilon=1e-5", "epsilon=1e-05"),
        ("eta=.0003", "eta=0.0003"),
        ("temperature=0", "greedy"),  # the issue: temperature=0 means greedy
        ("mirostat=5", "mirostat(tau=5,learning_rate=0.1)"),
        ("mirostat( tau=3, learning_rate=0.2 )", "mirostat(tau=3,learning_rate=0.2)"),
        ("presence_penalty=-0.5", "presence_penalty=-0.5"),
        ("top_k=+7", "top_k=7"),
        ("", ""),
    ],
)
def test_canonical_forms(text: str, canonical: str) -> None:
    assert str(Recipe.parse(text)) == canonical


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("top_p=1.5", "top_p must be in (0, 1], got 1.5"),  # the issue's own example
        ("top_p=0", "top_p must be in (0, 1], got 0"),
        ("min_p=1.2", "min_p must be in [0, 1], got 1.2"),
        ("typical_p=0", "typical_p must be in (0, 1], got 0"),
        ("epsilon=1", "epsilon must be in [0, 1), got 1"),
        ("eta=-0.1", "eta must be in [0, 1), got -0.1"),
        ("temperature=-1", "temperature must be >= 0, got -1"),
        ("repetition_penalty=0", "repetition_penalty must be > 0, got 0"),
        ("top_k=-3", "top_k must be a whole number >= 0, got -3"),
        ("no_repeat_ngram=-1", "no_repeat_ngram must be a whole number >= 0, got -1"),
        ("mirostat(tau=0)", "mirostat tau must be > 0, got 0"),
        ("mirostat(tau=5,learning_rate=0)", "mirostat learning_rate must be > 0, got 0"),
        ("mirostat(tau=5,eta=0.1)", "'mirostat(tau=5,eta=0.1)': mirostat parameter eta is now called "
                                    "learning_rate; write e.g. mirostat(tau=5,learning_rate=0.1)"),
        ("top_p", "'top_p': top_p needs a value, e.g. top_p=0.9"),
        ("top_p=", "'top_p=': top_p needs a value, e.g. top_p=0.9"),
        ("top_p=abc", "'top_p=abc': top_p must be a number, got 'abc'"),
        ("top_p=nan", "'top_p=nan': top_p must be a number, got 'nan'"),
        ("top_k=5.5", "'top_k=5.5': top_k must be a whole number, got '5.5'"),
        ("greedy=1", "'greedy=1': greedy takes no value; write just greedy"),
        ("mirostat", "'mirostat': mirostat needs tau, e.g. mirostat(tau=5,learning_rate=0.1)"),
        ("mirostat(tau=5,mu=3)", "'mirostat(tau=5,mu=3)': mirostat has no parameter 'mu'; it takes tau, learning_rate"),
        ("mirostat(tau=5", "unbalanced '(' in recipe 'mirostat(tau=5'"),
        ("top_p(0.9)", "'top_p(0.9)': top_p takes one value; write top_p=0.9"),
        ("9lives", "'9lives': not a stage; write name=value, e.g. top_p=0.9"),
    ],
)
def test_errors_name_the_item_and_the_allowed_range(text: str, message: str) -> None:
    with pytest.raises(RecipeError) as caught:
        Recipe.parse(text)
    assert str(caught.value) == message
    assert isinstance(caught.value, ValueError)  # the issue: RecipeError is a ValueError


def test_unknown_stage_lists_the_known_ones() -> None:
    with pytest.raises(RecipeError) as caught:
        Recipe.parse("temperature=0.7 top_q=0.9")
    text = str(caught.value)
    assert text.startswith("'top_q=0.9': unknown stage 'top_q' (did you mean top_p?); known stages: ")
    assert all(name in text for name in STAGES)


def test_recipes_are_frozen_hashable_values() -> None:
    recipe = Recipe.parse("top_k=50 top_p=0.9")
    with pytest.raises(dataclasses.FrozenInstanceError):
        recipe.stages = ()  # type: ignore[misc]
    with pytest.raises(dataclasses.FrozenInstanceError):
        recipe.stages[0].k = 3  # type: ignore[misc]
    assert {recipe: 1}[Recipe.parse("top_k=50, top_p=0.9")] == 1
    assert pickle.loads(pickle.dumps(recipe)) == recipe  # crosses process boundaries (sweeps)
    assert TopP(1) == TopP(1.0) and Recipe.of([TopK(50)]) == Recipe.parse("top_k=50")
    with pytest.raises(RecipeError, match="top_p must be a number, got '0.9'"):
        TopP("0.9")  # type: ignore[arg-type]


# --- traces ----------------------------------------------------------------------------


def test_trace_follows_the_chain_stage_by_stage() -> None:
    # hand computation: logits log[0.4, 0.3, 0.2, 0.1, 0], token 4 masked (-inf)
    x = np.array([*np.log([0.4, 0.3, 0.2, 0.1]), -np.inf])
    recipe = Recipe.parse("top_k=3 top_p=0.6")
    trace = recipe.trace(x)
    assert [(r.position, r.stage, r.kept) for r in trace] == [(0, INPUT, 4), (1, "top_k=3", 3), (2, "top_p=0.6", 2)]
    np.testing.assert_allclose(trace[1].probs, [4 / 9, 3 / 9, 2 / 9, 0, 0], rtol=1e-12)
    np.testing.assert_array_equal(trace[-1].probs, recipe.distribution(x))
    assert cut_by(trace, 0) is None  # kept to the end
    assert cut_by(trace, 2).stage == "top_p=0.6"  # type: ignore[union-attr]
    assert cut_by(trace, 3).stage == "top_k=3"  # type: ignore[union-attr]
    assert cut_by(trace, 4).position == 0  # type: ignore[union-attr]  # masked before the recipe
    assert trace[2].kept_mask.tolist() == [True, True, False, False, False]


def test_distribution_sums_to_one_with_exact_zeros_outside_the_kept_set() -> None:
    x = np.random.default_rng(2).standard_normal(49152).astype(np.float32)
    recipe = Recipe.parse("repetition_penalty=1.2 temperature=0.8 top_k=50 top_p=0.9")
    probs = recipe.distribution(x, list(range(0, 49152, 97)))
    kept = recipe.trace(x, list(range(0, 49152, 97)))[-1].kept_mask
    assert probs.dtype == np.float64 and probs.shape == (49152,)
    assert abs(probs.sum() - 1.0) < 1e-12
    assert np.all(probs[~kept] == 0.0) and np.all(probs[kept] > 0.0) and 1 <= kept.sum() <= 50


def test_the_input_vector_is_not_modified() -> None:
    x = np.random.default_rng(4).standard_normal(100)
    copy = x.copy()
    Recipe.parse("repetition_penalty=1.5 presence_penalty=1 temperature=0.5 top_k=10").distribution(x, [1, 2, 3])
    np.testing.assert_array_equal(x, copy)


# --- samplers --------------------------------------------------------------------------


def test_sampler_state_moves_only_when_told_the_token() -> None:
    recipe = Recipe.parse("temperature=0.9 mirostat(tau=2,learning_rate=0.5)")
    sampler = recipe.sampler()
    x = np.log(np.array([0.5, 0.25, 0.125, 0.125]))
    assert sampler.states == (None, 4.0)  # mu starts at 2 tau (Basu et al. 2021, Alg. 1)
    probs = sampler.distribution(x)
    sampler.distribution(x)  # a second look changes nothing
    assert sampler.states == (None, 4.0)
    with pytest.raises(RecipeError, match="zero probability"):
        sampler.observe(3, np.array([1.0, 0.0, 0.0, 0.0]))
    sampler.observe(0, probs)
    assert sampler.states[1] != 4.0
    with pytest.raises(RecipeError, match="needs a distribution"):
        sampler.observe(0)  # one observe per distribution
    fork = sampler.copy()
    fork.distribution(x)
    fork.observe(1)
    assert fork.states != sampler.states
    sampler.reset()
    assert sampler.states == (None, 4.0)
    np.testing.assert_array_equal(recipe.sampler().distribution(x), recipe.distribution(x))


def test_stateless_recipes_ignore_observe() -> None:
    sampler = Recipe.parse("top_k=2").sampler()
    sampler.observe(5)  # nothing to update, nothing to complain about
    assert sampler.states == (None,)
    assert not Recipe.parse("top_k=2").is_stateful and Recipe.parse("mirostat=3").is_stateful


# --- the command -----------------------------------------------------------------------


def run_command(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(prog="logitfork recipe")
    recipe_command.add_arguments(parser)
    return recipe_command.main(parser.parse_args(argv))


def test_recipe_check_prints_the_canonical_form(capsys: pytest.CaptureFixture[str]) -> None:
    assert run_command(["check", "temperature=0.80,  top_p=.9"]) == 0
    out, err = capsys.readouterr()
    assert out == "temperature=0.8 top_p=0.9\n" and err == ""


def test_recipe_check_explains_each_stage(capsys: pytest.CaptureFixture[str]) -> None:
    assert run_command(["check", "--explain", "top_p=0.9 greedy"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0] == "top_p=0.9 greedy"
    assert lines[1].startswith("  1. top_p=0.9") and "Holtzman et al. 2020" in lines[1]
    assert lines[2].startswith("  2. greedy")


def test_recipe_check_warns_about_stages_after_greedy(capsys: pytest.CaptureFixture[str]) -> None:
    assert run_command(["check", "greedy top_p=0.9"]) == 0
    out, err = capsys.readouterr()
    assert out == "greedy top_p=0.9\n"
    assert err == "warning: top_p=0.9: after greedy, which keeps one token, this stage changes nothing\n"
    # the warning is true: greedy keeps one token and a truncating stage keeps at least one
    # (the README's rule for every truncating stage), so what follows greedy changes nothing
    x = np.random.default_rng(4).standard_normal(50)
    after = "top_p=0.9 temperature=2 repetition_penalty=0.5 mirostat=1 greedy"
    assert Recipe.parse("greedy " + after).distribution(x, [1, 2]).tolist() == Recipe.parse(
        "greedy").distribution(x, [1, 2]).tolist()
    assert run_command(["check", "top_p=0.9 greedy"]) == 0
    assert capsys.readouterr().err == ""  # before greedy no word: a penalty or typical_p there can change the token
    assert Recipe.parse("greedy").after_greedy == () and Recipe.parse("top_k=3").after_greedy == ()
    assert Recipe.parse("greedy").keeps_one_token and not Recipe.parse("top_k=1").keeps_one_token


def test_recipe_check_reports_errors_with_status_2(capsys: pytest.CaptureFixture[str]) -> None:
    assert run_command(["check", "top_p=1.5"]) == 2
    out, err = capsys.readouterr()
    assert out == "" and err == "error: top_p must be in (0, 1], got 1.5\n"


def test_the_package_imports_neither_torch_nor_the_screens() -> None:
    # the team rule: outside tui/app nothing imports textual or rich; recipes need only numpy
    import subprocess
    import sys

    code = (
        "import sys, tui.decoding, tui.commands.recipe; "
        "print(sorted(m for m in ('torch', 'transformers', 'textual', 'rich') if m in sys.modules))"
    )
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert result.stdout.strip() == "[]"
