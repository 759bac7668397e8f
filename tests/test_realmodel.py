"""The embedded SmolLM2-135M-Instruct through the whole engine (loaded once for the module).

The first run on a machine converts the GGUF into the user cache (about 40 s);
later runs load the cached safetensors in a few seconds.
"""

from __future__ import annotations


import pytest

from tui.session.opening import open_session
from tui.session.scenario import PaneSpec, find_scenario, load_scenario

pytestmark = pytest.mark.realmodel


@pytest.fixture(scope="module")
def lm(embedded_model):
    return embedded_model


def test_twenty_steps_of_the_default_scenario_and_an_identical_rerun(lm):
    scenario = load_scenario(find_scenario(None))
    first, _ = open_session(lm, scenario)
    for _ in range(20):
        first.step()
    again, _ = open_session(lm, scenario)
    for _ in range(20):
        again.step()
    a, b = first.view(), again.view()
    assert all(len(p.records) == 20 or p.stop for p in a.panes)
    assert [[r.token_id for r in p.records] for p in a.panes] == \
           [[r.token_id for r in p.records] for p in b.panes]
    greedy = next(p for p in a.panes if p.recipe == "greedy")
    assert all(r.rank == 1 for r in greedy.records)  # greedy takes the argmax (definition)
    assert greedy.text.strip()  # real words, not an empty decode


def test_two_panes_with_one_recipe_and_shared_draws_write_the_same_text(lm):
    scenario = load_scenario(find_scenario("tea-shop"))
    from dataclasses import replace

    scenario = replace(scenario, panes=(PaneSpec("a", "temperature=1.0 top_p=0.95"),
                                        PaneSpec("b", "temperature=1.0 top_p=0.95"),
                                        PaneSpec("c", "greedy")))
    engine, _ = open_session(lm, scenario, max_new_tokens=20)
    for _ in range(20):
        engine.step()
    a, b, c = engine.view().panes
    assert a.text == b.text and len(a.records) == len(b.records)
    assert all(r.rank == 1 for r in c.records)  # greedy takes the argmax (definition)


def test_the_lean_path_matches_transformers_on_the_embedded_model(lm):
    # Reference: transformers 5.24.0 LlamaForCausalLM's own forward pass over the whole
    # sequence (no cache), on the same weights; the project's parity tolerance is 1e-4.
    import torch

    from tui.model import lean_llama
    from tui.model.lean_llama import LeanRunner

    runner = lm.runner()
    assert isinstance(runner, LeanRunner) and len(runner.layers) == 30  # every layer, no test sizes
    if runner.packed and runner.dtype == torch.float32:  # production chunk sizes, not test ones
        assert runner.k_chunk == lean_llama.K_CHUNK == 288
    ids = lm.encode_prompt("The ferry to the lighthouse leaves at", None)
    kv, logits = runner.prefill([ids])
    worst = 0.0
    for _ in range(4):
        with torch.inference_mode():
            reference = lm.model(input_ids=torch.tensor([ids])).logits[0, -1].float()
        assert float(reference.std()) > 1.0  # guard: logits far from flat
        worst = max(worst, float((logits[0] - reference).abs().max()))
        token = int(reference.argmax())
        ids.append(token)
        kv, logits = runner.step(kv, [token])
    assert worst < 1e-4, worst
