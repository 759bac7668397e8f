"""The inspect view's "under every recipe" part without the model, from the stored top-20.

A transcript keeps, per step, only the 20 most likely raw tokens (and the chosen one).
`partial_logits` builds a stand-in distribution from them: the stored tokens with
their raw probabilities, then the missing mass spread evenly over enough extra
"tail" tokens that each is less likely than the least likely stored one, so the
stored tokens keep their ranks. Context tokens that are not stored get their own
masked (-inf) slots, so that penalties and n-gram bans see the context's shape.

`approx_recipe_rows` applies every pane's recipe to that stand-in. What it gets
right: which stored tokens survive a rank or ratio cut (top_k up to 20, min_p) and,
when no tail token survives, their final probabilities. What it cannot know: how the
real tail would shift a cut that depends on normalised mass (top_p after a
temperature, typical_p, epsilon, eta), nor what a penalty that looks at a logit's sign
does (repetition_penalty: the stand-in holds log-probabilities, all negative). The
inspect view labels every such row as an approximation.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from tui.session.record import StepRecord
from tui.session.step_analysis import RecipeRow, each_recipe
from tui.session.views import PaneView

MAX_TAIL = 1 << 18  # more tail slots than any common vocabulary has tokens
TAIL_MARGIN = 1e-6  # relative gap between a tail share and the least likely stored token

@dataclass(frozen=True)
class PartialLogits:
    """A stand-in logit vector: stored tokens first, then tail slots, then masked context."""

    logits: np.ndarray  # float64 log-probabilities; -inf for the masked context slots
    index: dict[int, int]  # token id -> slot, for the stored tokens and the context
    stored: int  # slots 0..stored-1 are the stored tokens
    tail: int  # slots stored..stored+tail-1 share the missing mass
    stored_mass: float  # raw mass of the stored tokens (sum of their probabilities)

def partial_logits(record: StepRecord, history: Sequence[int] = ()) -> PartialLogits:
    """The stand-in for `record`'s raw distribution (see the module docstring)."""
    probs: dict[int, float] = {t.token_id: t.raw_prob for t in record.top}
    probs.setdefault(record.token_id, record.raw_prob)  # chosen off the list
    ids = [i for i, p in probs.items() if p > 0]
    known = np.array([probs[i] for i in ids], dtype=np.float64)
    mass = float(known.sum())
    rest = max(0.0, 1.0 - mass)
    floor = float(known.min()) if len(known) else 1.0
    cap = floor * (1 - TAIL_MARGIN)  # every tail share stays below the least stored token
    tail = min(MAX_TAIL, math.ceil(rest / cap)) if rest > 1e-12 and cap > 0 else 0
    index = {token: slot for slot, token in enumerate(ids)}
    masked = [t for t in dict.fromkeys([*history, record.token_id]) if t not in index]
    for k, token in enumerate(masked):
        index[token] = len(ids) + tail + k
    share = min(rest / tail, cap) if tail else 0.0  # (below cap unless MAX_TAIL was hit)
    logits = np.concatenate([np.log(known), np.full(tail, math.log(share) if tail else 0.0),
                             np.full(len(masked), -np.inf)])
    return PartialLogits(logits, index, len(ids), tail, mass)

def approx_recipe_rows(record: StepRecord, history: Sequence[int], own: PaneView,
                       panes: Sequence[PaneView]) -> tuple[RecipeRow, ...]:
    """Each pane's recipe (as at this step) on the stand-in; the own row is exact."""
    part = partial_logits(record, history)
    context = [part.index[t] for t in history]
    chosen = part.index[record.token_id]
    def row(pane: PaneView, recipe: str, final: np.ndarray) -> RecipeRow:
        kept_stored = int(np.count_nonzero(final[:part.stored]))
        beyond = bool(np.count_nonzero(final[part.stored:part.stored + part.tail]))
        return RecipeRow(pane.id, pane.name, recipe, kept_stored, float(final[chosen]),
                         False, approx=True, kept_beyond=beyond)

    return each_recipe(record, own, panes,
                       lambda recipe: recipe.distribution(part.logits, context), row)
