"""Every accepted setting decodes: property tests over the stages at the edges of their ranges.

The rule under test (the project's own, no outside source): a recipe text is either
refused at parse time with a `RecipeError`, or every step it takes gives a finite
distribution that sums to 1 and keeps at least one token; never an exception mid-step.
Parameters are drawn across each stage's whole accepted range (the ranges in the
README's stage table), with the edges weighted in: tiny and huge temperatures, penalties
of 1e-9 and 1e9 and beyond, top_k past the vocabulary, mirostat's learning rate at
1000 and above. The chains run through `Recipe.distribution`, a `Sampler` over a few
drawn steps (mirostat's state moves), the engine on the tiny model, and the sweep runner.

Worked checks beside the properties: Basu et al. 2021 (Alg. 1, mu <- mu - eta (S - tau))
for mirostat inside its range; the limit of softmax(x / T) as T -> 0 (greedy, ties
kept: a fact of the softmax, common practice, no source) for the tiny temperatures.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from tui.decoding import STAGES, Recipe, RecipeError, draw
from tui.decoding.mirostat import MU_MAX
from tui.decoding.stage import LOGIT_BOUND

FAST = settings(max_examples=80, deadline=None, derandomize=True)
SLOW = settings(max_examples=12, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])

TINY, HUGE = 5e-324, 1.7976931348623157e308  # the smallest positive and the largest float64


def reals(low: float, high: float, *, open_low: bool = False, open_high: bool = False,
          edges: tuple[float, ...] = ()) -> st.SearchStrategy[float]:
    """Floats of an interval, with its edges and the given extra values drawn often."""
    inside = st.floats(low, high, exclude_min=open_low, exclude_max=open_high,
                       allow_nan=False, allow_infinity=False)
    picks = [e for e in edges if (low < e if open_low else low <= e) and (e < high if open_high else e <= high)]
    return st.one_of(st.sampled_from(picks), inside) if picks else inside


POSITIVE = reals(0.0, HUGE, open_low=True, edges=(TINY, 1e-300, 1e-9, 0.5, 1.0, 2.0, 1e3, 1e9, 1e300, HUGE))
ANY_REAL = reals(-HUGE, HUGE, edges=(0.0, 1e-9, -1e-9, 1e9, -1e9, 1e308, -1e308, HUGE, -HUGE))
UNIT = (TINY, 1e-9, 0.5, 1.0 - 1e-16, 1.0)
WHOLE = st.one_of(st.sampled_from([0, 1, 2, 299, 300, 301, 10**9, 2**63]), st.integers(0, 2**70))

# One value strategy per stage name: each stage's accepted range (README stage table).
VALUES: dict[str, st.SearchStrategy] = {
    "temperature": reals(0.0, HUGE, edges=(0.0, TINY, 1e-320, 1e-300, 1e-9, 1.0, 1e9, 1e300, HUGE)),
    "top_k": WHOLE,
    "top_p": reals(0.0, 1.0, open_low=True, edges=UNIT),
    "min_p": reals(0.0, 1.0, edges=(0.0, *UNIT)),
    "typical_p": reals(0.0, 1.0, open_low=True, edges=UNIT),
    "epsilon": reals(0.0, 1.0, open_high=True, edges=(0.0, *UNIT)),
    "eta": reals(0.0, 1.0, open_high=True, edges=(0.0, *UNIT)),
    "mirostat": st.tuples(POSITIVE, POSITIVE),
    "repetition_penalty": POSITIVE,
    "presence_penalty": ANY_REAL,
    "frequency_penalty": ANY_REAL,
    "no_repeat_ngram": WHOLE,
    "greedy": st.none(),
}


def test_every_stage_has_a_value_strategy() -> None:
    # a stage added to the grammar without a strategy here would go untested
    assert set(VALUES) == set(STAGES)


def item_text(name: str, value: object) -> str:
    if name == "greedy":
        return "greedy"
    if name == "mirostat":
        tau, rate = value  # type: ignore[misc]
        return f"mirostat(tau={tau!r},learning_rate={rate!r})"
    return f"{name}={value!r}"


def items(names: st.SearchStrategy[str]) -> st.SearchStrategy[str]:
    return names.flatmap(lambda n: VALUES[n].map(lambda v: item_text(n, v)))


ITEM = items(st.sampled_from(sorted(STAGES)))
CHAIN = st.lists(ITEM, min_size=1, max_size=5).map(" ".join)

# Logits as a model gives them (float32 range) with ties and masked (-inf) tokens.
LOGITS = arrays(np.float64, st.integers(1, 40), elements=st.one_of(
    st.floats(-3.4e38, 3.4e38, allow_nan=False, allow_infinity=False),
    st.sampled_from([0.0, 1.0, -1.0, 5.0, -math.inf]),
)).filter(lambda x: bool(np.isfinite(x).any()))


def parse_or_none(text: str) -> Recipe | None:
    try:
        return Recipe.parse(text)
    except RecipeError:
        return None  # refused at parse time: an allowed outcome


def assert_distribution(probs: np.ndarray, size: int) -> None:
    assert probs.shape == (size,)
    assert np.isfinite(probs).all() and (probs >= 0).all()
    assert np.count_nonzero(probs) >= 1
    assert math.isclose(float(probs.sum()), 1.0, rel_tol=1e-9)


@pytest.mark.parametrize("name", sorted(STAGES))
@FAST
@given(data=st.data())
def test_each_stage_alone_across_its_range(name: str, data: st.DataObject) -> None:
    text = data.draw(items(st.just(name)))
    logits = data.draw(LOGITS)
    history = data.draw(st.lists(st.integers(0, logits.size - 1), max_size=12))
    recipe = Recipe.parse(text)  # every value drawn lies in the accepted range
    assert_distribution(recipe.distribution(logits, history), logits.size)


@FAST
@given(CHAIN, LOGITS, st.data())
def test_random_chains_over_a_few_drawn_steps(text: str, logits: np.ndarray, data: st.DataObject) -> None:
    recipe = parse_or_none(text)
    if recipe is None:
        return
    history = data.draw(st.lists(st.integers(0, logits.size - 1), max_size=8))
    sampler = recipe.sampler()
    for u in data.draw(st.lists(st.floats(0.0, 1.0, exclude_max=True), min_size=1, max_size=6)):
        final = sampler.distribution(logits, history)
        assert_distribution(final, logits.size)
        token = draw(final, u)
        sampler.observe(token, final)
        history.append(token)
        for state in sampler.states:
            assert state is None or 0.0 <= state <= MU_MAX
        trace = recipe.trace(logits, history)
        assert all(np.isfinite(r.probs).all() and r.kept >= 1 for r in trace)


def test_issue_setting_mirostat_learning_rate_1000_holds_mu_at_both_ends() -> None:
    # the setting that used to overflow `2 ** -mu`. Worked by hand from Basu et al. 2021's
    # update: mu = 2 tau = 10; a 1-bit token gives 10 - 1000 (1 - 5) = 4010, held at 1074;
    # a 20-bit token then gives 1074 - 1000 (20 - 5) < 0, held at 0 (only the top token left)
    x = np.log([0.5, 0.25, 0.25 - 2.0**-20, 2.0**-20])
    sampler = Recipe.parse("mirostat(tau=5,learning_rate=1000)").sampler()
    sampler.observe(0, sampler.distribution(x))
    assert sampler.states == (MU_MAX,)
    assert (sampler.distribution(x) > 0).all()  # mu >= 1074 bits keeps every token
    sampler.observe(3)  # forced: 20 bits
    assert sampler.states == (0.0,)
    np.testing.assert_array_equal(sampler.distribution(x), [1.0, 0.0, 0.0, 0.0])
    rng = np.random.default_rng(0)  # and a long random run stays finite and in range
    for _ in range(60):
        final = sampler.distribution(x)
        assert_distribution(final, x.size)
        sampler.observe(draw(final, float(rng.random())), final)
        assert 0.0 <= sampler.states[0] <= MU_MAX


def test_mirostat_inside_its_range_follows_the_paper() -> None:
    # Basu et al. 2021, Alg. 1: mu <- mu - eta (S - tau), S = -log2 p of the drawn token
    x = np.log([0.5, 0.25, 0.125, 0.125])
    sampler = Recipe.parse("mirostat(tau=3,learning_rate=0.4)").sampler()
    sampler.distribution(x)
    sampler.observe(0)  # 1 bit
    assert sampler.states[0] == pytest.approx(6.0 - 0.4 * (1.0 - 3.0), rel=1e-12)


@pytest.mark.parametrize("t", [1e-320, 1e-300, TINY])
def test_a_tiny_temperature_tends_to_greedy_with_ties_kept(t: float) -> None:
    # the limit of softmax(x / T) as T -> 0 spreads the mass evenly over the top logits
    # (a fact of the softmax; common practice, no source)
    x = np.array([2.0, 3.0, -1.0, 3.0, 0.5])
    probs = Recipe.parse(f"temperature={t!r}").distribution(x)
    np.testing.assert_array_equal(probs, [0.0, 0.5, 0.0, 0.5, 0.0])


def test_an_overflowing_penalty_is_held_at_the_bound() -> None:
    # greedy then a frequency penalty of 1e308 x 3: the one kept token's logit would be -inf
    x = np.array([0.0, 4.0, 1.0])
    assert_distribution(Recipe.parse("greedy frequency_penalty=1e308").distribution(x, [1, 1, 1]), 3)
    # a huge reward: the rewarded tokens take all the mass, tied (their order is past float range)
    probs = Recipe.parse("presence_penalty=-1e308 temperature=1e-300").distribution(x, [0, 2])
    np.testing.assert_array_equal(probs, [0.5, 0.0, 0.5])
    trace = Recipe.parse("presence_penalty=-1e308").trace(x, [0])
    assert all(np.abs(np.log(r.probs[r.probs > 0])).max() < LOGIT_BOUND for r in trace)


# --- the engine and the sweep runner on the tiny model --------------------------------


@pytest.fixture(scope="module")
def lm(tiny_model_dir):
    from tui.model.catalogue import load_model

    return load_model(str(tiny_model_dir))


@SLOW
@given(st.lists(CHAIN, min_size=1, max_size=4), st.integers(0, 2**32))
def test_the_engine_steps_any_accepted_recipes(lm, texts: list[str], seed: int) -> None:
    from tui.model.forward import make_runner
    from tui.session.engine import Engine
    from tui.session.scenario import PaneSpec

    texts = [t for t in texts if parse_or_none(t) is not None] or ["mirostat(tau=5,learning_rate=1000)"]
    ids = lm.encode_prompt("The lighthouse keeper of Vellmar Quay", None)
    panes = [PaneSpec(f"p{i}", t) for i, t in enumerate(texts)]
    engine = Engine(make_runner(lm.model), lm.decode, ids, panes, seed=seed, shared_draws=False,
                    max_new_tokens=4, stop_strings=(), eos_ids=(), max_context=lm.max_context)
    for _ in range(4):
        engine.step()
    for pane in engine.view().panes:
        assert len(pane.records) == 4
        for rec in pane.records:
            assert rec.kept >= 1 and 0.0 < rec.final_prob <= 1.0
            assert math.isfinite(rec.final_entropy) and rec.final_entropy >= 0.0


@SLOW
@given(st.lists(CHAIN, min_size=1, max_size=3, unique=True), st.integers(0, 2**32))
def test_the_sweep_runner_decodes_any_accepted_recipes(lm, texts: list[str], seed: int) -> None:
    from tui.model.forward import make_runner
    from tui.sweeps.runner import SweepJob, SweepRunner

    recipes = tuple(dict.fromkeys(str(r) for r in map(parse_or_none, texts) if r is not None))
    recipes = recipes or ("mirostat(tau=5,learning_rate=1000)",)
    prompt = tuple(lm.encode_prompt("Tea at the Copper Kettle:", None))
    job = SweepJob((prompt,), recipes, samples=2, max_new_tokens=3, seed=seed, chunk_rows=4)
    sweeper = SweepRunner(make_runner(lm.model), lm.decode, job, eos_ids=(), max_context=lm.max_context)
    samples = [s for c in job.chunks() for s in sweeper.run_chunk(c)]
    # every recipe decoded (a recipe that keeps one token may be run once, not twice)
    assert {s.recipe for s in samples} == set(recipes) and len(samples) <= 2 * len(recipes)
    for s in samples:
        assert len(s.token_ids) == 3 and all(k >= 1 for k in s.kept)
        assert all(math.isfinite(h) and h >= 0.0 for h in s.final_entropy)


def test_the_issue_setting_runs_in_logitfork_run_and_sweep(tmp_path, tiny_model_dir, monkeypatch) -> None:
    # the report: `mirostat(tau=5,eta=1000)` passed `recipe check`, then ended `run` and
    # `sweep` with an OverflowError; renamed, the same setting must run both to the end
    import contextlib
    import io

    from tui.cli import main as cli

    monkeypatch.setenv("LOGITFORK_STATE_DIR", str(tmp_path / "state"))
    recipe = "mirostat(tau=5,learning_rate=1000)"
    scenario = tmp_path / "s.toml"
    scenario.write_text(f'title = "t"\nprompt = "The lighthouse keeper"\nmax_new_tokens = 16\n'
                        f'[[pane]]\nname = "m"\nrecipe = "{recipe}"\n', encoding="utf-8")
    sweep = tmp_path / "w.toml"
    sweep.write_text(f'model = "{tiny_model_dir}"\nprompts = ["Tea at the Copper Kettle:"]\n'
                     f'recipes = ["{recipe}"]\nsamples = 2\nmax_new_tokens = 12\n', encoding="utf-8")
    for argv in (["run", str(scenario), "--model", str(tiny_model_dir), "--out", str(tmp_path / "t.jsonl")],
                 ["sweep", str(sweep), "--out", str(tmp_path / "out"), "--resamples", "20"]):
        err = io.StringIO()
        with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(err):
            assert cli(argv) == 0, err.getvalue()
    assert (tmp_path / "t.jsonl").exists() and (tmp_path / "out" / "results.csv").exists()
    assert not (tmp_path / "state").exists()  # no crash report
    err = io.StringIO()
    with contextlib.redirect_stderr(err):  # and the old spelling gets a clear refusal
        assert cli(["recipe", "check", "mirostat(tau=5,eta=1000)"]) == 2
    assert "mirostat parameter eta is now called learning_rate" in err.getvalue()
