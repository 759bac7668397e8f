"""The bridge to transformers: a recipe as a LogitsProcessorList or a GenerationConfig.

`as_logits_processor` does what the recipe does, in order, inside
``model.generate(..., do_sample=True, logits_processor=...)``. It uses transformers'
own processors where their rule is ours on every input they accept
(TemperatureLogitsWarper, TopKLogitsWarper, MinPLogitsWarper, TypicalLogitsWarper,
NoRepeatNGramLogitsProcessor) and our stages, wrapped, for the rest: where
transformers has none (greedy, presence and frequency penalties, mirostat) and
where its rule differs (top_p ties, epsilon and eta at the threshold, repetition
penalty on negative logits; see the stage docstrings).

`to_generation_config` maps what GenerationConfig's fields can say. It cannot say
the order (transformers applies its stages in one fixed order) nor the stages it
has no field for; those are named in one `RecipeWarning`.

Imports torch and transformers; import this module only when you need it.
Checked against transformers 5.24.0.
"""

from __future__ import annotations

import math
import warnings
from typing import TYPE_CHECKING, Any

import numpy as np
import torch
from transformers import (
    GenerationConfig,
    LogitsProcessor,
    LogitsProcessorList,
    MinPLogitsWarper,
    NoRepeatNGramLogitsProcessor,
    TemperatureLogitsWarper,
    TopKLogitsWarper,
    TypicalLogitsWarper,
)

from tui.decoding.mirostat import MirostatV2
from tui.decoding.penalties import (
    FrequencyPenalty,
    NoRepeatNGram,
    PresencePenalty,
    RepetitionPenalty,
)
from tui.decoding.scaling import Greedy, Temperature
from tui.decoding.stage import Candidates, History, Stage, StatefulStage
from tui.decoding.truncation import Epsilon, Eta, MinP, TopK, TopP, TypicalP

if TYPE_CHECKING:
    from tui.decoding.recipe import Recipe


class RecipeWarning(UserWarning):
    """A recipe could be exported only in part; the message names what was left out."""


def _row_candidates(scores_row: torch.Tensor) -> Candidates:
    return Candidates.from_logits(scores_row.detach().to(torch.float64).cpu().numpy())


def _row_history(ids_row: torch.Tensor, vocab_size: int) -> History:
    ids = ids_row.detach().cpu().numpy().astype(np.int64)
    return History(ids[ids < vocab_size], vocab_size)  # ids past the output vocab cannot recur


def _row_scores(cands: Candidates, like: torch.Tensor) -> torch.Tensor:
    out = np.full(cands.vocab_size, -math.inf)
    out[cands.ids] = cands.logits
    return torch.from_numpy(out).to(dtype=like.dtype, device=like.device)


class StageLogitsProcessor(LogitsProcessor):
    """One of our stateless stages as a transformers LogitsProcessor, row by row."""

    def __init__(self, stage: Stage) -> None:
        if isinstance(stage, StatefulStage):
            raise TypeError(f"{stage.text()} keeps state; use MirostatLogitsProcessor")
        self.stage = stage

    def __call__(self, input_ids: torch.LongTensor, scores: torch.FloatTensor) -> torch.FloatTensor:
        rows = []
        for row in range(scores.shape[0]):
            cands = _row_candidates(scores[row])
            kept = self.stage.apply(cands, _row_history(input_ids[row], cands.vocab_size))
            rows.append(_row_scores(kept, scores))
        return torch.stack(rows)


class MirostatLogitsProcessor(LogitsProcessor):
    """Mirostat v2 inside generate(): one mu per batch row.

    Each call first feeds the token that generate() appended since the last call
    (the last column of `input_ids`) back into that row's mu. A call whose length
    does not continue the last one starts over, so the object can serve several
    generate() calls. Meant for sampling without beams.
    """

    def __init__(self, stage: MirostatV2) -> None:
        self.stage = stage
        self._mu: list[float] = []
        self._memos: list[Any] = []
        self._length = -1

    def __call__(self, input_ids: torch.LongTensor, scores: torch.FloatTensor) -> torch.FloatTensor:
        batch, length = input_ids.shape
        if length == self._length + 1 and len(self._mu) == batch:
            for row in range(batch):
                token = int(input_ids[row, -1])
                self._mu[row] = self.stage.next_state(self._mu[row], self._memos[row], token)
        else:
            self._mu = [self.stage.initial_state()] * batch
            self._memos = [None] * batch
        self._length = length
        rows = []
        for row in range(batch):
            cands = _row_candidates(scores[row])
            history = _row_history(input_ids[row], cands.vocab_size)
            kept, self._memos[row] = self.stage.apply_with_state(cands, history, self._mu[row])
            rows.append(_row_scores(kept, scores))
        return torch.stack(rows)


def processor_for(stage: Stage) -> LogitsProcessor | None:
    """The processor doing `stage` inside generate(); None when the stage changes nothing."""
    if isinstance(stage, Temperature):
        return TemperatureLogitsWarper(stage.value) if stage.value != 1.0 else None
    if isinstance(stage, TopK):
        return TopKLogitsWarper(stage.k) if stage.k > 0 else None
    if isinstance(stage, MinP):
        return MinPLogitsWarper(stage.min_p) if stage.min_p > 0 else None
    if isinstance(stage, TypicalP):
        return TypicalLogitsWarper(stage.mass) if stage.mass < 1 else None
    if isinstance(stage, NoRepeatNGram):
        return NoRepeatNGramLogitsProcessor(stage.n) if stage.n > 0 else None
    if isinstance(stage, MirostatV2):
        return MirostatLogitsProcessor(stage)
    return StageLogitsProcessor(stage)


def as_logits_processor(recipe: Recipe) -> LogitsProcessorList:
    """A LogitsProcessorList that applies `recipe` in its order. Use with do_sample=True."""
    return LogitsProcessorList(p for p in map(processor_for, recipe.stages) if p is not None)


# GenerationConfig applies these in this order (transformers 5.24.0,
# GenerationMixin._get_logits_processor): stage -> (its field, the stage attribute).
LIBRARY_ORDER: dict[type[Stage], tuple[str, str]] = {
    RepetitionPenalty: ("repetition_penalty", "theta"),
    NoRepeatNGram: ("no_repeat_ngram_size", "n"),
    Temperature: ("temperature", "value"),
    TopK: ("top_k", "k"),
    TopP: ("top_p", "p"),
    MinP: ("min_p", "min_p"),
    TypicalP: ("typical_p", "mass"),
    Epsilon: ("epsilon_cutoff", "epsilon"),
    Eta: ("eta_cutoff", "epsilon"),
}
# Stages that change logits by the history, so that they can move the argmax before greedy.
_PENALTIES = (RepetitionPenalty, PresencePenalty, FrequencyPenalty, NoRepeatNGram)
# Values that switch a field off, so that a model's own defaults do not leak in.
_NEUTRAL = {"temperature": 1.0, "top_k": 0, "top_p": 1.0, "min_p": 0.0, "typical_p": 1.0,
            "epsilon_cutoff": 0.0, "eta_cutoff": 0.0}
_NEUTRAL_PENALTIES = {"repetition_penalty": 1.0, "no_repeat_ngram_size": 0}


def to_generation_config(recipe: Recipe) -> GenerationConfig:
    """A GenerationConfig for the stages its fields can express; a RecipeWarning names the rest."""
    stages = list(recipe.stages)
    greedy_at = next((i for i, s in enumerate(stages) if isinstance(s, Greedy)), None)
    left_out: list[str] = []
    if greedy_at is not None:
        # After greedy nothing changes; before it only what can move the argmax matters.
        before = stages[:greedy_at]
        left_out += [f"{s.text()} (greedy decoding skips it)" for s in before if isinstance(s, TypicalP)]
        stages = [s for s in before if isinstance(s, _PENALTIES)]
    fields: dict[str, Any] = {"do_sample": greedy_at is None, **_NEUTRAL_PENALTIES}
    if greedy_at is None:
        fields.update(_NEUTRAL)
    placed: list[Stage] = []
    for stage in stages:
        mapped = LIBRARY_ORDER.get(type(stage))
        if mapped is None:
            left_out.append(f"{stage.text()} (no GenerationConfig field)")
        elif any(type(p) is type(stage) for p in placed):
            left_out.append(f"{stage.text()} (second {stage.name} stage)")
        else:
            field, attribute = mapped
            fields[field] = getattr(stage, attribute)
            placed.append(stage)
    rank = list(LIBRARY_ORDER)
    for earlier, later in zip(placed, placed[1:]):
        if rank.index(type(earlier)) > rank.index(type(later)):
            left_out.append(f"{later.text()} will run before {earlier.text()} (transformers' fixed order)")
    for stage in placed:
        if isinstance(stage, RepetitionPenalty) and stage.theta != 1.0:
            left_out.append(f"{stage.text()} multiplies negative logits in transformers (Keskar et al. divide)")
    if left_out:
        warnings.warn("GenerationConfig differs from the recipe: " + "; ".join(left_out), RecipeWarning, stacklevel=3)
    return GenerationConfig(**fields)
