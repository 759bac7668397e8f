"""Running a chain of stages: the per-pane `Sampler` and the stage-by-stage trace.

The engine owns one `Sampler` per pane. Each step it calls
``sampler.distribution(logits, history)``, draws a token from the result, then
``sampler.observe(token_id, final_probs)`` so that stateful stages (mirostat's mu)
learn which token was drawn. Forks copy the sampler. `trace` runs the same chain
and keeps every stage's result for the inspect view; it never changes the state.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from tui.decoding.stage import Candidates, History, RecipeError, Stage, StatefulStage, bound_logits

INPUT = "input"  # the stage text of a trace's first entry: the model's own distribution


@dataclass(frozen=True, slots=True, eq=False)
class StageResult:
    """The distribution after one stage of a recipe (or, at position 0, the input).

    `position` is 0 for the input (the softmax of the model's logits, with tokens
    masked to -inf already cut) and k for the k-th stage. `kept_ids` are the token
    ids still in play, ascending; `probs` the (V,) distribution renormalised over them.
    """

    position: int
    stage: str
    kept_ids: np.ndarray
    probs: np.ndarray

    @property
    def kept(self) -> int:
        """How many tokens are still in play."""
        return int(self.kept_ids.size)

    @property
    def kept_mask(self) -> np.ndarray:
        """(V,) booleans: which tokens are still in play."""
        mask = np.zeros(self.probs.size, dtype=bool)
        mask[self.kept_ids] = True
        return mask

    def keeps(self, token_id: int) -> bool:
        """Whether `token_id` is still in play after this stage."""
        at = int(np.searchsorted(self.kept_ids, token_id))
        return at < self.kept_ids.size and int(self.kept_ids[at]) == token_id


def cut_by(trace: Sequence[StageResult], token_id: int) -> StageResult | None:
    """The first entry of `trace` that no longer keeps `token_id`; None if it survives.

    An answer at position 0 means the token was masked (-inf) before the recipe ran.
    """
    for result in trace:
        if not result.keeps(token_id):
            return result
    return None


class Sampler:
    """One pane's way of decoding: a recipe's stages and the state of its stateful ones."""

    def __init__(self, stages: Sequence[Stage]) -> None:
        self._stages = tuple(stages)
        self._stateful = tuple(i for i, s in enumerate(self._stages) if s.stateful)
        self._states: list[Any] = []
        self._memos: list[Any] = []
        self.reset()

    @property
    def stages(self) -> tuple[Stage, ...]:
        return self._stages

    @property
    def states(self) -> tuple[Any, ...]:
        """Each stage's current state (mirostat: mu in bits), None for stateless stages."""
        return tuple(self._states)

    def reset(self) -> None:
        """Back to every stage's initial state."""
        self._states = [
            s.initial_state() if isinstance(s, StatefulStage) else None for s in self._stages
        ]
        self._memos = [None] * len(self._stages)

    def copy(self) -> Sampler:
        """An independent sampler in the same state (for a fork)."""
        twin = Sampler.__new__(Sampler)
        twin._stages, twin._stateful = self._stages, self._stateful
        twin._states, twin._memos = list(self._states), list(self._memos)
        return twin

    def _run(self, logits: object, history: Sequence[int] | np.ndarray, trace: list[StageResult] | None) -> Candidates:
        cands = Candidates.from_logits(logits)
        past = History(history, cands.vocab_size)
        if trace is not None:
            trace.append(StageResult(0, INPUT, cands.ids, cands.full_probs()))
        for i, stage in enumerate(self._stages):
            if isinstance(stage, StatefulStage):
                cands, memo = stage.apply_with_state(cands, past, self._states[i])
                if trace is None:
                    self._memos[i] = memo
            elif stage.reshapes_logits:  # penalties: huge values may overflow, bound them
                with np.errstate(over="ignore"):
                    cands = stage.apply(cands, past)
                cands = bound_logits(cands, stage.text())
            else:
                cands = stage.apply(cands, past)
            if trace is not None:
                trace.append(StageResult(i + 1, stage.text(), cands.ids, cands.full_probs()))
        return cands

    def distribution(self, logits: object, history: Sequence[int] | np.ndarray = ()) -> np.ndarray:
        """The final (V,) float64 distribution: sums to 1, exact zeros outside the kept set."""
        return self._run(logits, history, None).full_probs()

    def trace(self, logits: object, history: Sequence[int] | np.ndarray = ()) -> list[StageResult]:
        """The input and the result of every stage, in order, under the current state."""
        results: list[StageResult] = []
        self._run(logits, history, results)
        return results

    def observe(self, token_id: int, final_probs: np.ndarray | None = None) -> None:
        """Tell the stateful stages which token was drawn from the last `distribution`.

        `final_probs`, if given, is that distribution; a token it gives zero
        probability is refused (it cannot have been drawn from it).
        """
        token = int(token_id)
        if final_probs is not None and not (0 <= token < len(final_probs) and final_probs[token] > 0):
            raise RecipeError(f"token {token} has zero probability in the final distribution; it cannot be drawn")
        for i in self._stateful:
            memo = self._memos[i]
            if memo is None:
                raise RecipeError("observe() needs a distribution() call first, one per drawn token")
            stage = self._stages[i]
            assert isinstance(stage, StatefulStage)
            self._states[i] = stage.next_state(self._states[i], memo, token)
            self._memos[i] = None
