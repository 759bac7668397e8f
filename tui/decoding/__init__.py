"""Decoding recipes: ordered chains of the published samplers, in pure numpy.

A `Recipe` turns one step's logits into the distribution a pane draws from:
``Recipe.parse("repetition_penalty=1.2 temperature=0.8 top_p=0.9")``. The engine
keeps one `Sampler` per pane (mirostat's state lives there) and draws with `draw`.
Stage classes live in `scaling`, `truncation`, `penalties` and `mirostat`; the
transformers bridge in `hf` (imported only when asked for).
"""

from tui.decoding.draw import draw, draw_order, entropy
from tui.decoding.grammar import STAGES
from tui.decoding.mirostat import MirostatV2
from tui.decoding.penalties import (FrequencyPenalty, NoRepeatNGram, PresencePenalty,
                                    RepetitionPenalty)
from tui.decoding.recipe import Recipe
from tui.decoding.sampler import INPUT, Sampler, StageResult, cut_by
from tui.decoding.scaling import Greedy, Temperature
from tui.decoding.stage import RecipeError, Stage, StatefulStage
from tui.decoding.truncation import Epsilon, Eta, MinP, TopK, TopP, TypicalP

__all__ = [
    "INPUT",
    "STAGES",
    "Epsilon",
    "Eta",
    "FrequencyPenalty",
    "Greedy",
    "MinP",
    "MirostatV2",
    "NoRepeatNGram",
    "PresencePenalty",
    "Recipe",
    "RecipeError",
    "RepetitionPenalty",
    "Sampler",
    "Stage",
    "StageResult",
    "StatefulStage",
    "Temperature",
    "TopK",
    "TopP",
    "TypicalP",
    "cut_by",
    "draw",
    "draw_order",
    "entropy",
]
