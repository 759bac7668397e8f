"""`logitfork export`: a recipe as a GenerationConfig or as Python for `model.generate`.

Reference: transformers 5.24.0 (`GenerationConfig.from_pretrained`, and `generate()`
with a fixed torch seed on the tiny random-weight llama). At every step that
`generate()` takes, the tokens still allowed by its processed scores (finite
entries of `output.scores`) must be the tokens our chain keeps on the same raw
logits (`output.logits`) and the same history.
"""

from __future__ import annotations

import contextlib
import copy
import io

import numpy as np
import pytest
import torch
from transformers import GenerationConfig

from tui.cli import main as cli
from tui.decoding import Recipe

PROMPT = "The lighthouse keeper of Vellmar Quay"


@pytest.fixture(scope="module")
def lm(tiny_model_dir):
    from tui.model.catalogue import load_model

    return load_model(str(tiny_model_dir))


def run(*argv: str) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        rc = cli(list(argv))
    return rc, out.getvalue(), err.getvalue()


def generate(lm, config: GenerationConfig, seed: int, processors=None, steps: int = 8):
    ids = torch.tensor([lm.encode_prompt(PROMPT, None)])
    config = copy.deepcopy(config)
    config.update(max_new_tokens=steps, output_scores=True, output_logits=True,
                  return_dict_in_generate=True, pad_token_id=lm.eos_ids[0])
    torch.manual_seed(seed)
    out = lm.model.generate(ids, generation_config=config, logits_processor=processors)
    return ids[0].tolist(), out


def assert_same_kept_sets(recipe: str, prompt: list[int], out) -> int:
    """Step by step: generate()'s allowed tokens equal our chain's kept set. Returns steps."""
    sampler = Recipe.parse(recipe).sampler()
    tokens = out.sequences[0, len(prompt):].tolist()
    for t, token in enumerate(tokens):
        raw = out.logits[t][0].float().numpy()
        final = sampler.distribution(raw, prompt + tokens[:t])
        theirs = set(np.flatnonzero(np.isfinite(out.scores[t][0].numpy())).tolist())
        assert set(np.flatnonzero(final > 0).tolist()) == theirs, f"step {t}"
        sampler.observe(token, final)  # generate() drew `token`: it must be in our set
    return len(tokens)


def test_a_generation_config_loads_back_and_keeps_our_token_sets(tmp_path, lm):
    recipe = "temperature=0.7 top_k=20 top_p=0.9"  # in transformers' own stage order
    rc, _, err = run("export", recipe, "--as", "generation-config", str(tmp_path / "gc"))
    assert rc == 0, err
    config = GenerationConfig.from_pretrained(tmp_path / "gc")  # reference: transformers 5.24.0
    assert (config.do_sample, config.temperature, config.top_k, config.top_p) == (True, 0.7, 20, 0.9)
    for seed in (0, 1):
        prompt, out = generate(lm, config, seed)
        assert assert_same_kept_sets(recipe, prompt, out) >= 2


def test_stages_a_generation_config_cannot_hold_fail_unless_lossy(tmp_path):
    recipe = "top_p=0.9 temperature=0.7 mirostat(tau=3,learning_rate=0.1)"
    rc, _, err = run("export", recipe, "--as", "generation-config", str(tmp_path / "no"))
    assert rc == 2 and err.count("\n") == 1 and err.startswith("error: ")
    assert "mirostat(tau=3,learning_rate=0.1)" in err and "temperature=0.7 will run before top_p=0.9" in err
    assert "--lossy" in err and not (tmp_path / "no").exists()
    rc, _, err = run("export", recipe, "--as", "generation-config", str(tmp_path / "yes"), "--lossy")
    assert rc == 0 and err.startswith("warning: ") and "mirostat" in err
    config = GenerationConfig.from_pretrained(tmp_path / "yes")
    assert (config.temperature, config.top_p) == (0.7, 0.9)


def test_the_python_snippet_runs_and_keeps_our_token_sets(lm):
    # stages transformers has no field for (mirostat, presence penalty) and an order it
    # would not use: the snippet keeps the recipe whole
    recipe = "repetition_penalty=1.3 presence_penalty=0.4 top_k=40 temperature=0.8 mirostat(tau=3,learning_rate=0.1)"
    rc, snippet, err = run("export", recipe, "--as", "python")
    assert rc == 0, err
    namespace: dict = {}
    exec(compile(snippet, "<export snippet>", "exec"), namespace)  # the snippet as printed
    call = next(line for line in snippet.splitlines() if "model.generate(" in line).lstrip("# ")
    namespace.update(model=lm.model, inputs={"input_ids": torch.tensor([lm.encode_prompt(PROMPT, None)])})
    for seed in (0, 3):
        torch.manual_seed(seed)
        # the commented call, as printed, with the outputs the check needs
        exec(call.replace("max_new_tokens=64)", "max_new_tokens=8, output_scores=True, output_logits=True, "
                                                  f"return_dict_in_generate=True, pad_token_id={lm.eos_ids[0]})"),
             namespace)
        prompt = namespace["inputs"]["input_ids"][0].tolist()
        assert assert_same_kept_sets(str(Recipe.parse(recipe)), prompt, namespace["outputs"]) >= 2


def test_export_mistakes_are_one_line(tmp_path):
    assert run("export", "top_p=9", "--as", "python")[2] == "error: top_p must be in (0, 1], got 9\n"
    rc, _, err = run("export", "top_p=0.9", "--as", "pdf")
    assert rc == 2 and err.startswith("error: --as: must be one of generation-config, python")
    rc, _, err = run("export", "top_p=0.9", "--as", "generation-config")
    assert rc == 2 and "needs exactly one folder" in err
    rc, _, err = run("export", "top_p=0.9", "--as", "python", str(tmp_path))
    assert rc == 2 and "takes no folder" in err
