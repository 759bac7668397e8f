"""Stages that reshape the distribution without choosing a kept set: temperature, greedy.

`greedy` is the limit of `temperature` as it falls to 0, so ``temperature=0`` is
read as `greedy` (see `recipe.py`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from tui.decoding.stage import (LOGIT_BOUND, Candidates, History, Stage, check_interval,
                                format_number)


@dataclass(frozen=True, slots=True)
class Temperature(Stage):
    """Divide the logits by T: T < 1 sharpens the distribution, T > 1 flattens it.

    Softmax with temperature (Ackley et al. 1985; the standard softmax-temperature of
    the trade). Same as transformers' TemperatureLogitsWarper. T = 0 is `Greedy`.

    When the quotients would leave the logit range (T of 1e-300 and less), the top
    logit is subtracted first: the same distribution (softmax ignores a shift), with
    the top token at 0 and the rest at or below it, floored at -LOGIT_BOUND; so a
    tiny T tends to greedy (ties kept) instead of overflowing.
    """

    value: float
    name: ClassVar[str] = "temperature"
    reshapes_logits: ClassVar[bool] = False  # keeps its result in range itself

    def __post_init__(self) -> None:
        object.__setattr__(self, "value", check_interval(self.name, self.value, 0.0, 0.0, "[inf"))

    def apply(self, cands: Candidates, history: History) -> Candidates:
        if self.value == 0.0:
            return Greedy().apply(cands, history)
        if self.value == 1.0:
            return cands
        logits = cands.logits  # changed in place: the chain owns it
        # logits are within +-LOGIT_BOUND already, so only T < 1 can push a quotient out
        if self.value < 1.0:
            high = logits.max()
            if max(high, -logits.min()) > LOGIT_BOUND * self.value:
                logits -= high
                with np.errstate(over="ignore"):
                    np.divide(logits, self.value, out=logits)
                np.maximum(logits, -LOGIT_BOUND, out=logits)
                return cands
        np.divide(logits, self.value, out=logits)
        return cands

    def text(self) -> str:
        return f"{self.name}={format_number(self.value)}"


@dataclass(frozen=True, slots=True)
class Greedy(Stage):
    """Keep only the most likely token; on a tie, the lowest token id.

    Unlike the truncating stages (which never split tokens of equal probability),
    greedy must pick one, and picks by token id, the same order the draw uses.
    """

    name: ClassVar[str] = "greedy"
    reshapes_logits: ClassVar[bool] = False

    def apply(self, cands: Candidates, history: History) -> Candidates:
        best = int(np.argmax(cands.logits))  # first maximum = lowest id (ids ascend)
        return Candidates(cands.ids[best : best + 1], cands.logits[best : best + 1], cands.vocab_size)

    def text(self) -> str:
        return self.name
