"""The replay's "under every recipe" approximation from a stored top-20 list.

Sources: hand-computed worked examples; and, on real steps of the tiny model, the
reference warpers of transformers 5.24.0 (`TopKLogitsWarper`, `MinPLogitsWarper`)
applied to the full logits. Top-k (Fan et al. 2018) keeps the k most likely tokens;
min-p (Nguyen et al. 2024) keeps tokens with p >= min_p * p_max; both cuts depend only
on ranks and ratios, so when the kept set lies inside the stored list the stand-in
must give the exact kept count and final probability.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from tui.session.approx_recipes import approx_recipe_rows, partial_logits
from tui.session.record import StepRecord, TopToken
from tui.session.views import PaneView

try:
    from app_session import scenario
except ImportError:
    from tests.app_session import scenario


def _record(top: list[tuple[int, float]], chosen: int, step: int = 0) -> StepRecord:
    tops = tuple(TopToken(i, f"t{i}", p, p) for i, p in top)
    raw = dict(top)[chosen]
    return StepRecord(step=step, pane=0, token_id=chosen, text=f"t{chosen}", rank=2,
                      raw_prob=raw, final_prob=raw, kept=len(top), raw_entropy=1.0,
                      final_entropy=1.0, u=0.5, top=tops)


def _pane(pid: int, recipe: str) -> PaneView:
    return PaneView(pid, f"p{pid}", recipe, None, (), None)


def _rows(record: StepRecord, recipes: list[str], history=()):
    own = _pane(0, "temperature=1")
    others = [_pane(i + 1, r) for i, r in enumerate(recipes)]
    rows = approx_recipe_rows(record, list(history), own, [own, *others])
    assert rows[0].own and not rows[0].approx
    return {r.recipe: r for r in rows[1:]}


def test_a_full_list_needs_no_tail_and_is_exact_by_hand():
    rec = _record([(10, 0.5), (11, 0.3), (12, 0.2)], chosen=11)
    part = partial_logits(rec)
    assert part.tail == 0 and part.stored == 3
    rows = _rows(rec, ["top_k=2", "greedy"])
    # by hand: top-2 keeps {0.5, 0.3}; the chosen 0.3 becomes 0.3 / 0.8 = 0.375
    assert rows["top_k=2"].kept == 2 and not rows["top_k=2"].kept_beyond
    assert rows["top_k=2"].chosen_prob == pytest.approx(0.375)
    assert rows["greedy"].kept == 1 and rows["greedy"].chosen_prob == 0.0  # not rank 1
    assert all(r.approx for r in rows.values())


def test_the_missing_mass_sits_below_the_stored_tokens_by_hand():
    rec = _record([(10, 0.4), (11, 0.2)], chosen=11)
    part = partial_logits(rec, history=[11, 99, 98, 99])
    # by hand: rest 0.4, least stored 0.2 -> the fewest shares below 0.2: 3 of 0.4 / 3
    assert part.tail == 3 and part.stored_mass == pytest.approx(0.6)
    p = np.exp(part.logits)
    assert p[:2] == pytest.approx([0.4, 0.2]) and p[2:5] == pytest.approx([0.4 / 3] * 3)
    assert math.fsum(p) == pytest.approx(1.0)
    assert part.index[11] == 1  # a stored context token keeps its slot
    assert np.isneginf(part.logits[[part.index[99], part.index[98]]]).all()  # masked, one each
    rows = _rows(rec, ["min_p=0.4", "min_p=0.3"])
    # by hand: min_p 0.4 -> threshold 0.16 keeps only the stored two: 0.2 / 0.6 = 1/3
    assert rows["min_p=0.4"].kept == 2 and not rows["min_p=0.4"].kept_beyond
    assert rows["min_p=0.4"].chosen_prob == pytest.approx(1 / 3)
    # min_p 0.3 -> threshold 0.12 < 0.4 / 3: the tail is kept too, and so flagged
    assert rows["min_p=0.3"].kept_beyond


@pytest.fixture(scope="module")
def real_steps(tiny_model_dir):
    """(record, full logits, history) of every pane at several steps of a real session."""
    from tui.model.catalogue import load_model
    from tui.session.opening import open_session

    lm = load_model(str(tiny_model_dir))
    engine, _ = open_session(lm, scenario(), seed=11)
    for _ in range(6):
        engine.step()
    out = []
    for pane in engine.view().panes:
        for step in (0, 2, 5):
            out.append((pane.records[step], engine.logits_at(pane.id, step),
                        engine.history(pane.id, step)))
    return out


@pytest.mark.parametrize("recipe,warpers", [
    ("top_k=5", [("TopKLogitsWarper", 5)]),
    ("top_k=12", [("TopKLogitsWarper", 12)]),
    ("min_p=0.3", [("MinPLogitsWarper", 0.3)]),
    # a temperature shifts every log-probability by the same amount: still exact
    ("temperature=1.5 top_k=5", [("TemperatureLogitsWarper", 1.5), ("TopKLogitsWarper", 5)]),
    ("temperature=0.7 min_p=0.3", [("TemperatureLogitsWarper", 0.7),
                                   ("MinPLogitsWarper", 0.3)]),
])
def test_rank_and_ratio_cuts_match_transformers_on_real_steps(real_steps, recipe, warpers):
    import torch
    import transformers

    checked = 0
    for record, logits, history in real_steps:
        warped = torch.tensor(logits, dtype=torch.float64)[None]
        for cls, arg in warpers:  # applied in the recipe's order, as transformers chains them
            warped = getattr(transformers, cls)(arg)(torch.tensor([history]), warped)
        warped = warped[0]
        ref_kept = torch.isfinite(warped).nonzero().flatten().tolist()
        stored = {t.token_id for t in record.top}
        if not set(ref_kept) <= stored:
            continue  # the stored list cannot tell; the row is flagged, tested above
        ref_p = float(torch.softmax(warped, -1)[record.token_id])
        row = _rows(record, [recipe], history)[recipe]
        assert row.kept == len(ref_kept) and not row.kept_beyond
        assert row.chosen_prob == pytest.approx(ref_p, rel=1e-4, abs=1e-9)
        checked += 1
    assert checked >= 6  # enough real cases were inside the stored list


def test_a_cut_past_the_stored_list_is_flagged(real_steps):
    record, _, history = real_steps[0]
    row = _rows(record, ["temperature=1.3"], history)["temperature=1.3"]
    assert row.approx and row.kept_beyond and row.kept == len(record.top)
    assert 0.0 < row.chosen_prob < 1.0
