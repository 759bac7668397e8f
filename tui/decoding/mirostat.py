"""Mirostat v2: a feedback loop that steers the surprise of drawn tokens toward a target.

Basu et al. 2021 ("Mirostat: A Neural Text Decoding Algorithm that Directly Controls
Perplexity", ICLR 2021) keep a maximum surprise mu, start it at 2 * tau, and after
each drawn token X update ``mu <- mu - eta * (S(X) - tau)`` with the surprise
``S(X) = -log2 p(X)`` in bits. The paper's eta is the learning rate; here it is
called `learning_rate`, because `eta` is also the name of a truncation stage (eta
sampling, Hewitt et al. 2022). Version 2 replaces the paper's Zipf estimate and
top-k by a direct cut: keep the tokens whose surprise is at most mu. It is the
form in common use (llama.cpp, Ollama; defaults tau = 5, learning rate 0.1 there).

Surprise is measured under the distribution this stage receives, before its own
cut, as the authors' code does (`prob_original` in basusourya/mirostat,
mirostat.py). Some implementations measure it under the cut, renormalised
distribution instead (llama.cpp's v2, recalled from memory); that variant reads a
lower surprise for the same token and so settles on a larger mu.

mu is held in [0, MU_MAX] bits, the range where it still changes the kept set: no
token has a surprise below 0 bits (p <= 1), so every mu <= 0 keeps the same set (the
fallback to the most likely tokens), and no positive float64 probability has a
surprise above 1074 bits (2^-1074 is the smallest), so every mu >= 1074 keeps every
token. The paper's rule has no bounds; without them a large learning rate drives mu
out to where ``2 ** -mu`` overflows, and mu would then need many steps to come back
from a value that makes no difference to the cut. Inside the range the rule is the
paper's, unchanged.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from tui.decoding.stage import (Candidates, History, StatefulStage, check_interval, format_number,
                                keep_most_likely)

MU_MAX = 1074.0  # bits: -log2 of the smallest positive float64 (2^-1074)


def held(mu: float) -> float:
    """mu clamped to [0, MU_MAX] (see the module docstring); inf clamps too."""
    return min(max(mu, 0.0), MU_MAX)


@dataclass(frozen=True, slots=True)
class SurpriseMemo:
    """What mirostat needs from one step to update mu once the token is known."""

    ids: np.ndarray  # token ids the stage received (ascending)
    probs: np.ndarray  # their probabilities under the distribution it received


@dataclass(frozen=True, slots=True)
class MirostatV2(StatefulStage):
    """Keep tokens with surprise -log2 p <= mu; mu follows the drawn tokens' surprise.

    `tau` is the target surprise in bits (log2 of the target perplexity),
    `learning_rate` the paper's eta. The state is mu, starting at 2 * tau (Basu et
    al. 2021, Alg. 1) and held in [0, 1074] bits. If no token is within mu, the most
    likely are kept.
    """

    tau: float
    learning_rate: float = 0.1
    name: ClassVar[str] = "mirostat"
    reshapes_logits: ClassVar[bool] = False

    def __post_init__(self) -> None:
        object.__setattr__(self, "tau", check_interval("mirostat tau", self.tau, 0.0, 0.0, "(inf"))
        object.__setattr__(self, "learning_rate", check_interval(
            "mirostat learning_rate", self.learning_rate, 0.0, 0.0, "(inf"))

    def initial_state(self) -> float:
        return held(2.0 * self.tau)

    def apply_with_state(self, cands: Candidates, history: History, state: float) -> tuple[Candidates, SurpriseMemo]:
        probs = cands.probs()
        mask = probs >= 2.0 ** (-held(state))  # -log2 p <= mu
        if not mask.any():
            mask = keep_most_likely(cands)
        return cands.keep(mask), SurpriseMemo(cands.ids, probs)

    def next_state(self, state: float, memo: SurpriseMemo, token_id: int) -> float:
        """mu after `token_id` was emitted: its surprise is read under the distribution this
        stage received, so a forced token that mirostat cut still counts. A token an earlier
        stage had cut has no probability there (infinite surprise): mu stays as it was."""
        at = int(np.searchsorted(memo.ids, token_id))
        if at >= memo.ids.size or memo.ids[at] != token_id:
            return state
        prob = max(float(memo.probs[at]), math.ulp(0.0))  # an underflowed 0 reads as ~1074 bits
        surprise = -math.log2(prob)
        return held(state - self.learning_rate * (surprise - self.tau))

    def text(self) -> str:
        return (f"{self.name}(tau={format_number(self.tau)},"
                f"learning_rate={format_number(self.learning_rate)})")
