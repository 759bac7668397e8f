"""Mirostat v2 against Basu et al. 2021: the cut, the update, and the claim about tau.

Sources: Basu et al. 2021 (ICLR), Algorithm 1 (mu starts at 2 tau; mu <- mu - eta (S - tau),
S = -log2 p of the drawn token under the model's distribution, as the authors' code
computes it from `prob_original`); the v2 cut (drop tokens whose surprise exceeds mu)
is the common-practice form (llama.cpp, Ollama), recalled from memory.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from tui.decoding import MirostatV2, Recipe, draw


def zipf(size: int, exponent: float) -> np.ndarray:
    p = 1.0 / np.arange(1, size + 1) ** exponent
    return p / p.sum()


def test_cut_keeps_tokens_whose_surprise_is_within_mu() -> None:
    # hand computation: tau = 1 bit -> mu = 2 bits -> keep p >= 2^-2 = 0.25
    x = np.log([0.5, 0.25, 0.125, 0.125])
    assert (Recipe.of([MirostatV2(1.0)]).distribution(x) > 0).tolist() == [True, True, False, False]


def test_update_follows_the_papers_rule() -> None:
    # Basu et al. 2021, Alg. 1: e = S(X) - tau; mu <- mu - eta * e; mu starts at 2 tau
    x = np.log([0.5, 0.25, 0.125, 0.125])
    sampler = Recipe.parse("mirostat(tau=1,learning_rate=0.5)").sampler()
    assert sampler.states == (2.0,)
    sampler.distribution(x)
    sampler.observe(1)  # surprise -log2 0.25 = 2 bits under the distribution mirostat received
    assert sampler.states == (2.0 - 0.5 * (2.0 - 1.0),)
    sampler.distribution(x)
    sampler.observe(0)  # 1 bit: error 0, mu stays
    assert sampler.states == (1.5,)


def test_surprise_is_measured_before_the_cut() -> None:
    # the authors' code (basusourya/mirostat, mirostat.py) takes the surprise from the
    # untruncated probabilities (`prob_original`), not from the cut, renormalised ones
    x = np.log([0.5, 0.25, 0.125, 0.125])
    sampler = Recipe.parse("mirostat(tau=1,learning_rate=1)").sampler()
    final = sampler.distribution(x)
    assert final[1] == pytest.approx(1 / 3)  # renormalised: would read log2(3) = 1.58 bits
    sampler.observe(1, final)
    assert sampler.states == (2.0 - (2.0 - 1.0),)  # read 2 bits: -log2 0.25


@pytest.mark.parametrize(("size", "exponent", "tau"), [(10000, 1.1, 5.0), (49152, 1.2, 3.0)])
def test_mean_surprise_settles_within_five_percent_of_tau(size: int, exponent: float, tau: float) -> None:
    # Basu et al. 2021: mirostat makes the observed surprise average to tau; on a stationary
    # Zipf distribution the running mean after a burn-in must lie within 5% of tau
    p = zipf(size, exponent)
    logits = np.log(p)
    sampler = Recipe.parse(f"mirostat(tau={tau},learning_rate=0.1)").sampler()
    rng = np.random.default_rng(2021)
    surprises = []
    for _ in range(2500):
        final = sampler.distribution(logits)
        token = draw(final, float(rng.random()))
        sampler.observe(token, final)
        surprises.append(-math.log2(p[token]))
    mean = float(np.mean(surprises[500:]))
    assert abs(mean - tau) < 0.05 * tau
    # and the target is not met by accident: plain sampling sits far from it
    assert abs(-(p * np.log2(p)).sum() - tau) > 0.5 * tau


def test_a_forced_token_that_mirostat_cut_still_updates_mu() -> None:
    # worked by hand: mu starts at 2 tau = 2 bits, so p = 0.125 (3 bits) is cut; forced
    # anyway, its surprise under the distribution mirostat received updates mu:
    # 2 - 0.1 * (3 - 1) = 1.8 (Basu et al. 2021, Alg. 1, with the emitted token)
    x = np.log([0.5, 0.25, 0.125, 0.125])
    sampler = Recipe.parse("mirostat(tau=1,learning_rate=0.1)").sampler()
    assert sampler.distribution(x)[3] == 0.0
    sampler.observe(3)
    assert sampler.states[0] == pytest.approx(1.8, rel=1e-12)
    # a token an earlier stage had cut has no surprise to read: mu stays where it was
    sampler = Recipe.parse("top_k=2 mirostat(tau=1,learning_rate=0.1)").sampler()
    sampler.distribution(x)
    sampler.observe(3)
    assert sampler.states[1] == 2.0


def test_mirostat_in_a_chain_sees_the_earlier_stages() -> None:
    # surprise is read under the distribution the stage receives (after temperature here)
    x = np.log([0.5, 0.25, 0.125, 0.125])
    sampler = Recipe.parse("temperature=0.5 mirostat(tau=1,learning_rate=1)").sampler()
    received = np.array([0.25, 0.0625, 0.015625, 0.015625]) / 0.34375  # p^2 renormalised
    sampler.distribution(x)
    sampler.observe(0)
    assert sampler.states[1] == pytest.approx(2.0 - (-math.log2(received[0]) - 1.0), rel=1e-12)
