"""The pieces every decoding stage shares: the error type, the working set, the history.

A stage turns one `Candidates` (the tokens still in play and their current logits)
into another. Candidates hold only the kept tokens, in ascending token id, so that
after a `top_k=50` the stages that follow work on 50 numbers instead of the whole
vocabulary. `History` holds the context's token ids for the penalties and converts
them only when a stage asks. Pure numpy.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from dataclasses import dataclass
from functools import lru_cache
from typing import Any, ClassVar, Sequence

import numpy as np


class RecipeError(ValueError):
    """A recipe text, a stage parameter or an input vector that cannot be used.

    The message is one line that names the stage or argument and the allowed range,
    e.g. ``top_p must be in (0, 1], got 1.5``.
    """


# Every logit a stage sees lies in [-LOGIT_BOUND, LOGIT_BOUND]. Half the float64 range,
# so that the difference of any two (softmax's max shift, typical sampling's distances)
# is still finite; a stage's arithmetic that leaves the range (temperature=1e-320, a
# penalty of 1e308) is brought back by `bound_logits`. Model logits are float32
# (|x| < 3.5e38), far inside it.
LOGIT_BOUND = 1e307


@lru_cache(maxsize=8)
def _all_ids(vocab_size: int) -> np.ndarray:
    ids = np.arange(vocab_size, dtype=np.int64)
    ids.flags.writeable = False
    return ids


def softmax(logits: np.ndarray) -> np.ndarray:
    """Probabilities of finite float64 logits (max-shifted, so no overflow).

    One new array and in-place steps: on a 2-core CPU every fresh (V,) float64 array
    costs ~0.4 ms of page faults, more than the arithmetic.
    """
    e = logits - logits.max()
    np.exp(e, out=e)
    e /= e.sum()
    return e


@dataclass(frozen=True, slots=True)
class Candidates:
    """The tokens still in play at one point of a chain, and their current logits.

    `ids` are ascending token ids (int64), `logits` the matching finite float64
    values. When every token of the vocabulary is still in play, `ids` is
    ``arange(vocab_size)`` and a token id is its own position. The chain that made
    a `Candidates` owns its `logits` array, and stages may update it in place
    (fresh (V,) arrays cost more in page faults than the arithmetic does).
    """

    ids: np.ndarray
    logits: np.ndarray
    vocab_size: int

    @classmethod
    def from_logits(cls, logits: object) -> Candidates:
        """Check a model's logit vector and make the starting set from it.

        Accepts float32 or float64 (any real dtype) of shape (V,). ``-inf`` marks a
        masked token; NaN, ``+inf`` and an all ``-inf`` vector are refused.
        """
        x = np.asarray(logits)
        if x.ndim != 1 or x.size == 0:
            raise RecipeError(f"logits must be a non-empty vector of shape (V,), got shape {x.shape}")
        if not (np.issubdtype(x.dtype, np.floating) or np.issubdtype(x.dtype, np.integer)):
            raise RecipeError(f"logits must be real numbers, got dtype {x.dtype}")
        x = x.astype(np.float64, copy=True)  # the chain owns this copy and may write into it
        top = x.max()
        if not top < math.inf:  # NaN or +inf somewhere (max propagates NaN)
            bad = np.flatnonzero(np.isnan(x) | np.isposinf(x))
            kind = "NaN" if np.isnan(x[bad[0]]) else "+inf"
            raise RecipeError(
                f"logits hold {kind} at token {int(bad[0])} ({bad.size} bad entries in all); "
                "refusing to sample from them"
            )
        if top == -math.inf:
            raise RecipeError("every logit is -inf: no token can be sampled")
        low = x.min()
        if low > -math.inf:
            cands = cls(_all_ids(x.size), x, x.size)
        else:
            ids = np.flatnonzero(x > -math.inf)
            cands = cls(ids, x[ids], x.size)
            low = cands.logits.min()
        if top > LOGIT_BOUND or low < -LOGIT_BOUND:
            np.clip(cands.logits, -LOGIT_BOUND, LOGIT_BOUND, out=cands.logits)
        return cands

    @property
    def size(self) -> int:
        """How many tokens are still in play."""
        return int(self.ids.size)

    @property
    def is_full(self) -> bool:
        """True while every token of the vocabulary is still in play."""
        return self.ids.size == self.vocab_size

    def probs(self) -> np.ndarray:
        """Softmax over the tokens in play (aligned with `ids`)."""
        return softmax(self.logits)

    def keep(self, mask: np.ndarray) -> Candidates:
        """The subset where `mask` (aligned with `ids`) is true; callers never pass all false."""
        if mask.all():
            return self
        return Candidates(self.ids[mask], self.logits[mask], self.vocab_size)

    def positions_of(self, tokens: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Positions in `ids` of those `tokens` still in play, and a mask of which are."""
        if self.is_full:
            return tokens, np.ones(tokens.shape, dtype=bool)
        at = np.minimum(np.searchsorted(self.ids, tokens), self.ids.size - 1)
        present = self.ids[at] == tokens
        return at[present], present

    def full_probs(self) -> np.ndarray:
        """A (V,) float64 distribution: softmax over the tokens in play, exact zeros elsewhere."""
        if self.is_full:
            return self.probs()
        out = np.zeros(self.vocab_size, dtype=np.float64)
        out[self.ids] = self.probs()
        return out


def bound_logits(cands: Candidates, stage: str) -> Candidates:
    """`cands` with every logit brought into [-LOGIT_BOUND, LOGIT_BOUND], in place.

    A logit past the bound (an overflow to +-inf included) is set to the bound: tokens
    pushed to +inf stay the only likely ones and tie among themselves; tokens pushed to
    -inf get probability 0 beside any token left inside the range (and tie, if none
    is), but stay in play, so a stage that only reshapes never empties the kept set.
    NaN cannot come from finite logits and the checked parameters; if it does, the
    stage has a bug, and the error (not a RecipeError: the recipe is valid) says so.
    """
    logits = cands.logits
    high, low = logits.max(), logits.min()
    if high <= LOGIT_BOUND and low >= -LOGIT_BOUND:
        return cands
    if np.isnan(high):
        raise FloatingPointError(f"{stage} produced NaN logits")
    np.clip(logits, -LOGIT_BOUND, LOGIT_BOUND, out=logits)
    return cands


def keep_most_likely(cands: Candidates) -> np.ndarray:
    """Mask of the tokens tied at the highest logit: what a stage keeps when it would keep none."""
    return cands.logits == cands.logits.max()


class History:
    """The token ids of the context so far (prompt and generated), checked on first use.

    Most recipes never look at the history, so the conversion and the counting
    happen only when a penalty stage asks, and at most once per step.
    """

    def __init__(self, tokens: Sequence[int] | np.ndarray, vocab_size: int) -> None:
        self._raw = tokens
        self._vocab_size = vocab_size
        self._tokens: np.ndarray | None = None
        self._counts: tuple[np.ndarray, np.ndarray] | None = None

    @property
    def tokens(self) -> np.ndarray:
        """The history as an int64 vector, every id checked to lie in [0, V)."""
        if self._tokens is None:
            self._tokens = self._convert(self._raw)
        return self._tokens

    def counts(self) -> tuple[np.ndarray, np.ndarray]:
        """The distinct token ids of the history (ascending) and how often each occurs."""
        if self._counts is None:
            self._counts = np.unique(self.tokens, return_counts=True)
        return self._counts

    def _convert(self, raw: Sequence[int] | np.ndarray) -> np.ndarray:
        arr = np.asarray(raw)
        if arr.size == 0:
            return np.zeros(0, dtype=np.int64)
        if arr.ndim != 1 or not np.issubdtype(arr.dtype, np.integer):
            raise RecipeError(
                f"history must be a flat sequence of integer token ids, got dtype {arr.dtype} "
                f"and shape {arr.shape}"
            )
        arr = arr.astype(np.int64, copy=False)
        low, high = int(arr.min()), int(arr.max())
        if low < 0 or high >= self._vocab_size:
            bad = low if low < 0 else high
            raise RecipeError(
                f"history holds token id {bad}, outside the vocabulary 0..{self._vocab_size - 1}"
            )
        return arr


class Stage(ABC):
    """One step of a recipe: a function from candidates to candidates.

    Subclasses are frozen dataclasses (so recipes are hashable values) with a
    class-level `name`, the word used in recipe text.
    """

    name: ClassVar[str]
    stateful: ClassVar[bool] = False
    # False for stages that only cut (they leave the logits as they are); the chain
    # checks the logits' range after every stage that may change them (`bound_logits`).
    reshapes_logits: ClassVar[bool] = True

    @abstractmethod
    def apply(self, cands: Candidates, history: History) -> Candidates:
        """The candidates after this stage. Truncating stages keep at least one token.

        `cands.logits` belongs to the running chain: a stage may write into it
        rather than copy it, and the caller must not use `cands` afterwards.
        """

    @abstractmethod
    def text(self) -> str:
        """The canonical recipe text of this stage, e.g. ``top_p=0.9``."""

    def __str__(self) -> str:
        return self.text()


class StatefulStage(Stage):
    """A stage whose behaviour depends on state that the draw updates (mirostat's mu).

    The state lives outside the frozen stage, in the pane's `Sampler`; `apply` uses
    the initial state.
    """

    stateful: ClassVar[bool] = True

    @abstractmethod
    def initial_state(self) -> Any:
        """The state before the first step."""

    @abstractmethod
    def apply_with_state(self, cands: Candidates, history: History, state: Any) -> tuple[Candidates, Any]:
        """The candidates after this stage under `state`, and a memo for `next_state`."""

    @abstractmethod
    def next_state(self, state: Any, memo: Any, token_id: int) -> Any:
        """The state after `token_id` was drawn from a distribution this stage helped make."""

    def apply(self, cands: Candidates, history: History) -> Candidates:
        return self.apply_with_state(cands, history, self.initial_state())[0]


# --- parameter checks shared by the stage constructors -------------------------------


def format_number(value: float | int) -> str:
    """Shortest text that reads back to the same number: 0.8, 1e-05, 50, 1 (not 1.0)."""
    if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
        return str(int(value))
    text = repr(float(value))
    return text[:-2] if text.endswith(".0") else text


def check_real(stage: str, value: object) -> float:
    """`value` as a finite float, or a RecipeError naming `stage`."""
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise RecipeError(f"{stage} must be a number, got {value!r}")
    number = float(value)
    if not math.isfinite(number):
        raise RecipeError(f"{stage} must be a finite number, got {value!r}")
    return number


def check_whole(stage: str, value: object, minimum: int) -> int:
    """`value` as an int >= `minimum`, or a RecipeError naming `stage`."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise RecipeError(f"{stage} must be a whole number >= {minimum}, got {value!r}")
    if value < minimum:
        raise RecipeError(f"{stage} must be a whole number >= {minimum}, got {value}")
    return int(value)


def check_interval(stage: str, value: object, low: float, high: float, closed: str) -> float:
    """`value` as a float inside an interval; `closed` is one of "[]", "(]", "[)", "()", "(inf"."""
    number = check_real(stage, value)
    ok_low = number >= low if closed[0] == "[" else number > low
    ok_high = True if closed[1:] == "inf" else (number <= high if closed[1] == "]" else number < high)
    if not (ok_low and ok_high):
        if closed[1:] == "inf":
            bound = f">= {format_number(low)}" if closed[0] == "[" else f"> {format_number(low)}"
            raise RecipeError(f"{stage} must be {bound}, got {format_number(number)}")
        interval = f"{closed[0]}{format_number(low)}, {format_number(high)}{closed[1]}"
        raise RecipeError(f"{stage} must be in {interval}, got {format_number(number)}")
    return number
