"""One lockstep step of one batch row, in numpy: the math the engine and the sweep runner share.

Both decode rows in lockstep (every live row holds the same number of tokens) and
make the same per-row moves at each step: the model's own distribution (log-softmax
in float64, its entropy), the recipe's final distribution, the draw, the sampler's
state update, the kept-set size and entropy, and the stop rules. Torch stays with the
callers (the forward pass and the cache rows); this module sees numpy arrays only.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from tui.decoding import Sampler, draw
from tui.session.record import STOP_CONTEXT, STOP_EOS, STOP_LENGTH, STOP_STRING


@dataclass(frozen=True)
class RawStep:
    """The model's own distribution for a batch at one step (float64, numerically stable)."""

    logp: np.ndarray  # (B, V) log-probabilities
    probs: np.ndarray  # (B, V)
    entropy: np.ndarray  # (B,) in nats

    @classmethod
    def of(cls, logits: np.ndarray) -> "RawStep":
        x, e, total = _shifted_exp(logits)
        probs = e / total
        logp = x - np.log(total)
        with np.errstate(invalid="ignore"):
            terms = np.where(probs > 0, probs * logp, 0.0)
        entropy = np.maximum(-terms.sum(axis=-1), 0.0)  # never -0.0
        return cls(logp, probs, entropy)


def log_softmax(logits: np.ndarray) -> np.ndarray:
    """The model's own log-probabilities alone (B, V), float64: what the sweep runner keeps."""
    x, _e, total = _shifted_exp(logits)
    return x - np.log(total)


def _shifted_exp(logits: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(x - max, exp of it, its row sums), float64."""
    x = logits.astype(np.float64)
    x -= x.max(axis=-1, keepdims=True)
    e = np.exp(x)
    return x, e, e.sum(axis=-1, keepdims=True)


@dataclass(frozen=True)
class Emitted:
    """What one row emitted at one step."""

    token: int
    final: np.ndarray  # (V,) the distribution the token was drawn from
    forced: bool

    @property
    def kept(self) -> int:
        return int(np.count_nonzero(self.final))

    @property
    def final_entropy(self) -> float:
        nz = self.final[self.final > 0]
        nats = -float((nz * np.log(nz)).sum())
        return nats if nats > 0 else 0.0  # a one-hot distribution: +0.0, not -0.0


def emit(sampler: Sampler, logits: np.ndarray, history: Sequence[int], u: float,
         forced: int | None = None) -> Emitted:
    """Apply the row's recipe, draw with `u` (or take `forced`), and update the sampler's state.

    A forced token may lie outside the kept set: the state still learns of it.
    """
    final = sampler.distribution(logits, history)
    token = forced if forced is not None else draw(final, u)
    sampler.observe(token, None if forced is not None else final)
    return Emitted(int(token), final, forced is not None)


def rank_of(logp: np.ndarray, token: int) -> int:
    """1-based rank of `token` under the model, ties broken by lower token id first."""
    chosen = logp[token]
    return 1 + int(np.count_nonzero(logp > chosen)) + int(np.count_nonzero(logp[:token] == chosen))


def top_ids(logp: np.ndarray, n: int) -> list[int]:
    """The `n` most likely token ids, most likely first, ties by id."""
    n = min(n, logp.shape[0])
    part = np.argpartition(-logp, n - 1)[:n]
    return sorted((int(i) for i in part), key=lambda i: (-float(logp[i]), i))


@dataclass(frozen=True)
class StopRules:
    """When a row ends: end of sequence, a stop string, the token budget, the context."""

    eos_ids: frozenset[int]
    stop_strings: tuple[str, ...]
    max_new_tokens: int
    max_context: int

    @property
    def span(self) -> int:
        """How much recent text must be kept to find a stop string ending in the next piece."""
        return max((len(s) for s in self.stop_strings), default=0)

    def ending(self, token: int, step: int, prompt_len: int, text: str) -> str | None:
        """Why the row ends after emitting `token` at `step` (`text`: its recent text), or None."""
        if token in self.eos_ids:
            return STOP_EOS
        if self.stop_strings and any(s in text for s in self.stop_strings):
            return STOP_STRING
        if step + 1 >= self.max_new_tokens:
            return STOP_LENGTH
        if prompt_len + step + 1 >= self.max_context:
            return STOP_CONTEXT
        return None
