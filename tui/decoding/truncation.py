"""The truncating stages: top_k, top_p, min_p, typical_p, epsilon, eta.

Each keeps a subset of the tokens in play and leaves their logits alone; the next
stage (or the final softmax) renormalises. Two rules hold for all of them:

* at least one token is kept;
* tokens of equal probability are kept or cut together, so the result never
  depends on token ids (greedy is the one stage that must break ties).

Reference implementation compared against: transformers 5.24.0
(`transformers/generation/logits_process.py`). Its behaviour is a choice, not a
definition, in three places, noted at each class: how ties at a boundary are
broken, `min_tokens_to_keep` (fixed at 1 here), and strict versus non-strict
inequalities at a threshold.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from tui.decoding.ranking import first_reaching
from tui.decoding.stage import (Candidates, History, Stage, check_interval, check_whole,
                                format_number, keep_most_likely)


def _dot(a: np.ndarray, b: np.ndarray) -> float:
    """Sum of a * b without a temporary and without BLAS (whose threads wake slowly here)."""
    return float(np.einsum("i,i->", a, b))


@dataclass(frozen=True, slots=True)
class TopK(Stage):
    """Keep the k most likely tokens (Fan et al. 2018); k = 0 keeps everything.

    Tokens tied with the k-th are kept too, so a tie can keep more than k. This is
    also what transformers' TopKLogitsWarper does (it keeps every score >= the
    k-th largest).
    """

    k: int
    name: ClassVar[str] = "top_k"
    reshapes_logits: ClassVar[bool] = False

    def __post_init__(self) -> None:
        object.__setattr__(self, "k", check_whole(self.name, self.k, 0))

    def apply(self, cands: Candidates, history: History) -> Candidates:
        n = cands.size
        if self.k == 0 or self.k >= n:
            return cands
        kth = np.partition(cands.logits, n - self.k)[n - self.k]
        return cands.keep(cands.logits >= kth)

    def text(self) -> str:
        return f"{self.name}={self.k}"


@dataclass(frozen=True, slots=True)
class TopP(Stage):
    """Nucleus sampling (Holtzman et al. 2020, sec. 3.1): keep the smallest set of most
    likely tokens whose probability adds up to at least p.

    Ties: the tokens tied with the last one needed are all kept. transformers'
    TopPLogitsWarper instead cuts inside the tie group, in the order its sort left
    the tied tokens (for a flat 4-token vector and p = 0.5 it keeps ids 2 and 3);
    the paper does not say. Away from ties both keep the same set. p = 1 keeps all.
    """

    p: float
    name: ClassVar[str] = "top_p"
    reshapes_logits: ClassVar[bool] = False

    def __post_init__(self) -> None:
        object.__setattr__(self, "p", check_interval(self.name, self.p, 0.0, 1.0, "(]"))

    def apply(self, cands: Candidates, history: History) -> Candidates:
        if self.p >= 1.0 or cands.size == 1:
            return cands
        probs = cands.probs()
        # order by logit (same order as probability, and spread evenly for the bins)
        last = first_reaching(cands.logits, probs, self.p, inclusive=True, descending=True)
        return cands.keep(probs >= probs[last])

    def text(self) -> str:
        return f"{self.name}={format_number(self.p)}"


@dataclass(frozen=True, slots=True)
class MinP(Stage):
    """min-p sampling (Nguyen et al. 2024): keep tokens with probability at least
    min_p times the top token's probability; min_p = 0 keeps everything.

    Same as transformers' MinPLogitsWarper (it also removes only ``p < min_p * p_max``).
    """

    min_p: float
    name: ClassVar[str] = "min_p"
    reshapes_logits: ClassVar[bool] = False

    def __post_init__(self) -> None:
        object.__setattr__(self, "min_p", check_interval(self.name, self.min_p, 0.0, 1.0, "[]"))

    def apply(self, cands: Candidates, history: History) -> Candidates:
        if self.min_p == 0.0:
            return cands
        probs = cands.probs()
        return cands.keep(probs >= self.min_p * probs.max())

    def text(self) -> str:
        return f"{self.name}={format_number(self.min_p)}"


@dataclass(frozen=True, slots=True)
class TypicalP(Stage):
    """Locally typical sampling (Meister et al. 2023): order tokens by how far their
    surprise -log p lies from the entropy H, and keep the smallest such prefix whose
    probability adds up to at least tau. The most likely token can be cut.

    Tokens tied with the boundary's distance are all kept, as transformers'
    TypicalLogitsWarper also does. tau = 1 keeps everything (transformers refuses 1).
    """

    mass: float
    name: ClassVar[str] = "typical_p"
    reshapes_logits: ClassVar[bool] = False

    def __post_init__(self) -> None:
        object.__setattr__(self, "mass", check_interval(self.name, self.mass, 0.0, 1.0, "(]"))

    def apply(self, cands: Candidates, history: History) -> Candidates:
        if self.mass >= 1.0 or cands.size == 1:
            return cands
        log_probs = cands.logits - cands.logits.max()
        probs = np.exp(log_probs)
        total = float(probs.sum())
        probs /= total
        log_probs -= math.log(total)
        entropy = -_dot(probs, log_probs)
        distance = log_probs  # |-log p - H| = |log p + H|, computed in place
        distance += entropy
        np.abs(distance, out=distance)
        last = first_reaching(distance, probs, self.mass, inclusive=True)
        return cands.keep(distance <= distance[last])

    def text(self) -> str:
        return f"{self.name}={format_number(self.mass)}"


@dataclass(frozen=True, slots=True)
class Epsilon(Stage):
    """epsilon sampling (Hewitt et al. 2022): keep tokens with probability
    strictly above epsilon; if none is, keep the most likely (ties together).

    The paper's allowed set is ``P(x) > epsilon``; transformers' EpsilonLogitsWarper
    keeps ``P(x) >= epsilon``. They differ only for a probability exactly equal to
    epsilon; we follow the paper. epsilon = 0 keeps everything.
    """

    epsilon: float
    name: ClassVar[str] = "epsilon"
    reshapes_logits: ClassVar[bool] = False

    def __post_init__(self) -> None:
        object.__setattr__(self, "epsilon", check_interval(self.name, self.epsilon, 0.0, 1.0, "[)"))

    def apply(self, cands: Candidates, history: History) -> Candidates:
        if self.epsilon == 0.0:
            return cands
        mask = cands.probs() > self.epsilon
        return cands.keep(mask if mask.any() else keep_most_likely(cands))

    def text(self) -> str:
        return f"{self.name}={format_number(self.epsilon)}"


@dataclass(frozen=True, slots=True)
class Eta(Stage):
    """eta sampling (Hewitt et al. 2022): keep tokens with probability strictly
    above ``eta = min(epsilon, sqrt(epsilon) * exp(-H))``, H the entropy in nats;
    if none is, keep the most likely (ties together).

    The paper allows words above either threshold (epsilon, or alpha * exp(-H)) and
    sets alpha = sqrt(epsilon) as a heuristic; transformers' EtaLogitsWarper fixes
    the same formula but keeps ``P(x) >= eta``. We follow the paper's strict ``>``.
    The parameter is the paper's epsilon; epsilon = 0 keeps everything.
    """

    epsilon: float
    name: ClassVar[str] = "eta"
    reshapes_logits: ClassVar[bool] = False

    def __post_init__(self) -> None:
        object.__setattr__(self, "epsilon", check_interval(self.name, self.epsilon, 0.0, 1.0, "[)"))

    def threshold(self, entropy: float) -> float:
        """The cut-off eta for a distribution of the given entropy (nats)."""
        return min(self.epsilon, math.sqrt(self.epsilon) * math.exp(-entropy))

    def apply(self, cands: Candidates, history: History) -> Candidates:
        if self.epsilon == 0.0:
            return cands
        shifted = cands.logits - cands.logits.max()
        probs = np.exp(shifted)
        total = float(probs.sum())
        probs /= total
        entropy = math.log(total) - _dot(probs, shifted)  # H = log Z - E[logit - max]
        mask = probs > self.threshold(entropy)
        return cands.keep(mask if mask.any() else keep_most_likely(cands))

    def text(self) -> str:
        return f"{self.name}={format_number(self.epsilon)}"
