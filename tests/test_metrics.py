"""Measures of a recipe's samples, checked against hand counts and reference libraries."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import sacrebleu
import scipy.stats
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from tui.session.record import mean_logprob, perplexity
from tui.sweeps.bootstrap import bootstrap_ci, bootstrap_ci_sets, resample_indices
from tui.sweeps.metrics import (MEASURE_NAMES, DistinctN, SampleRecord, SelfBleu, distinct_n,
                                measure_samples, repeated_ngram_share, self_bleu)

WORDS = ["the", "keeper", "lit", "lamp", "at", "dusk", "wrote", "of", "ships", ",", ".",
         "tide", "Storm", "storm", "rock", "log"]
texts_strategy = st.lists(
    st.lists(st.sampled_from(WORDS), min_size=0, max_size=9).map(" ".join),
    min_size=2, max_size=6)


def sentence_bleu_by_hand(texts: list[str], sources: list[int] | None = None) -> float:
    """Self-BLEU straight from sacrebleu: each text against the texts of other sources."""
    sources = list(range(len(texts))) if sources is None else sources
    scores = [sacrebleu.sentence_bleu(t, [r for r, s in zip(texts, sources) if s != sources[i]]).score
              for i, t in enumerate(texts)]
    return float(np.mean(scores))


# --- distinct-n ------------------------------------------------------------------

def test_distinct_n_worked_example_pools_over_the_set():
    # Li et al. 2016: distinct n-grams over the set of responses.
    samples = [["a", "b", "a", "b"], ["a", "b", "c"]]
    # unigrams: a b a b | a b c -> 7 in all, distinct {a, b, c} = 3
    assert distinct_n(samples, 1) == pytest.approx(3 / 7)
    # bigrams: ab ba ab | ab bc -> 5 in all, distinct {ab, ba, bc} = 3
    assert distinct_n(samples, 2) == pytest.approx(3 / 5)
    # Li et al.'s scaling by tokens (recalled from memory): 3 distinct bigrams / 7 tokens
    assert distinct_n(samples, 2, denominator="tokens") == pytest.approx(3 / 7)


def test_distinct_n_on_token_ids_and_edge_cases():
    # bigrams (1,2) (2,3) | (1,2) (2,4): 4 in all, 3 distinct (hand count)
    assert distinct_n([[1, 2, 3], [1, 2, 4]], 2) == pytest.approx(3 / 4)
    assert math.isnan(distinct_n([[1], [2]], 2))  # no bigram at all
    assert math.isnan(distinct_n([], 1))
    with pytest.raises(ValueError, match="n must be an integer >= 1, got 0"):
        distinct_n([[1, 2]], 0)


def test_distinct_n_keeps_copies_of_one_sample_apart():
    a, b = ["a", "b", "c"], ["a", "b", "d"]
    # plain: bigrams ab bc | ab bc | ab bd -> 6 in all, distinct {ab, bc, bd} = 3
    assert distinct_n([a, a, b], 2) == pytest.approx(3 / 6)
    # as copies (sources 0, 0, 1): ab is shared by two samples -> 1; bc only in
    # sample 0, held by two copies -> 2; bd only in sample 1 -> 1: 4 / 6
    assert distinct_n([a, a, b], 2, sources=[0, 0, 1]) == pytest.approx(4 / 6)
    assert distinct_n([a, b], 2, sources=[5, 9]) == distinct_n([a, b], 2)
    with pytest.raises(ValueError, match="shares source"):
        distinct_n([a, b], 2, sources=[0, 0])


@settings(max_examples=60, deadline=None)
@given(st.lists(st.lists(st.integers(0, 4), max_size=12), min_size=1, max_size=5), st.integers(1, 4))
def test_distinct_n_against_a_direct_count(samples, n):
    # Li et al. 2016, counted directly with a set
    grams = [tuple(s[i:i + n]) for s in samples for i in range(len(s) - n + 1)]
    expected = len(set(grams)) / len(grams) if grams else math.nan
    assert distinct_n(samples, n) == pytest.approx(expected, nan_ok=True)


# --- repetition ------------------------------------------------------------------

def test_repeated_ngram_share_worked_examples():
    # "a a a a a", n = 2: bigrams aa aa aa aa, the last three repeat the first: 3/4
    assert repeated_ngram_share([7, 7, 7, 7, 7], 2) == pytest.approx(3 / 4)
    # 1 2 3 1 2 3 1, n = 3: 123 231 312 123 231 -> positions 3 and 4 repeat: 2/5
    assert repeated_ngram_share([1, 2, 3, 1, 2, 3, 1], 3) == pytest.approx(2 / 5)
    assert repeated_ngram_share([1, 2, 3], 4) == 0.0  # shorter than n
    assert repeated_ngram_share([1, 2, 3, 4, 5]) == 0.0  # no repeat


@settings(max_examples=60, deadline=None)
@given(st.lists(st.integers(0, 3), max_size=15), st.integers(1, 4))
def test_repeated_ngram_share_is_one_minus_single_sample_distinct(tokens, n):
    # hand-derived identity: repeats + distinct = all n-grams of the sample
    if len(tokens) >= n:
        assert repeated_ngram_share(tokens, n) == pytest.approx(1 - distinct_n([tokens], n))


# --- self-BLEU -------------------------------------------------------------------

def test_self_bleu_matches_sacrebleu_on_logbook_lines():
    # Zhu et al. 2018 (Texygen) definition; reference: sacrebleu 2.6.0 sentence_bleu
    texts = ["The keeper lit the lamp at dusk.",
             "The keeper lit the lamp before the storm.",
             "Two ships passed the rock at dawn, and the tide was low.",
             "The lamp was trimmed at midnight."]
    assert self_bleu(texts) == pytest.approx(sentence_bleu_by_hand(texts), abs=1e-9)
    assert 0 < self_bleu(texts) < 100


@settings(max_examples=120, deadline=None)
@given(texts_strategy, st.data())
def test_self_bleu_matches_sacrebleu_on_generated_sets(texts, data):
    # reference: sacrebleu 2.6.0 sentence_bleu (13a, exp smoothing, effective order)
    if data.draw(st.booleans()):
        texts = texts + [texts[0]]  # an exact duplicate scores 100 against its twin
    assert self_bleu(texts) == pytest.approx(sentence_bleu_by_hand(texts), abs=1e-9)


@settings(max_examples=60, deadline=None)
@given(texts_strategy, st.data())
def test_self_bleu_with_copies_leaves_them_out_of_each_others_references(texts, data):
    picks = data.draw(st.lists(st.integers(0, len(texts) - 1), min_size=2, max_size=8))
    resampled = [texts[i] for i in picks]
    expected = (sentence_bleu_by_hand(resampled, picks) if len(set(picks)) > 1 else math.nan)
    # reference: sacrebleu 2.6.0 sentence_bleu, references restricted by hand
    assert self_bleu(resampled, sources=picks) == pytest.approx(expected, abs=1e-9, nan_ok=True)
    assert SelfBleu(texts)(np.asarray(picks)) == pytest.approx(expected, abs=1e-9, nan_ok=True)


def test_self_bleu_scale_and_too_few_samples():
    assert self_bleu(["the lamp is lit tonight", "the lamp is lit tonight"]) == pytest.approx(100)
    assert math.isnan(self_bleu(["only one sample"]))
    assert math.isnan(self_bleu([]))


# --- likelihood ------------------------------------------------------------------

def test_perplexity_is_exp_of_negative_mean_logprob():
    # log 0.5 and log 0.25: mean = -1.5 ln 2, so perplexity = 2 ** 1.5 (hand)
    logprobs = [math.log(0.5), math.log(0.25)]
    assert mean_logprob(logprobs) == pytest.approx(-1.5 * math.log(2))
    assert perplexity(logprobs) == pytest.approx(2 ** 1.5)
    assert perplexity([0.0, 0.0]) == pytest.approx(1.0)  # certain tokens (common practice, no source)
    assert math.isnan(mean_logprob([])) and math.isnan(perplexity([]))


def test_perplexity_matches_torch_cross_entropy():
    # reference: torch 2.13.0 torch.nn.functional.cross_entropy (mean NLL in nats)
    logits = torch.tensor([[2.0, 0.5, -1.0, 0.0, 1.0],
                           [0.1, 0.2, 3.0, -2.0, 0.0],
                           [-1.0, -1.0, -1.0, 4.0, 0.5]], dtype=torch.float64)
    targets = torch.tensor([0, 4, 3])
    raw = logits.numpy()
    log_softmax = raw - np.log(np.exp(raw).sum(axis=1, keepdims=True))  # by hand
    chosen = log_softmax[np.arange(3), targets.numpy()]
    expected = math.exp(torch.nn.functional.cross_entropy(logits, targets).item())
    assert perplexity(chosen.tolist()) == pytest.approx(expected, rel=1e-12)


# --- bootstrap -------------------------------------------------------------------

DATA = np.random.default_rng(20240611).normal(3.0, 1.0, size=40)


def test_bootstrap_contains_estimate_and_is_deterministic():
    est, low, high = bootstrap_ci(DATA)
    assert est == pytest.approx(float(np.mean(DATA)))
    assert low < est < high
    assert bootstrap_ci(DATA, seed=3) == bootstrap_ci(DATA, seed=3)
    assert bootstrap_ci(DATA, seed=3) != bootstrap_ci(DATA, seed=4)


def test_bootstrap_narrows_with_more_samples():
    # the standard error falls as 1/sqrt(n) (common practice, no source): 10x data, ~3x narrower
    draws = np.random.default_rng(5).normal(0.0, 1.0, size=400)
    _, low_small, high_small = bootstrap_ci(draws[:40])
    _, low_large, high_large = bootstrap_ci(draws)
    assert (high_large - low_large) < (high_small - low_small) / 2


@pytest.mark.parametrize("statistic", [np.mean, np.median])
def test_bootstrap_matches_scipy_percentile_method(statistic):
    # reference: scipy 1.17 scipy.stats.bootstrap(method='percentile'); different random
    # streams, so the ends agree to Monte Carlo error (about 0.005 here at 20000 resamples)
    ref = scipy.stats.bootstrap((DATA,), statistic, n_resamples=20000, confidence_level=0.95,
                                method="percentile", rng=np.random.default_rng(1))
    est, low, high = bootstrap_ci(DATA, statistic, n_resamples=20000, confidence=0.95, seed=0)
    assert low == pytest.approx(ref.confidence_interval.low, abs=0.03)
    assert high == pytest.approx(ref.confidence_interval.high, abs=0.03)
    assert est == pytest.approx(float(statistic(DATA)))


def test_bootstrap_arguments_are_checked():
    with pytest.raises(ValueError, match="n_resamples must be an integer >= 1, got 0"):
        bootstrap_ci(DATA, n_resamples=0)
    with pytest.raises(ValueError, match=r"confidence must be in \(0, 1\), got 1.5"):
        bootstrap_ci(DATA, confidence=1.5)
    assert all(math.isnan(v) for v in bootstrap_ci([]))


def test_strata_keep_each_position_in_its_own_group():
    strata = [0, 0, 0, 1, 1, 2]
    index = resample_indices(6, 300, seed=2, strata=strata)
    assert np.all(np.asarray(strata)[index] == np.asarray(strata)[None, :])
    assert len(np.unique(index[:, :3])) == 3  # within a stratum, all members are drawn


def test_set_bootstrap_uses_the_same_resamples_as_the_value_bootstrap():
    via_sets = bootstrap_ci_sets(list(DATA), lambda s, src: float(np.mean(s)), seed=9)
    assert via_sets == pytest.approx(bootstrap_ci(DATA, seed=9))


def _logbook_texts(n: int, seed: int) -> list[list[str]]:
    rng = np.random.default_rng(seed)
    weights = 1.0 / np.arange(1, len(WORDS) + 1)
    return [list(rng.choice(WORDS, size=30, p=weights / weights.sum())) for _ in range(n)]


def test_set_bootstrap_with_copies_kept_apart_brackets_the_estimate():
    samples = _logbook_texts(16, seed=1)
    table = DistinctN(samples, 2)
    est, low, high = bootstrap_ci_sets(samples, lambda _s, src: table(src), 400)
    assert low < est < high
    # plain recomputation counts a copy's n-grams as repeats: the whole interval falls
    # below the estimate (why sources exist; see the module docstring)
    _, _, naive_high = bootstrap_ci_sets(samples, lambda s, _src: distinct_n(s, 2), 400)
    assert naive_high < est
    texts = [" ".join(s) for s in samples]
    bleu = SelfBleu(texts)
    est, low, high = bootstrap_ci_sets(texts, lambda _s, src: bleu(src), 400, recentre=True)
    assert low < est < high
    # without re-centring, fewer distinct references pull self-BLEU down: the estimate
    # sits in the top quarter of the interval
    _, low, high = bootstrap_ci_sets(texts, lambda _s, src: bleu(src), 400)
    assert est > low + 0.75 * (high - low)


def test_recentre_takes_off_the_bootstrap_bias_estimate():
    # Efron & Tibshirani 1993, sec. 10.2: bias_B = mean of the replicates - estimate.
    # For the plug-in variance the ideal bootstrap gives E*[var*] = (n - 1)/n var, so
    # bias_B is close to -var/n (hand derivation; the 4000 resamples add a little noise).
    variance = lambda s, _src: float(np.var(s))  # noqa: E731
    est, low, high = bootstrap_ci_sets(list(DATA), variance, 4000, seed=1)
    _, low_r, high_r = bootstrap_ci_sets(list(DATA), variance, 4000, seed=1, recentre=True)
    index = resample_indices(len(DATA), 4000, seed=1)
    bias = float(np.mean([np.var(DATA[row]) for row in index])) - est
    assert (low_r - low, high_r - high) == pytest.approx((-bias, -bias))
    assert bias == pytest.approx(-est / len(DATA), rel=0.25)


# --- sample records and a recipe's measures ---------------------------------------

def _record(prompt: int, index: int, tokens: list[int], text: str, ending: str = "length",
            recipe: str = "top_p=0.9") -> SampleRecord:
    steps = len(tokens)
    return SampleRecord(recipe=recipe, prompt_index=prompt, sample_index=index,
                        token_ids=tuple(tokens), text=text,
                        logprobs=tuple(-0.5 - 0.1 * k for k in range(steps)),
                        kept=tuple(3 + k for k in range(steps)),
                        final_entropy=tuple(0.2 * k for k in range(steps)), ending=ending)


RECORDS = [
    _record(0, 0, [1, 2, 3, 1, 2, 3, 1, 2], "the keeper lit the lamp"),
    _record(0, 1, [1, 2, 4, 5], "the keeper wrote the log", ending="end of text"),
    _record(0, 2, [6, 7, 8], "a storm at dusk", ending="stop string"),
    _record(1, 0, [9, 9, 9, 9, 9, 9], "ships ships ships"),
    _record(1, 1, [9, 10, 11, 12, 13], "two ships passed the rock"),
    _record(1, 2, [], "", ending="context full"),
]


def test_sample_record_round_trips_through_json():
    for record in RECORDS:
        assert SampleRecord.from_json(json.loads(json.dumps(record.to_json()))) == record


def test_sample_record_refuses_bad_fields():
    with pytest.raises(ValueError, match="ending must be one of"):
        _record(0, 0, [1], "x", ending="tired")
    with pytest.raises(ValueError, match="logprobs has 1 entries for 2 tokens"):
        SampleRecord("greedy", 0, 0, (1, 2), "ab", (-1.0,), (1, 1), (0.0, 0.0), "length")
    with pytest.raises(ValueError, match="prompt_index must be an integer >= 0"):
        SampleRecord("greedy", -1, 0, (), "", (), (), (), "length")
    with pytest.raises(ValueError, match="missing field 'ending'"):
        SampleRecord.from_json({k: v for k, v in RECORDS[0].to_json().items() if k != "ending"})


def test_measure_samples_estimates_equal_the_measures_taken_directly():
    m = measure_samples(RECORDS, n_resamples=200)
    by_prompt = [[r for r in RECORDS if r.prompt_index == p] for p in (0, 1)]
    # set measures: per prompt, then the mean over prompts
    for name, n in (("distinct_1", 1), ("distinct_2", 2)):
        expected = np.mean([distinct_n([r.token_ids for r in g], n) for g in by_prompt])
        assert getattr(m, name).estimate == pytest.approx(expected)
    expected_bleu = np.mean([sentence_bleu_by_hand([r.text for r in g]) for g in by_prompt])
    assert m.self_bleu.estimate == pytest.approx(expected_bleu, abs=1e-9)  # sacrebleu 2.6.0
    # token measures pool every token of every sample
    logprobs = [x for r in RECORDS for x in r.logprobs]
    assert m.mean_logprob.estimate == pytest.approx(np.mean(logprobs))
    assert m.perplexity.estimate == pytest.approx(math.exp(-np.mean(logprobs)))
    assert m.mean_kept.estimate == pytest.approx(np.mean([k for r in RECORDS for k in r.kept]))
    assert m.mean_final_entropy.estimate == pytest.approx(
        np.mean([e for r in RECORDS for e in r.final_entropy]))
    assert m.repetition_4.estimate == pytest.approx(
        np.mean([repeated_ngram_share(r.token_ids, 4) for r in RECORDS]))
    assert m.endings == {"end of text": 1, "stop string": 1, "length": 3, "context full": 1}
    assert (m.recipe, m.n_samples) == ("top_p=0.9", 6)
    for name in MEASURE_NAMES:
        interval = getattr(m, name)
        assert interval.low <= interval.estimate <= interval.high, name
    assert set(m.to_json()) == {"recipe", "n_samples", "endings", *MEASURE_NAMES}
    assert measure_samples(RECORDS, n_resamples=200) == m  # deterministic for a seed


def test_measure_samples_refuses_empty_or_mixed_input():
    with pytest.raises(ValueError, match="no samples"):
        measure_samples([])
    with pytest.raises(ValueError, match="several recipes: greedy, top_p=0.9"):
        measure_samples([RECORDS[0], _record(0, 3, [1], "x", recipe="greedy")])


def test_identical_samples_give_point_intervals():
    # greedy x3: the same text three times. distinct-2 by hand (Li et al. 2016): the
    # sample's 3 bigrams are all different, pooled over 3 copies: 3 / 9 = 1/3. Nothing
    # varies, so the bootstrap's sampling distribution is a point and so is the interval
    # (before: 0.333 [0.260, 0.927], an artefact of the copy rule).
    same = [_record(0, i, [1, 2, 3, 4], "the lamp was lit", recipe="greedy") for i in range(3)]
    m = measure_samples(same, n_resamples=200)
    assert m.distinct_2.estimate == pytest.approx(1 / 3)
    for name in MEASURE_NAMES:
        interval = getattr(m, name)
        assert interval.low == interval.estimate == interval.high, name
    # one prompt that varies is enough for real intervals again
    varied = same + [_record(1, 0, [5, 6, 7], "fog", recipe="greedy"),
                     _record(1, 1, [5, 8, 9], "rain", recipe="greedy")]
    assert measure_samples(varied, n_resamples=200).distinct_2.low < measure_samples(
        varied, n_resamples=200).distinct_2.high
