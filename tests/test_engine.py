"""The lockstep engine on a tiny random-weight llama: batching, rewind, fork, recipes, stops.

The outside references are transformers' own forward pass (log-probabilities from
`model(input_ids, labels=...)`, reference: transformers 5.24.0 LlamaForCausalLM) and
batch-1 stepping of the same model.
"""

from __future__ import annotations

import threading

import numpy as np
import pytest
import torch

from tui.model.forward import Runner
from tui.session.engine import Engine
from tui.session.record import STOP_CONTEXT, STOP_EOS, STOP_LENGTH, STOP_STRING
from tui.session.scenario import PaneSpec
from tui.session.views import EngineError

PROMPT = "The lamplighter of Orrin Bay climbed the"


@pytest.fixture(scope="module", params=["generic", "lean"])
def lm(request, tiny_model_dir):
    """The tiny model, once on each forward path (the engine must not care which)."""
    from tui.model.catalogue import load_model

    loaded = load_model(str(tiny_model_dir))
    loaded.forward = request.param
    return loaded


def runner_for(lm):
    from tui.model.lean_llama import LeanRunner

    return Runner(lm.model) if lm.forward == "generic" else LeanRunner(lm.model)


def make(lm, recipes, *, seed=5, shared=True, max_new=30, stop=(), max_context=None,
         seeds=None, eos=()) -> Engine:
    ids = lm.encode_prompt(PROMPT, None)
    panes = [PaneSpec(f"p{i}", r, None if seeds is None else seeds[i])
             for i, r in enumerate(recipes)]
    return Engine(runner_for(lm), lm.decode, ids, panes, seed=seed, shared_draws=shared,
                  max_new_tokens=max_new, stop_strings=stop, eos_ids=eos,
                  max_context=max_context or lm.max_context)


def run(engine: Engine, n: int) -> None:
    for _ in range(n):
        engine.step()


def tokens(engine: Engine) -> list[list[int]]:
    return [[r.token_id for r in p.records] for p in engine.view().panes]


def test_same_recipe_and_shared_draws_write_the_same_text(lm):
    # Common random numbers: equal recipes and equal u give equal draws (the engine's
    # contract; common practice, no source).
    e = make(lm, ["temperature=1.0", "temperature=1.0", "top_k=5"])
    run(e, 12)
    t = tokens(e)
    assert t[0] == t[1]
    assert len(t[0]) == len(t[2]) == 12
    assert [r.u for r in e.view().panes[0].records] == [r.u for r in e.view().panes[2].records]


def test_unshared_draws_use_one_stream_per_pane(lm):
    e = make(lm, ["temperature=1.0", "temperature=1.0"], shared=False)
    run(e, 8)
    a, b = e.view().panes
    assert [r.u for r in a.records] != [r.u for r in b.records]
    e2 = make(lm, ["temperature=1.0", "temperature=1.0"], shared=False)
    run(e2, 8)
    assert tokens(e) == tokens(e2)  # same seed, same settings: identical re-run


def test_log_probabilities_match_transformers_forward(lm):
    # Force a fixed continuation, then compare each chosen token's raw log-probability
    # with transformers' own forward pass over the whole text (labels = the text).
    e = make(lm, ["greedy"])
    prompt = list(e.prompt_ids)
    cont = lm.tokenizer(" old iron stair to the lamp", add_special_tokens=False)["input_ids"]
    for t, tok in enumerate(cont):
        e.force(0, t, tok)
        e.step()
    recs = e.view().panes[0].records
    assert [r.token_id for r in recs] == cont
    assert all(r.forced for r in recs)
    ids = torch.tensor([prompt + cont])
    labels = ids.clone()
    labels[0, : len(prompt)] = -100
    with torch.no_grad():
        out = lm.model(input_ids=ids, labels=labels)
    ref = torch.log_softmax(out.logits[0, len(prompt) - 1 : -1].double(), -1)
    ref_lp = ref[torch.arange(len(cont)), torch.tensor(cont)].numpy()
    ours = np.log([r.raw_prob for r in recs])
    np.testing.assert_allclose(ours, ref_lp, atol=1e-4)
    assert abs(-ours.mean() - float(out.loss)) < 1e-4  # the library's mean NLL


def test_batched_steps_give_the_logits_of_batch_one_steps(lm):
    e = make(lm, ["temperature=1.2", "top_k=3", "greedy", "min_p=0.2"])
    run(e, 6)
    runner = Runner(lm.model)
    for pane in e.view().panes:
        for step in (0, 3, 5):
            ours = e.logits_at(pane.id, step)  # kept from the batched step
            ref = runner.logits_of(e.history(pane.id, step))[-1].numpy()
            np.testing.assert_allclose(ours, ref, atol=1e-4)


def test_rewind_replays_the_same_draws(lm):
    e = make(lm, ["temperature=1.0", "top_p=0.8", "mirostat(tau=3,learning_rate=0.1)"])
    run(e, 10)
    before = e.view()
    e.rewind(4)
    assert e.step_index == 4
    assert all(len(p.records) == 4 for p in e.view().panes)
    run(e, 6)
    after = e.view()
    for p, q in zip(before.panes, after.panes):
        assert p.records == q.records


def test_rewind_brings_back_a_pane_that_stopped_later(lm):
    eos = lm.tokenizer.eos_token_id
    e = make(lm, ["temperature=1.0", "temperature=1.0"], eos=(eos,))
    run(e, 3)
    # Make pane 1 stop by giving it the end-of-text token.
    e.force(1, 3, eos)
    e.step()
    assert e.view().panes[1].stop == STOP_EOS
    run(e, 4)  # pane 0 goes on alone
    assert len(e.view().panes[0].records) == 8
    assert len(e.view().panes[1].records) == 4
    e.rewind(2)
    run(e, 3)
    a, b = e.view().panes
    assert len(a.records) == len(b.records) == 5  # both live again
    assert [r.token_id for r in a.records] == [r.token_id for r in b.records]


def test_fork_continues_from_the_source(lm):
    e = make(lm, ["temperature=1.0"])
    run(e, 5)
    same = e.fork(0, "temperature=1.0")
    other = e.fork(0, "greedy")
    run(e, 7)
    v = {p.id: p for p in e.view().panes}
    assert [r.token_id for r in v[same].records] == [r.token_id for r in v[0].records]
    assert [r.token_id for r in v[other].records[:5]] == [r.token_id for r in v[0].records[:5]]
    assert all(r.rank == 1 for r in v[other].records[5:])  # greedy from the fork on
    assert v[other].origin == (0, 5)


def test_a_fork_before_the_present_step_is_the_fork_made_back_then(lm):
    # Reference: the same session forked when it stood at step 3 (the present-step fork,
    # a separate code path that copies the live row). Forking at step 3 from step 8 must
    # give the same tokens and probabilities: the cache row is the source's, cropped.
    ref = make(lm, ["temperature=1.0", "top_k=3"])
    run(ref, 3)
    ref_fork = ref.fork(0, "temperature=0.7 top_p=0.8", "back then")
    run(ref, 5)
    e = make(lm, ["temperature=1.0", "top_k=3"])
    run(e, 8)
    fork = e.fork(0, "temperature=0.7 top_p=0.8", "later", at=3)
    got = {p.id: p for p in e.view().panes}[fork]
    want = {p.id: p for p in ref.view().panes}[ref_fork]
    assert got.origin == (0, 3) and len(got.records) == 8 == e.step_index
    assert [r.token_id for r in got.records] == [r.token_id for r in want.records]
    assert [r.final_prob for r in got.records] == pytest.approx(
        [r.final_prob for r in want.records], abs=1e-6)
    assert got.recipe_log == ((0, "temperature=1"), (3, "temperature=0.7 top_p=0.8"))
    run(e, 2)  # and it steps on in the batch with the others
    assert all(len(p.records) == 10 for p in e.view().panes)
    assert [r.token_id for r in e.view().panes[0].records[:8]] == \
        [r.token_id for r in ref.view().panes[0].records]


def test_a_fork_at_step_0_or_of_a_stopped_pane_before_its_stop(lm):
    e = make(lm, ["greedy", "temperature=1.0"])
    run(e, 4)
    first = e.fork(1, "greedy", at=0)  # from the prompt: greedy from the start
    assert [r.token_id for r in {p.id: p for p in e.view().panes}[first].records] == \
        [r.token_id for r in e.view().panes[0].records]
    with pytest.raises(EngineError, match="no step 9"):
        e.fork(0, "greedy", at=9)
    # every pane stopped at the length limit: the parked row is cropped
    ref = make(lm, ["temperature=1.0"], max_new=6)
    run(ref, 2)
    ref_fork = ref.fork(0, "top_k=2")
    run(ref, 4)
    done = make(lm, ["temperature=1.0"], max_new=6)
    run(done, 6)
    assert done.view().finished
    late = done.fork(0, "top_k=2", at=2)
    got = {p.id: p for p in done.view().panes}[late]
    want = {p.id: p for p in ref.view().panes}[ref_fork]
    assert [r.token_id for r in got.records] == [r.token_id for r in want.records]
    assert got.stop == want.stop == STOP_LENGTH


def test_recipe_change_takes_effect_from_the_next_step(lm):
    e = make(lm, ["temperature=1.5"])
    run(e, 3)
    e.set_recipe(0, "greedy")
    run(e, 5)
    recs = e.view().panes[0].records
    assert all(r.rank == 1 and r.kept == 1 for r in recs[3:])
    assert e.view().panes[0].recipe_log == ((0, "temperature=1.5"), (3, "greedy"))


def test_add_pane_catches_up_as_if_present_from_the_start(lm):
    e = make(lm, ["temperature=1.0"])
    run(e, 6)
    new = e.add_pane("top_k=4", name="late")
    run(e, 3)
    ref = make(lm, ["temperature=1.0", "top_k=4"])
    run(ref, 9)
    got = {p.name: [r.token_id for r in p.records] for p in e.view().panes}
    want = tokens(ref)
    assert got["p0"] == want[0]
    assert got["late"] == want[1]
    e.remove_pane(new)
    assert [p.name for p in e.view().panes] == ["p0"]
    with pytest.raises(EngineError):
        e.remove_pane(0)


def test_force_rewinds_and_others_write_the_same_again(lm):
    e = make(lm, ["temperature=1.0", "top_p=0.9", "greedy"])
    run(e, 10)
    before = e.view()
    forced = (before.panes[0].records[4].token_id + 1) % lm.tokenizer.vocab_size
    e.force(0, 4, forced)
    run(e, 6)
    after = e.view()
    rec = after.panes[0].records[4]
    assert rec.token_id == forced and rec.forced
    for p, q in zip(before.panes[1:], after.panes[1:]):
        assert p.records == q.records


def test_a_forced_token_that_mirostat_cut_steps_on(lm):
    # the pane writes the forced token and its mirostat state learns of it (its surprise
    # under the distribution mirostat received); the step must not fail. tau = 3 bits
    # keeps mu off its floor of 0, where a high surprise could not lower it further
    e = make(lm, ["mirostat(tau=3,learning_rate=0.5)"])
    run(e, 2)
    final = e.pane(0).sampler.distribution(e.logits_at(0, 2), e.history(0, 2))
    cut = int(np.argmin(np.where(final > 0, np.inf, e.logits_at(0, 2))))  # least likely, cut
    assert final[cut] == 0.0
    mu = e.pane(0).sampler.states[0]
    e.force(0, 2, cut)
    run(e, 3)
    rec = e.view().panes[0].records[2]
    assert rec.token_id == cut and rec.forced and len(e.view().panes[0].records) == 5
    assert e.pane(0).samplers[3][1].states[0] != mu


def test_stop_rules(lm):
    e = make(lm, ["greedy"], max_new=4)
    run(e, 10)
    assert e.view().panes[0].stop == STOP_LENGTH
    assert len(e.view().panes[0].records) == 4
    assert e.step() == []

    probe = make(lm, ["greedy"])
    run(probe, 6)
    text = probe.view().panes[0].text
    piece = next(r.text for r in probe.view().panes[0].records[2:] if r.text.strip())
    e = make(lm, ["greedy", "greedy"], stop=(piece.strip(),))
    run(e, 10)
    p = e.view().panes[0]
    assert p.stop == STOP_STRING and piece.strip() in p.text
    assert p.text == text[: len(p.text)]

    n_prompt = len(lm.encode_prompt(PROMPT, None))
    e = make(lm, ["greedy"], max_context=n_prompt + 3)
    run(e, 10)
    assert e.view().panes[0].stop == STOP_CONTEXT
    assert len(e.view().panes[0].records) == 3


def test_restart_with_a_new_seed(lm):
    e = make(lm, ["temperature=1.0"])
    run(e, 8)
    first = tokens(e)
    e.restart(99)
    assert e.step_index == 0
    run(e, 8)
    e.restart(5)
    run(e, 8)
    assert tokens(e) == first


def test_records_hold_consistent_numbers(lm):
    e = make(lm, ["top_k=3 temperature=0.9"])
    run(e, 5)
    for r in e.view().panes[0].records:
        assert 1 <= r.kept <= 3
        assert r.rank <= 3  # top_k=3 keeps the three most likely raw tokens
        assert 0 < r.final_prob <= 1 and 0 < r.raw_prob <= 1
        assert len(r.top) == 20
        assert r.top[0].raw_prob >= r.top[-1].raw_prob
        assert sum(t.final_prob for t in r.top) == pytest.approx(1.0, abs=1e-9)
        assert r.final_entropy <= np.log(3) + 1e-9
        assert r.raw_entropy > r.final_entropy  # truncation removes mass from a random model


def test_one_stepping_thread_and_many_readers(lm):
    e = make(lm, ["temperature=1.0", "top_k=5", "greedy"], max_new=25)
    errors: list[BaseException] = []
    done = threading.Event()

    def reader() -> None:
        try:
            while not done.is_set():
                v = e.view()
                lengths = {len(p.records) for p in v.panes if p.stop is None}
                assert len(lengths) <= 1  # lockstep: every live pane holds as many tokens
        except BaseException as exc:  # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=reader) for _ in range(3)]
    for t in threads:
        t.start()
    run(e, 25)
    done.set()
    for t in threads:
        t.join()
    assert not errors
    assert all(len(p.records) == 25 for p in e.view().panes)


def test_rewind_after_a_recipe_change_decodes_with_the_new_recipe(lm):
    e = make(lm, ["temperature=1.5"])
    run(e, 6)
    e.set_recipe(0, "greedy")
    e.rewind(2)
    run(e, 4)
    recs = e.view().panes[0].records
    assert all(r.rank == 1 and r.kept == 1 for r in recs[2:])
    assert e.view().panes[0].recipe_log == ((0, "temperature=1.5"), (2, "greedy"))


def test_rewind_before_a_fork_moves_its_origin(lm):
    e = make(lm, ["temperature=1.0"])
    run(e, 5)
    fork = e.fork(0, "greedy")
    run(e, 3)
    e.rewind(3)
    forked = next(p for p in e.view().panes if p.id == fork)
    assert forked.origin == (0, 3)
    run(e, 2)
    forked = next(p for p in e.view().panes if p.id == fork)
    assert all(r.rank == 1 for r in forked.records[3:])


def test_shared_draws_toggle_applies_from_the_next_step_and_survives_rewind(lm):
    e = make(lm, ["temperature=1.0", "temperature=1.0"])
    run(e, 4)
    e.set_shared_draws(False)
    run(e, 4)
    a, b = e.view().panes
    assert [r.u for r in a.records[:4]] == [r.u for r in b.records[:4]]
    assert all(x.u != y.u for x, y in zip(a.records[4:], b.records[4:]))
    assert e.view().draw_log == ((0, True), (4, False))
    before = e.view()
    e.rewind(6)
    run(e, 2)
    assert [p.records for p in e.view().panes] == [p.records for p in before.panes]


def test_a_new_prompt_restarts_the_panes_as_a_fresh_session_on_it(lm):
    # Reference: an engine opened on the new prompt from the start, with the same panes,
    # seed and length limit. The edited session must write exactly what it writes.
    other = "A second, different opening line"
    ids = lm.encode_prompt(other, None)
    fresh = Engine(runner_for(lm), lm.decode, ids,
                   [PaneSpec("p0", "temperature=1.0"), PaneSpec("p1", "mirostat=3")],
                   seed=5, max_new_tokens=6, eos_ids=(), max_context=lm.max_context)
    run(fresh, 8)
    e = make(lm, ["temperature=1.0", "mirostat=3"])
    run(e, 4)
    e.fork(0, "greedy")
    e.remove_pane(2)
    e.set_prompt(ids, max_new_tokens=6)
    assert e.step_index == 0 and e.prompt_ids == tuple(ids)
    run(e, 8)
    assert tokens(e) == tokens(fresh)
    assert all(p.stop == STOP_LENGTH for p in e.view().panes)  # the new length limit
    with pytest.raises(EngineError, match="empty"):
        e.set_prompt([], max_new_tokens=6)
