"""Stages that look at the history: repetition, presence and frequency penalties, n-gram bans.

The history is every token id of the context so far, prompt and generated, as in
transformers for decoder-only models. Penalties change the logits of tokens that
occur in it; `no_repeat_ngram` removes tokens. Reference implementation compared
against: transformers 5.24.0, whose rules these are (repetition_penalty included).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from tui.decoding.stage import (Candidates, History, Stage, check_interval, check_real, check_whole,
                                format_number, keep_most_likely)


@dataclass(frozen=True, slots=True)
class RepetitionPenalty(Stage):
    """Penalise every token that occurs in the history, once however often it occurs:
    a positive logit is divided by theta, a negative one multiplied by theta.

    This is the rule of transformers' RepetitionPenaltyLogitsProcessor (5.24.0), so
    a recipe exported to generate() does exactly what the pane showed. It comes from
    penalized sampling in CTRL (Keskar et al. 2019), whose formula divides every
    penalised logit by theta. That literal formula is not used: for a negative logit it
    *raises* the token toward 0, so a larger penalty makes repetition more likely (on
    a model whose logits are all negative, a repeated token can go from a few percent
    to nearly certain). The two rules agree whenever the penalised logits are >= 0.
    Neither is unchanged by adding a constant to every logit (the sign decides), but
    under this one, for theta > 1, a repeated token never gains on an unrepeated one;
    theta = 1 changes nothing; theta < 1 rewards repetition.
    """

    theta: float
    name: ClassVar[str] = "repetition_penalty"

    def __post_init__(self) -> None:
        object.__setattr__(self, "theta", check_interval(self.name, self.theta, 0.0, 0.0, "(inf"))

    def apply(self, cands: Candidates, history: History) -> Candidates:
        if self.theta == 1.0 or history.tokens.size == 0:
            return cands
        seen, _ = history.counts()
        at, _ = cands.positions_of(seen)
        penalised = cands.logits[at]
        # in place: the chain owns the array; 0 stays 0 under either branch
        cands.logits[at] = np.where(penalised < 0, penalised * self.theta, penalised / self.theta)
        return cands

    def text(self) -> str:
        return f"{self.name}={format_number(self.theta)}"


@dataclass(frozen=True, slots=True)
class PresencePenalty(Stage):
    """Subtract a fixed amount from the logit of every token that occurs in the history.

    The additive presence penalty of common API practice (no paper); negative values
    reward repetition.
    """

    amount: float
    name: ClassVar[str] = "presence_penalty"

    def __post_init__(self) -> None:
        object.__setattr__(self, "amount", check_real(self.name, self.amount))

    def apply(self, cands: Candidates, history: History) -> Candidates:
        if self.amount == 0.0 or history.tokens.size == 0:
            return cands
        seen, _ = history.counts()
        at, _ = cands.positions_of(seen)
        cands.logits[at] -= self.amount
        return cands

    def text(self) -> str:
        return f"{self.name}={format_number(self.amount)}"


@dataclass(frozen=True, slots=True)
class FrequencyPenalty(Stage):
    """Subtract amount times the token's count in the history from its logit.

    The additive frequency penalty of common API practice (no paper); negative values
    reward repetition.
    """

    amount: float
    name: ClassVar[str] = "frequency_penalty"

    def __post_init__(self) -> None:
        object.__setattr__(self, "amount", check_real(self.name, self.amount))

    def apply(self, cands: Candidates, history: History) -> Candidates:
        if self.amount == 0.0 or history.tokens.size == 0:
            return cands
        seen, counts = history.counts()
        at, present = cands.positions_of(seen)
        cands.logits[at] -= self.amount * counts[present]
        return cands

    def text(self) -> str:
        return f"{self.name}={format_number(self.amount)}"


def banned_by_ngrams(tokens: np.ndarray, n: int) -> np.ndarray:
    """Token ids that would complete an n-gram already present in `tokens` (ascending, distinct).

    The next token t is banned when ``tokens[-(n-1):] + [t]`` occurs somewhere in
    `tokens`; for n = 1 every token of the history is banned.
    """
    if n == 0 or tokens.size < n:
        return np.zeros(0, dtype=np.int64)
    if n == 1:
        return np.unique(tokens)
    windows = sliding_window_view(tokens, n)
    prefix = tokens[tokens.size - n + 1 :]
    matches = (windows[:, :-1] == prefix).all(axis=1)
    return np.unique(windows[matches, -1])


@dataclass(frozen=True, slots=True)
class NoRepeatNGram(Stage):
    """Ban every token that would complete an n-gram already in the history.

    The rule of transformers' NoRepeatNGramLogitsProcessor (from fairseq). One
    difference: when every token still in play is banned, transformers leaves all
    scores at -inf (no distribution at all); here the most likely are kept, since
    every truncating stage keeps at least one token. n = 0 bans nothing.
    """

    n: int
    name: ClassVar[str] = "no_repeat_ngram"

    def __post_init__(self) -> None:
        object.__setattr__(self, "n", check_whole(self.name, self.n, 0))

    def apply(self, cands: Candidates, history: History) -> Candidates:
        if self.n == 0:
            return cands
        banned = banned_by_ngrams(history.tokens, self.n)
        if banned.size == 0:
            return cands
        at, _ = cands.positions_of(banned)
        mask = np.ones(cands.size, dtype=bool)
        mask[at] = False
        return cands.keep(mask if mask.any() else keep_most_likely(cands))

    def text(self) -> str:
        return f"{self.name}={self.n}"
