"""The bridge to transformers: a recipe inside generate(), or as a GenerationConfig.

`generate_kwargs` gives the keyword arguments that make
``model.generate(ids, **kwargs, max_new_tokens=...)`` sample from exactly the
recipe's distribution at every step: the recipe's processors, and every field of
generate() that would add a stage of its own switched off explicitly, since
generate() fills any field a caller leaves unset from the model's
generation_config.json and then from its global defaults (``top_k=50``).

`as_logits_processor` is the recipe's part of that: the stages, in order. It uses
transformers' own processors where their rule is ours on every input they accept
(TemperatureLogitsWarper, TopKLogitsWarper, MinPLogitsWarper, TypicalLogitsWarper,
RepetitionPenaltyLogitsProcessor) and our stages, wrapped, for the rest: where
transformers has none (greedy, presence and frequency penalties, mirostat) and where
its rule differs (top_p ties, epsilon and eta at the threshold, and a no_repeat_ngram
ban that would leave no token, where NoRepeatNGramLogitsProcessor leaves every score
at -inf and generate() fails; see the stage docstrings). Temperature and the
repetition penalty are guarded (`RangeGuarded`): where transformers' rule would push a
score past float32's range, generate() would fail on the inf, so there our stage runs,
and its row is shifted to a top of 0 (softmax ignores a shift), as every row of our
stages is whenever it comes back past the scores' range.

`to_generation_config` maps what GenerationConfig's fields can say. It cannot say
the stages it has no field for, nor an order other than transformers' fixed one;
those are named in one `RecipeWarning`, the order only where it changes the
distribution (`COMMUTING` lists the pairs where it cannot).

Imports torch and transformers; import this module only when you need it.
Checked against transformers 5.24.0.
"""

from __future__ import annotations

import math
import warnings
from typing import TYPE_CHECKING, Any

import numpy as np
import torch
from transformers import (GenerationConfig, LogitsProcessor, LogitsProcessorList, MinPLogitsWarper,
                          RepetitionPenaltyLogitsProcessor, TemperatureLogitsWarper,
                          TopKLogitsWarper, TypicalLogitsWarper)

from tui.decoding.mirostat import MirostatV2
from tui.decoding.penalties import (FrequencyPenalty, NoRepeatNGram, PresencePenalty,
                                    RepetitionPenalty)
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
    """The row back in `like`'s dtype. Our stages keep logits within +-1e307 in float64;
    where the top one is past the dtype's range (float32: 3.4e38), the row is shifted so
    that it is 0 (softmax ignores a shift), so no score becomes +inf and generate()
    does not fail; scores below the range become -inf, which had probability 0 anyway."""
    out = np.full(cands.vocab_size, -math.inf)
    out[cands.ids] = cands.logits
    top = out.max()
    if np.isfinite(top) and top > torch.finfo(like.dtype).max:
        out -= top
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
    (the last column of `input_ids`) back into that row's mu. A call whose
    `input_ids` do not extend the last call's by one token starts over, so the object
    can serve several generate() calls. Meant for sampling without beams.
    """

    def __init__(self, stage: MirostatV2) -> None:
        self.stage = stage
        self._mu: list[float] = []
        self._memos: list[Any] = []
        self._last_ids: torch.Tensor | None = None

    def _continues(self, input_ids: torch.Tensor) -> bool:
        last = self._last_ids
        return (last is not None and input_ids.shape[0] == last.shape[0]
                and input_ids.shape[1] == last.shape[1] + 1 and bool(torch.equal(input_ids[:, :-1], last)))

    def __call__(self, input_ids: torch.LongTensor, scores: torch.FloatTensor) -> torch.FloatTensor:
        batch = input_ids.shape[0]
        if self._continues(input_ids):
            for row in range(batch):
                token = int(input_ids[row, -1])
                self._mu[row] = self.stage.next_state(self._mu[row], self._memos[row], token)
        else:
            self._mu = [self.stage.initial_state()] * batch
            self._memos = [None] * batch
        self._last_ids = input_ids.detach().clone()
        rows = []
        for row in range(batch):
            cands = _row_candidates(scores[row])
            history = _row_history(input_ids[row], cands.vocab_size)
            kept, self._memos[row] = self.stage.apply_with_state(cands, history, self._mu[row])
            rows.append(_row_scores(kept, scores))
        return torch.stack(rows)


class RangeGuarded(LogitsProcessor):
    """transformers' own processor for a stage (`theirs`), unless on these scores its
    result could leave the range of the scores' dtype: it can multiply a score's size by
    `growth`, and past float32's 3.4e38 the score is inf and generate() fails. Then our
    stage runs instead, whose row comes back shifted to a top of 0 (`_row_scores`)."""

    def __init__(self, stage: Stage, theirs: LogitsProcessor, growth: float) -> None:
        self.theirs = theirs
        self.growth = growth
        self._ours = StageLogitsProcessor(stage)

    def __call__(self, input_ids: torch.LongTensor, scores: torch.FloatTensor) -> torch.FloatTensor:
        if self.growth > 1.0:
            finite = scores[torch.isfinite(scores)]
            top = float(finite.abs().max()) if finite.numel() else 0.0
            if top * self.growth >= torch.finfo(scores.dtype).max:
                return self._ours(input_ids, scores)
        return self.theirs(input_ids, scores)


class TemperatureProcessor(RangeGuarded):
    """TemperatureLogitsWarper, guarded: a T of about 1e-35 and less overflows float32
    for logits in the tens; our `Temperature` then tends to greedy with ties kept."""

    def __init__(self, stage: Temperature) -> None:
        super().__init__(stage, TemperatureLogitsWarper(stage.value), 1.0 / stage.value)


class RepetitionPenaltyProcessor(RangeGuarded):
    """RepetitionPenaltyLogitsProcessor, guarded: a theta below 1 divides a repeated
    token's positive score by theta (a theta above 1 only shrinks positive scores and
    sends negative ones toward -inf, where their probability is 0 anyway)."""

    def __init__(self, stage: RepetitionPenalty) -> None:
        super().__init__(stage, RepetitionPenaltyLogitsProcessor(stage.theta),
                         1.0 / stage.theta if stage.theta < 1.0 else 1.0)


def processor_for(stage: Stage) -> LogitsProcessor | None:
    """The processor doing `stage` inside generate(); None when the stage changes nothing."""
    if isinstance(stage, Temperature):
        return TemperatureProcessor(stage) if stage.value != 1.0 else None
    if isinstance(stage, TopK):
        return TopKLogitsWarper(stage.k) if stage.k > 0 else None
    if isinstance(stage, MinP):
        return MinPLogitsWarper(stage.min_p) if stage.min_p > 0 else None
    if isinstance(stage, TypicalP):
        return TypicalLogitsWarper(stage.mass) if stage.mass < 1 else None
    if isinstance(stage, RepetitionPenalty):
        return RepetitionPenaltyProcessor(stage) if stage.theta != 1.0 else None
    if isinstance(stage, NoRepeatNGram) and stage.n == 0:
        return None
    if isinstance(stage, MirostatV2):
        return MirostatLogitsProcessor(stage)
    return StageLogitsProcessor(stage)


def as_logits_processor(recipe: Recipe) -> LogitsProcessorList:
    """A LogitsProcessorList that applies `recipe` in its order.

    Not enough on its own: generate() runs its own sampling stages after a custom
    list (its global ``top_k=50``, and whatever the model's generation_config.json
    sets). `generate_kwargs` switches those off; use it.
    """
    return LogitsProcessorList(p for p in map(processor_for, recipe.stages) if p is not None)


# Every GenerationConfig field (transformers 5.24.0) that makes generate() add a stage to
# the per-step distribution, change the search, or change what output_scores holds, at
# the value that switches it off. generate() takes a field from the model's
# generation_config.json whenever the caller leaves it unset, so each is set here;
# fields that only say when to stop (max_new_tokens, eos_token_id, ...) or what to
# return are left to the caller.
GENERATE_NEUTRAL: dict[str, Any] = {
    # the search: one plain sampling chain (no beams, no assistant, no contrastive or DoLa)
    "num_beams": 1, "num_beam_groups": 1, "penalty_alpha": None, "dola_layers": None,
    "constraints": None, "force_words_ids": None, "prompt_lookup_num_tokens": None,
    "assistant_early_exit": None, "use_mtp": None,
    # the sampling stages of GenerationMixin._get_logits_processor
    "temperature": 1.0, "top_k": 0, "top_p": 1.0, "min_p": None, "top_h": None, "typical_p": 1.0,
    "epsilon_cutoff": 0.0, "eta_cutoff": 0.0,
    # its other processors: penalties, bans, forced and suppressed tokens, length rules
    "repetition_penalty": 1.0, "encoder_repetition_penalty": 1.0, "no_repeat_ngram_size": 0,
    "encoder_no_repeat_ngram_size": 0, "bad_words_ids": None, "sequence_bias": None,
    "guidance_scale": None, "min_length": 0, "min_new_tokens": None, "forced_bos_token_id": None,
    "forced_eos_token_id": None, "remove_invalid_values": False,
    "exponential_decay_length_penalty": None, "suppress_tokens": None,
    "begin_suppress_tokens": None, "watermarking_config": None, "renormalize_logits": False,
    "token_healing": False,
}


def generate_kwargs(recipe: Recipe) -> dict[str, Any]:
    """Keyword arguments for ``model.generate(ids, **kwargs, ...)`` that sample from
    exactly `recipe`'s distribution at every step, whatever the model's own
    generation_config says; a caller adds max_new_tokens, output_scores and the like.

    Fresh processors on every call: mirostat keeps its mu inside them, and starts
    over when a new generate() call begins. To change a field anyway (say
    min_new_tokens), update the dict rather than pass the keyword twice.
    """
    return {"do_sample": True, **GENERATE_NEUTRAL, "logits_processor": as_logits_processor(recipe)}


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
# The fields the stages map onto, at the values that switch them off (GENERATE_NEUTRAL's),
# so that a model's own defaults do not leak into an exported config. min_p is 0.0 here
# (keeps every token, and reads as a number in the file) where generate() is told None.
_NEUTRAL = {field: GENERATE_NEUTRAL[field] for field, _ in LIBRARY_ORDER.values()} | {"min_p": 0.0}
_PENALTY_FIELDS = frozenset(LIBRARY_ORDER[t][0] for t in _PENALTIES if t in LIBRARY_ORDER)
_NEUTRAL_PENALTIES = {f: v for f, v in _NEUTRAL.items() if f in _PENALTY_FIELDS}
_NEUTRAL_SAMPLING = {f: v for f, v in _NEUTRAL.items() if f not in _PENALTY_FIELDS}
# Pairs of stages whose order never changes the distribution, so transformers' fixed
# order is harmless for them; every other pair of different kinds can come out
# differently when swapped (tests/test_export_order.py holds a witness for each).
# - temperature, top_k: dividing by T > 0 keeps the ranking, and top_k reads only ranks.
# - temperature, repetition_penalty: x / T has x's sign, so the penalty scales it by the
#   same factor before or after.
# - no_repeat_ngram with temperature or repetition_penalty: the ban reads the history,
#   not the logits, and neither of the other two moves a token in or out.
# - top_k, min_p: min_p cuts at a ratio to the top token, which renormalising over the
#   top k leaves alone, and both keep a most-likely prefix closed under ties.
COMMUTING: frozenset[frozenset[type[Stage]]] = frozenset(
    frozenset(pair) for pair in (
        (Temperature, TopK), (Temperature, RepetitionPenalty), (Temperature, NoRepeatNGram),
        (RepetitionPenalty, NoRepeatNGram), (TopK, MinP),
    )
)


def changes_nothing(stage: Stage) -> bool:
    """True for a stage at its neutral value (temperature=1, top_k=0, top_p=1, ...)."""
    mapped = LIBRARY_ORDER.get(type(stage))
    if mapped is None:
        return False
    field, attribute = mapped
    return getattr(stage, attribute) == _NEUTRAL[field]


def order_matters(first: Stage, second: Stage) -> bool:
    """Whether running `second` before `first` can give another distribution than the recipe's."""
    if changes_nothing(first) or changes_nothing(second):
        return False
    return frozenset({type(first), type(second)}) not in COMMUTING


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
        fields.update(_NEUTRAL_SAMPLING)
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
    for i, earlier in enumerate(placed):
        for later in placed[i + 1:]:  # every pair, not just neighbours: the order is a permutation
            if rank.index(type(earlier)) > rank.index(type(later)) and order_matters(earlier, later):
                left_out.append(f"{later.text()} will run before {earlier.text()} (transformers' fixed order)")
    if left_out:
        warnings.warn("GenerationConfig differs from the recipe: " + "; ".join(left_out), RecipeWarning, stacklevel=3)
    return GenerationConfig(**fields)
