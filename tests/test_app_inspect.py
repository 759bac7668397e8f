"""The inspect view past the top 20: every rank, the kept set, search, the row cursor.

Checked against numpy on the engine's own logits (softmax and a sort by hand) and the
recipe's distribution (`Recipe.distribution`), and against a transcript's stored list.
"""

from __future__ import annotations

import numpy as np
import pytest
from textual.widgets import DataTable, Input

from tui.app.inspect_screen import InspectScreen
from tui.decoding import Recipe
from tui.session.distribution import StepDistribution
from tui.session.record import StepRecord, TopToken

try:
    from app_session import live_app, live_source, wait_until
except ImportError:
    from tests.app_session import live_app, live_source, wait_until


@pytest.fixture(scope="module")
def lm(tiny_model_dir):
    from tui.model.catalogue import load_model

    return load_model(str(tiny_model_dir))


def _record(**changes) -> StepRecord:
    base = dict(step=0, pane=0, token_id=7, text="x", rank=2, raw_prob=0.3, final_prob=0.4,
                kept=2, raw_entropy=1.1, final_entropy=0.9, u=0.25,
                top=(TopToken(5, " a", 0.5, 0.6), TopToken(7, "x", 0.3, 0.4),
                     TopToken(9, "y", 0.1, 0.0)))
    base.update(changes)
    return StepRecord(**base)


def test_a_stored_record_lists_what_it_stored_and_says_it_is_partial():
    dist = StepDistribution.from_record(_record())
    assert not dist.complete and dist.size == 3
    assert [r.rank for r in dist.rows(100, str)] == [1, 2, 3]  # no more than stored
    assert [r.token_id for r in dist.kept_rows(str)] == [5, 7]
    assert [r.token_id for r in dist.search("Y", str)] == [9]


def test_the_whole_distribution_matches_numpy_by_hand():
    logits = np.array([0.0, 2.0, -1.0, 2.0, 1.0, -np.inf])  # a tie at 2.0, a masked token
    recipe = Recipe.parse("top_k=3")
    trace = recipe.sampler().trace(logits, ())
    e = np.exp(logits - 2.0)
    raw = e / e.sum()
    record = _record(token_id=4, rank=3, raw_prob=float(raw[4]), final_prob=0.0)
    dist = StepDistribution.from_trace(record, logits, trace)
    # ranks: ties by the lower id (as the engine's `rank`), the masked token last
    assert dist.order.tolist() == [1, 3, 4, 0, 2, 5]
    np.testing.assert_allclose(dist.raw, raw)
    np.testing.assert_allclose(dist.final, recipe.distribution(logits, ()))
    rows = dist.rows(2, lambda t: f"<{t}>")
    assert [r.rank for r in rows] == [1, 2, 3] and rows[-1].chosen  # the chosen one appended
    assert rows[1].cum_raw == pytest.approx(raw[1] + raw[3])
    assert [r.token_id for r in dist.kept_rows(str)] == [1, 3, 4]
    assert dist.rank_of(0) == 4
    assert [r.rank for r in dist.search("<0", lambda t: f"<{t}>")] == [4]


async def inspected(app, pilot, pane_id: int, step: int) -> InspectScreen:
    """Open the inspect view on a step once the panes are up; wait for its analysis."""
    await wait_until(pilot, lambda: app.grid.panes())
    app.open_inspect(pane_id, step)
    await wait_until(pilot, lambda: isinstance(app.screen, InspectScreen)
                     and app.screen.analysed, what="the inspect view")
    return app.screen


async def test_a_chosen_token_at_rank_80_is_findable_and_the_cursor_starts_on_it(lm):
    source = live_source(lm)
    engine = source.engine
    engine.step()
    pane = engine.view().panes[1]
    logits = np.asarray(engine.logits_at(pane.id, 0), dtype=np.float64)
    order = np.lexsort((np.arange(len(logits)), -logits))
    far = int(order[79])  # raw rank 80, by numpy
    engine.force(pane.id, 0, far)
    engine.step()
    from tui.app.app import make_app

    app = make_app(source=source)
    async with app.run_test(size=(120, 40)) as pilot:
        screen = await inspected(app, pilot, pane.id, 0)
        table = screen.query_one("#top-table", DataTable)
        assert screen.rows[table.cursor_row].token_id == far  # the cursor on the chosen row
        assert screen.rows[table.cursor_row].rank == 80
        await pilot.press("m")  # 100 more ranks: rank 80 is in the list at its place
        assert [r.rank for r in screen.rows[:120]] == list(range(1, 121))
        assert screen.rows[79].token_id == far and screen.rows[79].chosen
        await pilot.press("k")  # the whole kept set, as the recipe's distribution says
        final = screen.dist.final
        assert len(screen.rows) == int(np.count_nonzero(final))
        assert "kept set" in screen.query_one("#table-label").content.plain
        await pilot.press("k", "slash")
        search = screen.query_one("#token-search", Input)
        assert screen.focused is search
        text = source.token_text(far).strip() or source.token_text(far)
        search.value = text  # as typed (Input.Changed)
        def answered() -> bool:  # the answer to the whole text (not to a prefix typed)
            return bool(screen.rows) and all(
                text.casefold() in source.token_text(r.token_id).casefold() for r in screen.rows)

        await wait_until(pilot, answered, what="the search result")
        assert any(r.token_id == far for r in screen.rows)
        assert "matching" in screen.query_one("#table-label").content.plain
        await pilot.press("escape")  # leaves the search, not the view
        assert isinstance(app.screen, InspectScreen) and screen.listing == "top"


async def test_p_chosen_under_a_recipe_that_cuts_it_reads_cut(lm):
    app = live_app(lm)
    async with app.run_test(size=(160, 45)) as pilot:
        from tests.app_session import steps

        await steps(pilot, app, 3)
        greedy = app.view.panes[0]
        hot = app.view.panes[2]  # a wide sampler: its token is often cut by greedy
        step = next((r.step for r in hot.records if r.rank > 1), None)
        if step is None:
            pytest.skip("the sampled pane chose rank 1 at every step of this seed")
        app.open_inspect(hot.id, step)
        await wait_until(pilot, lambda: isinstance(app.screen, InspectScreen)
                         and app.screen.recipes is not None, what="the recipe rows")
        table = app.screen.query_one("#recipe-table", DataTable)
        row = next(i for i, r in enumerate(app.screen.recipes) if r.pane_id == greedy.id)
        assert app.screen.recipes[row].chosen_prob == 0  # greedy keeps rank 1 only
        assert table.get_row_at(row)[2].plain == "cut"


async def test_an_old_step_costs_one_forward_pass_to_inspect(lm):
    from tui.session.engine import LOGITS_KEPT

    source = live_source(lm)
    engine = source.engine
    for _ in range(LOGITS_KEPT + 2):  # step 0's logits are no longer kept
        engine.step()
    pane = engine.view().panes[0]
    calls = []
    real = engine.runner.logits_of

    def counted(context):
        calls.append(len(context))
        return real(context)

    engine.runner.logits_of = counted
    from tui.app.app import make_app

    app = make_app(source=source)
    async with app.run_test(size=(120, 40)) as pilot:
        screen = await inspected(app, pilot, pane.id, 0)
        assert screen.dist is not None and screen.dist.complete
    assert calls == [len(engine.prompt_ids)]  # the prompt alone: step 0, recomputed once
