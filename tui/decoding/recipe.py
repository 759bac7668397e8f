"""`Recipe`: what a pane decodes with, an ordered chain of stages as a frozen value.

``Recipe.parse("repetition_penalty=1.2 temperature=0.8 top_p=0.9")`` applies the
stages in the written order. `str(recipe)` is the canonical text, which parses back
to an equal recipe; recipes hash, so they can key caches and sweep tables. The
mutable part (mirostat's mu) lives in a `Sampler`, one per pane.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Iterable, Sequence

import numpy as np

from tui.decoding.grammar import parse_stages
from tui.decoding.sampler import Sampler, StageResult
from tui.decoding.scaling import Greedy, Temperature
from tui.decoding.stage import RecipeError, Stage

if TYPE_CHECKING:  # heavy imports only for type checkers
    from transformers import GenerationConfig, LogitsProcessorList


def _normalise(stage: Stage) -> Stage:
    if not isinstance(stage, Stage):
        raise RecipeError(f"a recipe holds stages, got {type(stage).__name__}")
    if isinstance(stage, Temperature) and stage.value == 0.0:
        return Greedy()  # temperature=0 means greedy
    return stage


@dataclass(frozen=True, slots=True)
class Recipe:
    """An ordered chain of decoding stages. The empty recipe samples from the model as is."""

    stages: tuple[Stage, ...] = ()

    def __post_init__(self) -> None:
        object.__setattr__(self, "stages", tuple(_normalise(s) for s in self.stages))

    @classmethod
    def parse(cls, text: str) -> Recipe:
        """A recipe from its text (see `tui.decoding.grammar`); raises RecipeError."""
        return cls(parse_stages(text))

    @classmethod
    def of(cls, stages: Iterable[Stage]) -> Recipe:
        """A recipe from stage objects, e.g. ``Recipe.of([TopK(50), Temperature(0.7)])``."""
        return cls(tuple(stages))

    def __str__(self) -> str:
        return " ".join(stage.text() for stage in self.stages)

    def __repr__(self) -> str:
        return f"Recipe.parse({str(self)!r})"

    def __len__(self) -> int:
        return len(self.stages)

    @property
    def keeps_one_token(self) -> bool:
        """True when the final distribution holds one token at every step, whatever the
        logits (a `greedy` stage): every draw then gives the same text, so one sample
        stands for any number of them. (top_k=1 keeps every token tied at the top.)"""
        return any(isinstance(stage, Greedy) for stage in self.stages)

    @property
    def after_greedy(self) -> tuple[Stage, ...]:
        """The stages after the first `greedy`: they receive one token and can change nothing."""
        at = next((i for i, s in enumerate(self.stages) if isinstance(s, Greedy)), None)
        return () if at is None else self.stages[at + 1:]

    @property
    def is_stateful(self) -> bool:
        """True when a stage keeps state between steps (so panes need their own sampler)."""
        return any(stage.stateful for stage in self.stages)

    def sampler(self) -> Sampler:
        """A fresh per-pane sampler, every stage in its initial state."""
        return Sampler(self.stages)

    def distribution(self, logits: object, history: Sequence[int] | np.ndarray = ()) -> np.ndarray:
        """The final (V,) float64 distribution under the stages' initial state.

        `logits` is the model's float vector (float32 or float64, -inf = masked);
        `history` the token ids of the context so far, for the penalties.
        """
        return Sampler(self.stages).distribution(logits, history)

    def trace(self, logits: object, history: Sequence[int] | np.ndarray = ()) -> list[StageResult]:
        """The input and the result after every stage, for the inspect view."""
        return Sampler(self.stages).trace(logits, history)

    def generate_kwargs(self) -> dict[str, Any]:
        """Keyword arguments that make ``model.generate(ids, **kwargs, max_new_tokens=...)``
        sample from exactly this recipe's distribution at every step.

        They hold the recipe's processors and switch off every stage generate() would
        add from the model's generation_config.json or its own defaults. Call it anew
        for each generate() call (mirostat keeps its state in the processors).
        """
        from tui.decoding.hf import generate_kwargs

        return generate_kwargs(self)

    def as_logits_processor(self) -> LogitsProcessorList:
        """The recipe's stages as a transformers LogitsProcessorList, in order.

        Not enough on its own: generate() appends its own sampling stages after a
        custom list (the global ``top_k=50`` and whatever the model's
        generation_config.json sets). Use `generate_kwargs()`, which holds this list.
        """
        from tui.decoding.hf import as_logits_processor

        return as_logits_processor(self)

    def to_generation_config(self) -> GenerationConfig:
        """A transformers GenerationConfig for what it can express; warns about the rest."""
        from tui.decoding.hf import to_generation_config

        return to_generation_config(self)
