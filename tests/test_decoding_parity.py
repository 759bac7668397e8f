"""Our stages against transformers' logits processors, and the places we differ on purpose.

Reference library: transformers 5.24.0 (transformers/generation/logits_process.py),
run on float64 tensors. Each stage alone and chains in random orders must keep the
same token set and give the same final probabilities to 1e-9. The documented
differences (top_p ties, the paper's strict > for epsilon and eta, n-gram bans that
would leave nothing) are tested as two facts each: what the library does and what the
paper says. The repetition penalty follows the library's sign rule, not CTRL's literal
formula; its tests say why.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from transformers import (EpsilonLogitsWarper, EtaLogitsWarper, MinPLogitsWarper,
                          NoRepeatNGramLogitsProcessor, RepetitionPenaltyLogitsProcessor,
                          TemperatureLogitsWarper, TopKLogitsWarper, TopPLogitsWarper,
                          TypicalLogitsWarper)

from tui.decoding import (Epsilon, Eta, MinP, NoRepeatNGram, Recipe, RepetitionPenalty, Temperature,
                          TopK, TopP, TypicalP)

SETTINGS = settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large]
)
SIZES = (2, 3, 17, 300, 5000, 49152)


# --- generated inputs ----------------------------------------------------------------


@st.composite
def logit_vectors(draw: st.DrawFn, kinds: tuple[str, ...] = ("normal", "peaked", "flat", "ties", "masked")) -> np.ndarray:
    """Logit vectors of the kinds the issue names: ties, very peaked, very flat, -inf, V = 49152."""
    kind = draw(st.sampled_from(kinds))
    size = draw(st.sampled_from(SIZES))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    x = rng.standard_normal(size) * draw(st.sampled_from((0.3, 2.0, 5.0)))
    if kind == "peaked":
        x[rng.integers(size)] += draw(st.floats(10.0, 40.0))
    elif kind == "flat":
        x = np.full(size, draw(st.floats(-3.0, 3.0)))
    elif kind == "ties":
        x = np.round(x * 2.0) / 2.0  # a coarse grid: many exact ties
    elif kind == "masked" and size > 1:
        x[rng.choice(size, size=int(rng.integers(1, size)), replace=False)] = -math.inf
    return x.astype(draw(st.sampled_from((np.float32, np.float64))))


def history_for(x: np.ndarray, draw: st.DrawFn) -> list[int]:
    """A history of tokens of any logit (positive, negative, -inf), drawn from a small
    pool so that n-grams repeat."""
    pool = np.arange(x.size)
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    pool = rng.choice(pool, size=min(pool.size, 4), replace=False)
    return [int(t) for t in rng.choice(pool, size=draw(st.integers(0, 30)))]


STAGE_PARAMS = {
    Temperature: st.floats(0.2, 3.0),
    TopK: st.integers(1, 400),
    # within ~1e-15 of 1 the cut hangs on rounding in the last bit of a 49,152-term sum, in
    # both implementations alike, so p stays clear of that band (1.0 itself is included)
    TopP: st.one_of(st.floats(0.01, 1.0 - 1e-9), st.just(1.0)),
    MinP: st.floats(0.0, 1.0),
    TypicalP: st.floats(0.01, 0.999),
    Epsilon: st.floats(1e-6, 0.5),
    Eta: st.floats(1e-6, 0.5),
    RepetitionPenalty: st.floats(0.5, 3.0),
    NoRepeatNGram: st.integers(1, 4),
}


def reference_processor(stage: object) -> object:
    """The transformers 5.24.0 processor for one of our stages."""
    if isinstance(stage, Temperature):
        return TemperatureLogitsWarper(stage.value)
    if isinstance(stage, TopK):
        return TopKLogitsWarper(stage.k)
    if isinstance(stage, TopP):
        return TopPLogitsWarper(stage.p)
    if isinstance(stage, MinP):
        return MinPLogitsWarper(stage.min_p)
    if isinstance(stage, TypicalP):
        return TypicalLogitsWarper(stage.mass)
    if isinstance(stage, Epsilon):
        return EpsilonLogitsWarper(stage.epsilon)
    if isinstance(stage, Eta):
        warper = EtaLogitsWarper(stage.epsilon)
        # transformers stores epsilon as a float32 tensor; in float64 the formula is the same
        warper.epsilon = torch.tensor(stage.epsilon, dtype=torch.float64)
        return warper
    if isinstance(stage, RepetitionPenalty):
        return RepetitionPenaltyLogitsProcessor(stage.theta)
    if isinstance(stage, NoRepeatNGram):
        return NoRepeatNGramLogitsProcessor(stage.n)
    raise AssertionError(stage)


def run_reference(stages: list[object], x: np.ndarray, history: list[int]) -> tuple[np.ndarray, np.ndarray]:
    """Kept mask and final probabilities under transformers' processors, in order."""
    scores = torch.from_numpy(x.astype(np.float64)).unsqueeze(0)
    ids = torch.tensor([history], dtype=torch.long) if history else torch.zeros((1, 0), dtype=torch.long)
    for stage in stages:
        scores = reference_processor(stage)(ids, scores)
    final = scores[0].numpy()
    kept = np.isfinite(final)
    return kept, torch.softmax(scores[0], dim=-1).numpy()


def run_ours(stages: list[object], x: np.ndarray, history: list[int]) -> tuple[np.ndarray, np.ndarray, list]:
    trace = Recipe.of(stages).trace(x, history)  # type: ignore[arg-type]
    return trace[-1].kept_mask, Recipe.of(stages).distribution(x, history), trace  # type: ignore[arg-type]


def assert_same(ours: tuple, theirs: tuple) -> None:
    np.testing.assert_array_equal(ours[0], theirs[0])
    np.testing.assert_allclose(ours[1], theirs[1], rtol=0, atol=1e-9)


def assert_same_or_top_p_tie(ours: tuple, theirs: tuple) -> None:
    """Equal, or the documented top_p difference: we keep the whole tie group at the
    boundary, transformers keeps part of it."""
    if np.array_equal(ours[0], theirs[0]):
        np.testing.assert_allclose(ours[1], theirs[1], rtol=0, atol=1e-9)
        return
    before = ours[2][-2].probs  # probabilities entering the top_p stage
    boundary = before[ours[0]].min()
    assert not (theirs[0] & ~ours[0]).any(), "transformers kept a token we cut"
    extra = ours[0] & ~theirs[0]
    assert np.all(before[extra] == boundary), "differences outside the boundary tie group"
    assert np.any(theirs[0] & (before == boundary)), "transformers cut the whole boundary group"


# --- each stage alone ----------------------------------------------------------------


@pytest.mark.parametrize("kind", list(STAGE_PARAMS), ids=lambda kind: kind.name)
@settings(SETTINGS, max_examples=25)
@given(data=st.data())
def test_each_stage_matches_transformers(data: st.DataObject, kind: type) -> None:
    # reference: transformers 5.24.0, one processor vs our one stage
    x = data.draw(logit_vectors())
    history = history_for(x, data.draw) if kind in (RepetitionPenalty, NoRepeatNGram) else []
    stage = kind(data.draw(STAGE_PARAMS[kind]))
    if isinstance(stage, NoRepeatNGram) and _bans_everything(x, history, stage.n):
        return  # transformers leaves no token at all; see test_ngram_ban_that_would_leave_nothing
    ours = run_ours([stage], x, history)
    theirs = run_reference([stage], x, history)
    if isinstance(stage, TopP):
        assert_same_or_top_p_tie(ours, theirs)
    else:
        assert_same(ours, theirs)


def _bans_everything(x: np.ndarray, history: list[int], n: int) -> bool:
    from tui.decoding.penalties import banned_by_ngrams

    banned = set(banned_by_ngrams(np.array(history, dtype=np.int64), n).tolist())
    return all(t in banned for t in np.flatnonzero(np.isfinite(x)).tolist())


# --- chains in several orders --------------------------------------------------------

CHAIN_KINDS = [k for k in STAGE_PARAMS if k is not NoRepeatNGram]


@SETTINGS
@given(data=st.data(), kinds=st.permutations(CHAIN_KINDS).map(lambda ks: ks[:4]), length=st.integers(2, 4))
def test_chains_in_random_orders_match_transformers(data: st.DataObject, kinds: list[type], length: int) -> None:
    # reference: transformers 5.24.0 processors applied in the same order as our stages
    x = data.draw(logit_vectors(kinds=("normal", "peaked", "masked")))  # tie-free: see the top_p tie test
    history = history_for(x, data.draw)
    stages = [kind(data.draw(STAGE_PARAMS[kind])) for kind in kinds[:length]]
    assert_same(run_ours(stages, x, history)[:2], run_reference(stages, x, history))


def test_chain_with_ngram_ban_and_penalty_matches_transformers() -> None:
    # reference: transformers 5.24.0, NoRepeatNGram + RepetitionPenalty + TopK + TopP
    rng = np.random.default_rng(7)
    x = np.abs(rng.standard_normal(300)) * 3
    history = [5, 9, 5, 9, 11, 5, 9]
    stages = [NoRepeatNGram(2), RepetitionPenalty(1.4), TopK(60), Temperature(0.7), TopP(0.8)]
    ours = run_ours(stages, x, history)
    assert not ours[0][5] and not ours[0][11]  # the prefix (9,) was followed by 5 and by 11
    assert_same(ours[:2], run_reference(stages, x, history))


# --- where a paper and the library differ: both facts ---------------------------------


def test_top_p_ties_at_the_boundary() -> None:
    flat = np.zeros(4)
    # transformers 5.24.0 TopPLogitsWarper: cuts inside the tie group, keeping ids 2 and 3
    kept_theirs, _ = run_reference([TopP(0.5)], flat, [])
    assert kept_theirs.tolist() == [False, False, True, True]
    # ours: tokens of equal probability are kept or cut together (Holtzman et al. 2020
    # define the nucleus by probability only, so no token id may decide)
    assert Recipe.of([TopP(0.5)]).distribution(flat).tolist() == [0.25, 0.25, 0.25, 0.25]
    # away from the tie the two agree: [0.5, 0.25, 0.25] at p = 0.5 keeps only the first
    x = np.array([math.log(2.0), 0.0, 0.0])
    assert Recipe.of([TopP(0.5)]).distribution(x).tolist() == [1.0, 0.0, 0.0]
    assert run_reference([TopP(0.5)], x, [])[0].tolist() == [True, False, False]


def test_epsilon_threshold_is_strict_as_in_the_paper() -> None:
    x = np.array([math.log(2.0), 0.0, 0.0])  # probabilities exactly [0.5, 0.25, 0.25]
    assert Recipe.parse("").distribution(x).tolist() == [0.5, 0.25, 0.25]
    # Hewitt et al. 2022: allowed set {x : P(x) > epsilon}, so 0.25 is cut at epsilon = 0.25
    assert Recipe.of([Epsilon(0.25)]).distribution(x).tolist() == [1.0, 0.0, 0.0]
    # transformers 5.24.0 EpsilonLogitsWarper removes only P(x) < epsilon: keeps all three
    assert run_reference([Epsilon(0.25)], x, [])[0].tolist() == [True, True, True]


def test_eta_threshold_is_strict_as_in_the_paper() -> None:
    x = np.array([0.0, -2.0 * math.log(2.0)])  # weights 1 and 1/4: probabilities [0.8, 0.2]
    p = Recipe.parse("").distribution(x)
    epsilon = float(p[1])
    entropy = -float((p * np.log(p)).sum())
    # Hewitt et al. 2022: eta = min(epsilon, sqrt(epsilon) * exp(-H)); here epsilon is the min
    assert math.sqrt(epsilon) * math.exp(-entropy) > epsilon
    assert Eta(epsilon).threshold(entropy) == epsilon
    # the paper keeps P(x) > eta: the token at exactly eta goes
    assert Recipe.of([Eta(epsilon)]).distribution(x).tolist() == [1.0, 0.0]
    # transformers 5.24.0 EtaLogitsWarper (epsilon in float64) keeps P(x) >= eta
    assert run_reference([Eta(epsilon)], x, [])[0].tolist() == [True, True]


def test_eta_formula_matches_transformers_on_a_worked_example() -> None:
    # reference: transformers 5.24.0 EtaLogitsWarper; eta = min(eps, sqrt(eps) exp(-H)), H in nats
    rng = np.random.default_rng(3)
    x = rng.standard_normal(1000) * 2
    ours = run_ours([Eta(0.002)], x, [])
    assert 1 < int(ours[0].sum()) < 1000  # the cut is active on this input
    assert_same(ours[:2], run_reference([Eta(0.002)], x, []))


@pytest.mark.parametrize(
    ("signs", "x"),
    [("negative", [-0.5, -1.0, -2.0, -3.5, -7.0]), ("positive", [3.0, 0.5, 1.0, 2.5, 0.25]),
     ("mixed", [2.0, 1.0, -1.0, -3.0, 0.0])],
)
@pytest.mark.parametrize("theta", [0.6, 1.2, 5.0])
def test_repetition_penalty_equals_transformers_on_every_sign(signs: str, x: list[float], theta: float) -> None:
    # reference: transformers 5.24.0 RepetitionPenaltyLogitsProcessor (divide positive
    # logits by theta, multiply negative ones), float64 scores
    logits = np.array(x)
    history = [2, 4, 2, 0]  # a logit of each sign is repeated in the mixed row (0 stays 0)
    scores = RepetitionPenaltyLogitsProcessor(theta)(torch.tensor([history]), torch.from_numpy(logits[None]))
    theirs = torch.softmax(scores[0], dim=-1).numpy()
    ours = Recipe.of([RepetitionPenalty(theta)]).distribution(logits, history)
    np.testing.assert_allclose(ours, theirs, rtol=0, atol=1e-15)
    # and the same after a top_k left only some tokens in play (positions, not ids)
    kept, probs = run_reference([TopK(3), RepetitionPenalty(theta)], logits, history)
    assert_same(run_ours([TopK(3), RepetitionPenalty(theta)], logits, history)[:2], (kept, probs))


def test_repetition_penalty_lowers_a_repeated_token_with_negative_logits() -> None:
    # the case Keskar et al.'s literal rule (divide every penalised logit) gets backwards:
    # logits [2, 1, -1, -3], token 2 repeated; hand computation, softmax of the raw logits
    x = np.array([2.0, 1.0, -1.0, -3.0])
    raw = float(np.exp(-1.0) / np.exp(x).sum())
    assert round(raw, 3) == 0.035
    shares = [Recipe.of([RepetitionPenalty(t)]).distribution(x, [2])[2] for t in (1.0, 1.2, 5.0)]
    assert shares[0] == pytest.approx(raw, rel=1e-12)
    assert shares[0] > shares[1] > shares[2]  # a larger penalty, a rarer repetition
    # the paper's literal division would give -1 / 1.2 = -0.83 and -1 / 5 = -0.2: higher
    literal = np.array([2.0, 1.0, -1.0 / 5.0, -3.0])
    assert np.exp(literal[2]) / np.exp(literal).sum() > raw


@settings(max_examples=60, deadline=None)
@given(
    logits=st.lists(st.floats(-30.0, 30.0), min_size=2, max_size=40),
    shift=st.floats(-50.0, 50.0),
    theta=st.floats(1.0, 10.0, exclude_min=True),
    data=st.data(),
)
def test_repetition_penalty_never_favours_a_repeated_token(logits, shift, theta, data) -> None:
    # property of the trade's rule (transformers 5.24.0 RepetitionPenaltyLogitsProcessor):
    # for theta > 1 a repeated token's probability never rises relative to any unrepeated
    # token's, whatever the signs and whatever constant is added to every logit
    x = np.array(logits) + shift
    repeated = data.draw(st.lists(st.integers(0, x.size - 1), min_size=1, max_size=x.size))
    before = Recipe.parse("").distribution(x)
    after = Recipe.of([RepetitionPenalty(theta)]).distribution(x, repeated)
    seen = np.zeros(x.size, dtype=bool)
    seen[repeated] = True
    # compare ratios through logs: log p_rep - log p_other may only fall (tolerance for rounding)
    with np.errstate(divide="ignore"):
        gap_before = np.log(before[seen])[:, None] - np.log(before[~seen])[None, :]
        gap_after = np.log(after[seen])[:, None] - np.log(after[~seen])[None, :]
    finite = np.isfinite(gap_before) & np.isfinite(gap_after)
    assert np.all(gap_after[finite] <= gap_before[finite] + 1e-9)
    # (its own probability may still rise, when another repeated token loses more)


def test_ngram_ban_that_would_leave_nothing() -> None:
    history = [1, 2, 1]  # bigrams (1, 2) and (2, 1); the prefix (1,) bans token 2
    x = np.array([1.0, 2.0, 3.0])
    stages = [TopK(1), NoRepeatNGram(2)]  # top_k leaves token 2 alone, then the ban hits it
    # transformers 5.24.0 NoRepeatNGramLogitsProcessor: no token left, sampling would fail
    kept_theirs, _ = run_reference(stages, x, history)
    assert not kept_theirs.any()
    # ours: every truncating stage keeps at least one token (the most likely)
    assert Recipe.of(stages).distribution(x, history).tolist() == [0.0, 0.0, 1.0]
    # when something is left, the ban is the library's
    assert (Recipe.of([NoRepeatNGram(2)]).distribution(x, history) > 0).tolist() == [True, True, False]
    assert run_reference([NoRepeatNGram(2)], x, history)[0].tolist() == [True, True, False]


def test_typical_p_one_keeps_everything_where_transformers_refuses() -> None:
    x = np.array([1.0, 0.0, -1.0])
    # transformers 5.24.0 TypicalLogitsWarper accepts only 0 < mass < 1
    with pytest.raises(ValueError):
        TypicalLogitsWarper(1.0)
    # Meister et al. 2023: the typical set with tau = 1 is the whole support
    np.testing.assert_allclose(Recipe.parse("typical_p=1").distribution(x), np.exp(x) / np.exp(x).sum())


def test_top_k_keeps_ties_with_the_kth_like_transformers() -> None:
    x = np.array([3.0, 2.0, 2.0, 1.0])
    # reference: transformers 5.24.0 TopKLogitsWarper keeps every score >= the k-th largest
    assert run_reference([TopK(2)], x, [])[0].tolist() == [True, True, True, False]
    assert (Recipe.parse("top_k=2").distribution(x) > 0).tolist() == [True, True, True, False]


def test_min_p_keeps_a_token_exactly_at_the_scaled_threshold() -> None:
    x = np.array([math.log(2.0), 0.0, 0.0])  # probabilities exactly [0.5, 0.25, 0.25]
    # Nguyen et al. 2024: remove tokens below min_p * p_max; 0.25 = 0.5 * 0.5 stays
    assert (Recipe.parse("min_p=0.5").distribution(x) > 0).tolist() == [True, True, True]
    # reference: transformers 5.24.0 MinPLogitsWarper agrees
    assert run_reference([MinP(0.5)], x, [])[0].tolist() == [True, True, True]
    # min_p = 1 keeps the top token (and anything tied with it) only
    assert Recipe.parse("min_p=1").distribution(x).tolist() == [1.0, 0.0, 0.0]
