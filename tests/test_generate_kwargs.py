"""`Recipe.generate_kwargs()`: generate() samples from exactly the recipe's distribution.

Reference library: transformers 5.24.0 `GenerationMixin.generate` with sampling. The
model is a tiny random llama (tests/tiny_model.py) whose own generation_config asks for
top_k=5, temperature=0.3, top_p=0.7 and repetition_penalty=2, the kind of defaults a
model's generation_config.json ships with, and which generate() would otherwise merge in
(transformers' `_prepare_generation_config`). At every step, the processed scores
generate() samples from (`output_scores`) must give the distribution our chain gives on
the raw logits (`output_logits`) and the same history: the same kept set exactly and the
same probabilities within 1e-6 (the scores are float32). Stateful recipes are followed
with the pane's own `Sampler`, fed the token generate() drew.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import torch
from tiny_model import tiny_llama
from transformers import LogitsProcessorList

from tui.decoding import Recipe

MODEL_DEFAULTS = dict(top_k=5, temperature=0.3, top_p=0.7, repetition_penalty=2.0)
PROMPTS = torch.tensor([[5, 17, 5, 17, 40, 5], [9, 9, 3, 60, 61, 9]])  # repeats, for the penalties
STEPS = 10

RECIPES = [
    "",  # the model's own distribution: no top_k=50, nothing from its generation_config
    "top_p=0.8",
    "temperature=0.7 top_k=40",
    "repetition_penalty=1.3 temperature=0.7 top_k=40 top_p=0.9",
    "repetition_penalty=0.8 top_k=6",  # a reward for repetition
    "min_p=0.05 typical_p=0.9 no_repeat_ngram=2",
    "presence_penalty=0.8 frequency_penalty=0.3 epsilon=0.003 eta=0.003 temperature=1.3",
    "top_p=0.95 temperature=1.5 min_p=0.02",
    "greedy",
    "top_k=1",
    "top_k=1 no_repeat_ngram=1",  # a ban that would leave nothing: the most likely stays
    "temperature=0.9 mirostat(tau=3,learning_rate=0.3)",
    "mirostat(tau=2,learning_rate=1) top_p=0.9",
]


@pytest.fixture(scope="module")
def model():
    lm = tiny_llama(bos_token_id=None, eos_token_id=None, pad_token_id=0)  # no end token: ten steps each
    lm.generation_config.update(do_sample=False, **MODEL_DEFAULTS)
    return lm


def run_generate(model, recipe: Recipe, seed: int):
    torch.manual_seed(seed)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # generate() finds nothing to complain about in the kwargs
        return model.generate(
            PROMPTS, attention_mask=torch.ones_like(PROMPTS), **recipe.generate_kwargs(),
            max_new_tokens=STEPS, output_scores=True, output_logits=True, return_dict_in_generate=True,
        )


@pytest.mark.parametrize("text", RECIPES, ids=lambda t: t or "empty")
def test_generate_samples_from_the_recipes_distribution(model, text: str) -> None:
    recipe = Recipe.parse(text)
    out = run_generate(model, recipe, seed=len(text))
    assert len(out.scores) == STEPS and out.sequences.shape == (2, PROMPTS.shape[1] + STEPS)
    start = PROMPTS.shape[1]
    for row in range(PROMPTS.shape[0]):
        sampler = recipe.sampler()
        for step in range(STEPS):
            history = out.sequences[row, : start + step].numpy()
            raw = out.logits[step][row].numpy()
            kept = sampler.copy().trace(raw, history)[-1].kept_ids  # under the current state
            ours = sampler.distribution(raw, history)
            scores = out.scores[step][row]
            theirs = torch.softmax(scores.double(), dim=-1).numpy()
            assert np.array_equal(np.flatnonzero(torch.isfinite(scores).numpy()), kept), f"row {row} step {step}"
            np.testing.assert_allclose(theirs, ours, rtol=0, atol=1e-6, err_msg=f"row {row} step {step}")
            token = int(out.sequences[row, start + step])
            sampler.observe(token, ours)  # refuses a token outside our kept set


def generate_matches_ours(model, recipe: Recipe, seed: int) -> list[tuple[int, np.ndarray]]:
    """Run generate() with the recipe; assert each step's distribution is ours (1e-6);
    return (the token it chose, our distribution) for every row and step."""
    out = run_generate(model, recipe, seed=seed)
    start = PROMPTS.shape[1]
    steps = []
    for row in range(PROMPTS.shape[0]):
        for step in range(STEPS):
            history = out.sequences[row, : start + step].numpy()
            ours = recipe.distribution(out.logits[step][row].numpy(), history)
            theirs = torch.softmax(out.scores[step][row].double(), dim=-1).numpy()
            np.testing.assert_allclose(theirs, ours, rtol=0, atol=1e-6, err_msg=str(recipe))
            steps.append((int(out.sequences[row, start + step]), ours))
    return steps


def test_a_tiny_temperature_runs_in_generate_as_it_does_here(model) -> None:
    # logits / 1e-300 leave float32's range: transformers' TemperatureLogitsWarper alone
    # would give inf scores and generate() would fail on them; the exported processor
    # shifts the top logit to 0 first, as our stage does (softmax ignores a shift)
    for text in ("temperature=1e-300", "repetition_penalty=1.3 temperature=1e-300 top_k=40"):
        for token, ours in generate_matches_ours(model, Recipe.parse(text), seed=3):
            assert token == int(np.argmax(ours))  # greedy-like
    # penalties that push a repeated token's score past float32's range: it wins, as here
    for text in ("repetition_penalty=1e-40", "presence_penalty=-1e39 top_k=5"):
        generate_matches_ours(model, Recipe.parse(text), seed=5)
    # where the quotients fit, transformers' own warper runs, unchanged
    processor = Recipe.parse("temperature=0.5").as_logits_processor()[0]
    scores = torch.tensor([[1.0, -2.0, 3.0]])
    assert torch.equal(processor(torch.tensor([[0]]), scores.clone()), scores / 0.5)


def test_the_model_defaults_would_leak_in_without_it(model) -> None:
    # the failure generate_kwargs() prevents: the README's old call, a custom list alone,
    # lets transformers add the model's top_k=5 (and the rest) after the recipe
    recipe = Recipe.parse("top_p=0.8")
    torch.manual_seed(0)
    out = model.generate(PROMPTS, attention_mask=torch.ones_like(PROMPTS), do_sample=True,
                         logits_processor=recipe.as_logits_processor(), max_new_tokens=3,
                         output_scores=True, output_logits=True, return_dict_in_generate=True)
    kept = [int(torch.isfinite(out.scores[t][0]).sum()) for t in range(3)]
    ours = [int((recipe.distribution(out.logits[t][0].numpy(), out.sequences[0, :6 + t].numpy()) > 0).sum())
            for t in range(3)]
    assert max(kept) <= 5 < max(ours)


def test_mirostat_state_is_carried_across_steps_and_restarts_per_call(model) -> None:
    recipe = Recipe.parse("mirostat(tau=2,learning_rate=1)")
    kwargs = recipe.generate_kwargs()
    (processor,) = kwargs["logits_processor"]
    torch.manual_seed(5)
    out = model.generate(PROMPTS, attention_mask=torch.ones_like(PROMPTS), **kwargs, max_new_tokens=STEPS,
                         output_logits=True, return_dict_in_generate=True)
    sampler = recipe.sampler()
    start = PROMPTS.shape[1]
    for step in range(STEPS - 1):  # the last call has seen STEPS - 1 drawn tokens
        sampler.distribution(out.logits[step][0].numpy(), out.sequences[0, : start + step].numpy())
        sampler.observe(int(out.sequences[0, start + step]))
    # mu moved from its start at 2 tau (Basu et al. 2021, Alg. 1) and is the pane's mu
    assert processor._mu[0] != 2 * 2.0
    assert processor._mu[0] == pytest.approx(sampler.states[0], abs=1e-9)
    # the same kwargs in a second call start from mu = 2 tau again
    model.generate(PROMPTS, attention_mask=torch.ones_like(PROMPTS), **kwargs, max_new_tokens=1)
    assert processor._mu == [4.0, 4.0]


def test_callers_keywords_work_beside_it_and_each_call_is_fresh() -> None:
    recipe = Recipe.parse("top_k=3 mirostat=4")
    first, second = recipe.generate_kwargs(), recipe.generate_kwargs()
    assert isinstance(first["logits_processor"], LogitsProcessorList)
    assert first["logits_processor"][1] is not second["logits_processor"][1]  # no shared mu
    # the caller's own keywords are not among ours, so `**kwargs, max_new_tokens=...` never clashes
    for key in ("max_new_tokens", "max_length", "output_scores", "output_logits", "return_dict_in_generate",
                "pad_token_id", "eos_token_id", "num_return_sequences", "attention_mask", "streamer"):
        assert key not in first


def test_every_stage_a_generation_config_json_can_add_is_switched_off() -> None:
    # reference: transformers 5.24.0 GenerationMixin._get_logits_processor and
    # get_generation_mode: each field below adds a processor or changes the search
    lm = tiny_llama(bos_token_id=None, eos_token_id=None, pad_token_id=0)
    lm.generation_config.update(
        do_sample=False, num_beams=3, min_p=0.3, typical_p=0.5, epsilon_cutoff=0.01, eta_cutoff=0.01,
        no_repeat_ngram_size=1, suppress_tokens=[3, 4], begin_suppress_tokens=[5], bad_words_ids=[[7]],
        sequence_bias={(8,): 5.0}, forced_bos_token_id=9, renormalize_logits=True, **MODEL_DEFAULTS)
    recipe = Recipe.parse("top_p=0.9")
    torch.manual_seed(2)
    out = lm.generate(PROMPTS, attention_mask=torch.ones_like(PROMPTS), **recipe.generate_kwargs(),
                      max_new_tokens=4, output_scores=True, output_logits=True, return_dict_in_generate=True)
    start = PROMPTS.shape[1]
    for step in range(4):
        for row in range(2):
            ours = recipe.distribution(out.logits[step][row].numpy(), out.sequences[row, : start + step].numpy())
            scores = out.scores[step][row]
            assert np.array_equal(torch.isfinite(scores).numpy(), ours > 0), (step, row)
            np.testing.assert_allclose(torch.softmax(scores.double(), -1).numpy(), ours, rtol=0, atol=1e-6)
