"""What the inspect view shows about one pane at one step, computed without Textual.

`top_rows` turns a `StepRecord` into the top-20 table (rank, raw and final probability,
cumulative raw mass, kept or cut, and which stage cut it, from a stage-by-stage trace).
`recipe_rows` answers "would the other setting have let this token in?": every pane's
recipe applied to this pane's logits and context at this step. Both are called on a
worker thread (they may need a forward pass for the logits).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from tui.decoding import INPUT, Recipe, RecipeError, StageResult, cut_by
from tui.session.change_log import ChangeLog
from tui.session.record import StepRecord
from tui.session.views import PaneView

MASKED = "masked"  # a token cut before the recipe ran (-inf logit)


@dataclass(frozen=True)
class TopRow:
    """One row of the top-20 table."""

    rank: int
    token_id: int
    text: str
    raw_prob: float
    final_prob: float
    cum_raw: float | None  # raw mass of this row and the rows above; None off the list
    kept: bool
    cut_by: str | None  # the stage that cut it; None when kept or not known
    chosen: bool


@dataclass(frozen=True)
class RecipeRow:
    """One pane's recipe applied to the inspected pane's logits at the inspected step."""

    pane_id: int
    name: str
    recipe: str
    kept: int
    chosen_prob: float
    own: bool  # the inspected pane itself (exact values from its record)
    error: str = ""
    approx: bool = False  # from a stored top-20 list, not the logits (see approx_recipes)
    kept_beyond: bool = False  # (approx) tokens past the stored list were kept as well


def recipe_at(pane: PaneView, step: int) -> str:
    """The recipe a pane decoded `step` with (its recipe log; the present one if none)."""
    return ChangeLog(pane.recipe_log).at(step, pane.recipe)


def top_rows(record: StepRecord, trace: Sequence[StageResult] | None = None) -> tuple[TopRow, ...]:
    """The record's top tokens in raw order, plus the chosen token when it is off the list."""
    rows: list[TopRow] = []
    cum = 0.0
    for i, tok in enumerate(record.top):
        cum += tok.raw_prob
        rows.append(top_row(i + 1, tok.token_id, tok.text, tok.raw_prob, tok.final_prob, cum,
                         tok.token_id == record.token_id, trace))
    if all(r.token_id != record.token_id for r in rows):
        rows.append(top_row(record.rank, record.token_id, record.text, record.raw_prob,
                         record.final_prob, None, True, trace))
    return tuple(rows)


def top_row(rank: int, token_id: int, text: str, raw: float, final: float, cum: float | None,
         chosen: bool, trace: Sequence[StageResult] | None) -> TopRow:
    kept = final > 0
    stage = None
    if not kept and trace is not None:
        result = cut_by(trace, token_id)
        if result is not None:
            stage = MASKED if result.stage == INPUT else result.stage
    return TopRow(rank, token_id, text, raw, final, cum, kept, stage, chosen)


def recipe_rows(logits: np.ndarray, history: Sequence[int], record: StepRecord,
                own: PaneView, panes: Sequence[PaneView]) -> tuple[RecipeRow, ...]:
    """Each pane's recipe (as at this step) on `own`'s logits and context at the step.

    The inspected pane's own row is exact (from its record). The others start their
    stages from the initial state, so a stateful stage (mirostat) reads as on step one.
    """
    return each_recipe(
        record, own, panes, lambda recipe: recipe.distribution(logits, history),
        lambda pane, text, final: RecipeRow(pane.id, pane.name, text,
                                            int(np.count_nonzero(final)),
                                            float(final[record.token_id]), False))


def each_recipe(record: StepRecord, own: PaneView, panes: Sequence[PaneView],
                run: Callable[[Recipe], np.ndarray],
                row: Callable[[PaneView, str, np.ndarray], RecipeRow]) -> tuple[RecipeRow, ...]:
    """One row per pane: `own` exact from its record, the others `row(run(recipe))`."""
    rows: list[RecipeRow] = []
    for pane in panes:
        recipe = recipe_at(pane, record.step)
        if pane.id == own.id:
            rows.append(RecipeRow(pane.id, pane.name, recipe, record.kept, record.final_prob,
                                  True))
            continue
        try:
            final = run(Recipe.parse(recipe))
        except (RecipeError, ValueError) as exc:
            rows.append(RecipeRow(pane.id, pane.name, recipe, 0, 0.0, False, str(exc)))
            continue
        rows.append(row(pane, recipe, final))
    return tuple(rows)


def format_prob(p: float | None) -> str:
    """A probability for a narrow column: 12.3%, 4e-05, 0, or - when unknown."""
    if p is None:
        return "-"
    if p <= 0.0:
        return "0"
    if p >= 0.001:
        return f"{p * 100:.1f}%"
    return f"{p:.0e}"
