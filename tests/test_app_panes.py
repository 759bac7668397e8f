"""Where panes part, fork names, per-pane versions, and fitting text into narrow cells.

Worked examples by hand (the records and names below); the packing and cutting rules
are the project's own choices (common practice, no source), checked on strings whose
right answer can be read off.
"""

from __future__ import annotations

from dataclasses import replace

from tui.app.fitting import ELLIPSIS, cut_items, fit_parts
from tui.app.token_pane import status_text
from tui.session.parting import EDIT, FORK, PART, compared_with, first_difference, fork_name, \
    text_marks
from tui.session.record import StepRecord
from tui.session.views import PaneView, SessionView
from tui.workbench.pane_versions import PaneVersions


def _rec(step: int, token: int, stop: str | None = None) -> StepRecord:
    return StepRecord(step=step, pane=0, token_id=token, text=f"t{token}", rank=1,
                      raw_prob=0.5, final_prob=0.5, kept=2, raw_entropy=0.7,
                      final_entropy=0.6, u=0.1, stop=stop)


def _pane(pid: int, tokens: list[int], recipe: str = "greedy", origin=None,
          log=((0, "greedy"),)) -> PaneView:
    return PaneView(pid, f"p{pid}", recipe, None, tuple(_rec(i, t) for i, t in enumerate(tokens)),
                    None, tuple(log), origin)


def test_first_difference_worked_by_hand():
    a, b = _pane(0, [1, 2, 3, 4]), _pane(1, [1, 2, 9, 4])
    assert first_difference(a.records, b.records) == 2
    assert first_difference(a.records, a.records[:2]) is None  # a prefix never parts
    assert first_difference(a.records, _pane(2, [7]).records) == 0


def test_compared_with_fork_source_then_twin_then_the_first_pane():
    base = _pane(0, [1, 2, 3], "greedy")
    hot = _pane(1, [1, 5, 6], "temperature=1.5")
    twin = _pane(2, [1, 5, 7], "temperature=1.5")
    fork = _pane(3, [1, 5, 8], "top_k=5", origin=(1, 2))
    panes = (base, hot, twin, fork)
    assert compared_with(fork, panes) is hot
    assert compared_with(hot, panes) is twin and compared_with(twin, panes) is hot
    assert compared_with(_pane(4, [2], "min_p=0.1"), panes) is base
    assert compared_with(base, panes) is None  # the baseline itself: nothing to part from


def test_marks_show_the_fork_point_the_edits_and_the_parting():
    hot = _pane(1, [1, 5, 6, 2], "temperature=1.5")
    fork = _pane(3, [1, 5, 6, 9, 9], "top_k=5", origin=(1, 2),
                 log=((0, "temperature=1.5"), (2, "top_k=5"), (4, "top_k=3")))
    marks = text_marks(fork, hot)
    assert [(m.step, m.kind) for m in marks] == [(2, FORK), (3, PART), (4, EDIT)]
    assert "top_k=3" in marks[-1].note


def test_fork_names_stay_readable():
    assert fork_name("greedy", ["greedy"]) == "greedy/1"
    assert fork_name("greedy", ["greedy", "greedy/1"]) == "greedy/2"
    assert fork_name("greedy/1", ["greedy", "greedy/1"]) == "greedy/1.1"
    assert fork_name("greedy/1.1", ["greedy/1.1", "greedy/1.1.1"]) == "greedy/1.1.2"


def test_versions_move_only_for_the_pane_that_changed():
    versions = PaneVersions()
    a, b = _pane(0, [1, 2]), _pane(1, [3])
    first = versions.update(SessionView(2, 0, True, (a, b)))
    # the engine hands out new tuples of the same records: no change
    same = versions.update(SessionView(2, 0, True, (replace(a, records=tuple(a.records)),
                                                    replace(b, records=tuple(b.records)))))
    assert same == first
    grown = versions.update(SessionView(3, 0, True, (a, replace(b, records=b.records
                                                                 + (_rec(1, 4),)))))
    assert grown[0] == first[0] and grown[1] == first[1] + 1
    rewound = versions.update(SessionView(3, 0, True, (replace(a, records=(_rec(0, 8), _rec(1, 2))),
                                                       replace(b, records=b.records + (_rec(1, 4),)))))
    assert rewound[0] == first[0] + 1 and rewound[1] == grown[1]


def test_cut_items_never_cuts_a_stage():
    recipe = "temperature=0.8 top_p=0.9 min_p=0.05"
    assert cut_items(recipe, 80) == recipe
    assert cut_items(recipe, 20) == "temperature=0.8 " + ELLIPSIS
    assert cut_items("top_p=0.9", 8) == "top_p=0" + ELLIPSIS  # one item too long: marked
    # two different recipes never read alike once cut
    assert cut_items("top_p=0.9 temperature=1", 12) != cut_items("top_p=0.95 temperature=1", 12)


def test_cut_apart_keeps_different_recipes_apart():
    from tui.app.fitting import cut_apart

    recipes = ["temperature=1.5 top_p=0.9", "temperature=1.5 top_p=0.95", "greedy"]
    cut = cut_apart(recipes, 17)
    assert cut == [ELLIPSIS + " top_p=0.9", ELLIPSIS + " top_p=0.95", "greedy"]
    assert len(set(cut)) == 3
    assert cut_apart(["temperature=1.5 top_p=0.9", "min_p=0.1"], 17) == \
        ["temperature=1.5 " + ELLIPSIS, "min_p=0.1"]  # nothing alike: cut from the start


def test_status_fits_two_lines_at_any_pane_width():
    recs = tuple(_rec(i, 1) for i in range(12))
    recs = recs[:-1] + (replace(recs[-1], stop="end of text", kept=40000),)
    for width in (12, 16, 20, 30, 60):
        lines = status_text(recs, 60, width).plain.split("\n")
        assert len(lines) <= 2 and all(len(li) <= width for li in lines), (width, lines)
    assert fit_parts([["aaaa", "bbbb"], ["a", "b"]], 6, max_lines=1) == ["a · b"]
    assert fit_parts([["aaaa", "bbbb"], ["a", "b"]], 6) == ["aaaa", "bbbb"]


async def test_a_stopped_pane_is_not_redrawn():
    # the grid gets a fresh view per step, as from the engine: pane 0 has stopped (its
    # records are the same objects every time), pane 1 grows by one token per step
    from tui.app.app import make_app
    from tui.workbench.source import StaticSource

    stopped = _pane(0, [1, 2, 3])
    growing = [_rec(i, 5 + i % 3) for i in range(12)]

    def view(n: int) -> SessionView:
        return SessionView(n, 0, True, (replace(stopped, records=tuple(stopped.records)),
                                        replace(_pane(1, [], "temperature=1"),
                                                records=tuple(growing[:n]))))

    app = make_app(source=StaticSource(view(3), "t", "m", "prompt "))
    async with app.run_test(size=(100, 30)) as pilot:
        await pilot.pause()
        first, second = app.grid.panes()
        a, b = first.body_draws, second.body_draws
        for n in range(4, 12):
            app.grid.sync(view(n), n)
            await pilot.pause()
        assert first.body_draws == a  # stopped: never rebuilt
        assert second.body_draws == b + 8  # once per step
        app.grid.sync(view(11), 11)  # the same state again: nothing rebuilt
        await pilot.pause()
        assert second.body_draws == b + 8
        app.grid.sync(view(11), 2)  # the cursor moved back: both redraw up to it
        await pilot.pause()
        assert first.body_draws == a + 1 and second.body_draws == b + 9


def test_the_busy_label_stands_apart_from_the_model_name():
    from tui.app.top_bar import BarState, bar_text

    plain = bar_text(BarState(model="smollm2", busy="force")).plain
    assert "force\u2026   smollm2" in plain  # its chip, then a gap, then the name
