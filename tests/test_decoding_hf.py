"""The transformers bridge: the recipe inside `model.generate()` and as a GenerationConfig.

Reference library: transformers 5.24.0. A tiny randomly initialised Llama (no hub,
no download) generates with `recipe.as_logits_processor()`; a recording processor
before and after captures the raw logits and the final kept set at every step, and
our own chain must keep the same set from the same raw logits and history.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import torch
from transformers import (GenerationConfig, LlamaConfig, LlamaForCausalLM, LogitsProcessor,
                          LogitsProcessorList, MinPLogitsWarper, RepetitionPenaltyLogitsProcessor,
                          TemperatureLogitsWarper, TopKLogitsWarper)

from tui.decoding import Recipe
from tui.decoding.hf import (MirostatLogitsProcessor, RecipeWarning, RepetitionPenaltyProcessor,
                             StageLogitsProcessor, TemperatureProcessor)


class Recorder(LogitsProcessor):
    """Keeps a copy of what it sees and passes it on unchanged."""

    def __init__(self) -> None:
        self.seen: list[tuple[np.ndarray, np.ndarray]] = []

    def __call__(self, input_ids: torch.LongTensor, scores: torch.FloatTensor) -> torch.FloatTensor:
        self.seen.append((input_ids.numpy().copy(), scores.numpy().copy()))
        return scores


@pytest.fixture(scope="module")
def tiny_model() -> LlamaForCausalLM:
    torch.manual_seed(0)
    config = LlamaConfig(
        vocab_size=300, hidden_size=32, intermediate_size=64, num_hidden_layers=1,
        num_attention_heads=2, num_key_value_heads=2, max_position_embeddings=128,
        bos_token_id=None, eos_token_id=None, pad_token_id=0,
    )
    model = LlamaForCausalLM(config).eval()
    with torch.no_grad():
        model.lm_head.weight.mul_(25.0)  # logits spread like a trained model's, not near-flat
    return model


RECIPES = [
    "repetition_penalty=1.3 temperature=0.7 top_k=40 top_p=0.9",
    "min_p=0.05 typical_p=0.9 no_repeat_ngram=2",
    "presence_penalty=0.8 frequency_penalty=0.3 epsilon=0.003 eta=0.003 temperature=1.3",
    "temperature=0.9 mirostat(tau=3,learning_rate=0.3)",
    "top_p=0.95 temperature=1.5 min_p=0.02",
]


@pytest.mark.parametrize("text", RECIPES)
def test_generate_keeps_the_same_sets_as_our_chain(tiny_model: LlamaForCausalLM, text: str) -> None:
    # reference: transformers 5.24.0 generate() with our LogitsProcessorList, fixed seed
    recipe = Recipe.parse(text)
    before, after = Recorder(), Recorder()
    processors = LogitsProcessorList([before, *recipe.as_logits_processor(), after])
    prompt = torch.tensor([[5, 17, 5, 17, 40, 5]])
    torch.manual_seed(1234)
    output = tiny_model.generate(
        prompt, attention_mask=torch.ones_like(prompt), logits_processor=processors,
        generation_config=GenerationConfig(do_sample=True, top_k=0, top_p=1.0, temperature=1.0,
                                           max_new_tokens=12, pad_token_id=0),
    )
    assert output.shape[1] == prompt.shape[1] + 12
    sampler = recipe.sampler()
    drawn = output[0, prompt.shape[1]:].tolist()
    for step, ((ids, raw), (_, final)) in enumerate(zip(before.seen, after.seen)):
        ours = sampler.distribution(raw[0], ids[0]) > 0
        theirs = np.isfinite(final[0])
        assert np.array_equal(ours, theirs), f"step {step}: kept sets differ"
        assert ours[drawn[step]]  # generate drew from the kept set
        sampler.observe(drawn[step])


def test_processors_are_transformers_own_where_the_rules_agree() -> None:
    kinds = [type(p) for p in Recipe.parse(
        "repetition_penalty=1.2 temperature=0.7 top_k=20 min_p=0.1 top_p=0.9 greedy").as_logits_processor()]
    assert kinds == [RepetitionPenaltyProcessor, TemperatureProcessor, TopKLogitsWarper,
                     MinPLogitsWarper, StageLogitsProcessor, StageLogitsProcessor]
    # temperature and the repetition penalty are transformers' own, guarded only against
    # leaving float32's range (test_generate_kwargs.py)
    assert isinstance(Recipe.parse("temperature=0.7").as_logits_processor()[0].theirs,
                      TemperatureLogitsWarper)
    assert isinstance(Recipe.parse("repetition_penalty=1.2").as_logits_processor()[0].theirs,
                      RepetitionPenaltyLogitsProcessor)
    assert [type(p) for p in Recipe.parse("mirostat=4 top_k=0 temperature=1").as_logits_processor()] == [
        MirostatLogitsProcessor
    ]  # stages that change nothing are left out
    # transformers' NoRepeatNGramLogitsProcessor leaves no token when the ban covers every
    # one left (generate() then fails), so the ban is ours (see test_generate_kwargs.py)
    assert [type(p) for p in Recipe.parse("no_repeat_ngram=2 no_repeat_ngram=0").as_logits_processor()] == [
        StageLogitsProcessor
    ]


def test_generation_config_expresses_what_it_can() -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # nothing to warn about here
        config = Recipe.parse("no_repeat_ngram=3 temperature=0.8 top_k=50 top_p=0.9 min_p=0.02").to_generation_config()
    assert config.do_sample is True
    assert (config.temperature, config.top_k, config.top_p, config.min_p) == (0.8, 50, 0.9, 0.02)
    assert config.no_repeat_ngram_size == 3
    assert (config.typical_p, config.epsilon_cutoff, config.eta_cutoff) == (1.0, 0.0, 0.0)  # off, not unset


def test_generation_config_names_what_it_leaves_out() -> None:
    with pytest.warns(RecipeWarning) as caught:
        config = Recipe.parse(
            "top_p=0.9 temperature=0.7 presence_penalty=0.3 mirostat=5 temperature=2 repetition_penalty=1.1"
        ).to_generation_config()
    message = str(caught[0].message)
    assert "presence_penalty=0.3 (no GenerationConfig field)" in message
    assert "mirostat(tau=5,learning_rate=0.1) (no GenerationConfig field)" in message
    assert "temperature=2 (second temperature stage)" in message
    # transformers 5.24.0 applies temperature before top_p whatever the recipe says
    assert "temperature=0.7 will run before top_p=0.9" in message
    # and the penalty first: before top_p that changes the result, before temperature it cannot
    assert "repetition_penalty=1.1 will run before top_p=0.9" in message
    assert "repetition_penalty=1.1 will run before temperature=0.7" not in message
    assert "repetition_penalty" not in message.replace("repetition_penalty=1.1 will run before top_p=0.9", "")
    assert (config.top_p, config.temperature, config.repetition_penalty) == (0.9, 0.7, 1.1)


def test_generation_config_for_greedy() -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the penalty is transformers' own rule: nothing is lost
        config = Recipe.parse("repetition_penalty=1.2 temperature=0.5 greedy top_k=3").to_generation_config()
    assert config.do_sample is False and config.repetition_penalty == 1.2
    assert config.temperature is None and config.top_k is None  # cannot change the argmax: left out
    with pytest.warns(RecipeWarning, match="greedy decoding skips it"):
        Recipe.parse("typical_p=0.5 greedy").to_generation_config()
    # presence and frequency penalties can move the argmax, and GenerationConfig has no field for them
    with pytest.warns(RecipeWarning, match=r"presence_penalty=2 \(no GenerationConfig field\); "
                                           r"frequency_penalty=1 \(no GenerationConfig field\)"):
        config = Recipe.parse("presence_penalty=2 frequency_penalty=1 greedy").to_generation_config()
    assert config.do_sample is False


def test_a_models_own_generation_defaults_do_not_leak_into_an_exported_recipe(tiny_model) -> None:
    # reference: transformers 5.24.0 `_prepare_generation_config`, the merge generate() runs:
    # the model's generation_config fills only the fields a passed config leaves unset
    import copy

    model = copy.deepcopy(tiny_model)
    model.generation_config.update(top_k=5, top_p=0.5, temperature=0.1, min_p=0.3, repetition_penalty=1.3)
    for text, want in [("top_p=0.9", (1.0, 0, 0.9, 0.0)), ("temperature=1.0", (1.0, 0, 1.0, 0.0)),
                       ("temperature=0.7 min_p=0.1", (0.7, 0, 1.0, 0.1))]:
        merged, _ = model._prepare_generation_config(Recipe.parse(text).to_generation_config())
        assert (merged.temperature, merged.top_k, merged.top_p, merged.min_p) == want, text
        assert merged.repetition_penalty == 1.0 and merged.do_sample is True
    merged, _ = model._prepare_generation_config(Recipe.parse("greedy").to_generation_config())
    assert merged.do_sample is False and merged.repetition_penalty == 1.0
