"""The trade-off front, on hand-made point sets and against a sweep-line reference."""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tui.sweeps.pareto import dominates, pareto_front

NAN = math.nan


def test_front_of_a_hand_made_set_maximising_both():
    points = [(1, 5), (2, 4), (3, 3), (2, 2), (0, 1), (3, 3), (NAN, 9), (4, 0)]
    # by hand: (2, 2) is beaten by (2, 4); (0, 1) by (1, 5); the two (3, 3) tie and
    # neither beats the other; (4, 0) has the largest x; (nan, 9) is left out.
    assert pareto_front(points) == [0, 1, 2, 5, 7]


def test_front_with_one_axis_minimised():
    # x = distinct-2 (more is better), y = perplexity (less is better)
    points = [(0.2, 3.0), (0.5, 4.0), (0.5, 6.0), (0.8, 9.0), (0.4, 5.0), (0.9, 20.0)]
    # by hand: (0.5, 6) is beaten by (0.5, 4); (0.4, 5) by (0.5, 4); the others trade off
    assert pareto_front(points, maximize=(True, False)) == [0, 1, 3, 5]
    # minimising both: only (0.2, 3) survives, it is smallest on both axes
    assert pareto_front(points, maximize=(False, False)) == [0]


def test_dominance_definition_and_ties():
    # at least as good on both axes and strictly better on one (the usual definition;
    # common practice, no source)
    assert dominates((2, 2), (1, 2)) and not dominates((1, 2), (2, 2))
    assert not dominates((2, 2), (2, 2))
    assert not dominates((3, 1), (1, 3)) and not dominates((1, 3), (3, 1))
    assert dominates((1, 2), (2, 2), maximize=(False, True))
    assert not dominates((NAN, 5), (0, 0)) and not dominates((5, 5), (0, NAN))


def test_nan_points_and_empty_input():
    assert pareto_front([]) == []
    assert pareto_front([(NAN, 1.0), (1.0, NAN)]) == []
    # a NaN point never pushes a real one off the front
    assert pareto_front([(NAN, 100.0), (0.0, 0.0)]) == [1]
    # infinities compare as numbers
    assert pareto_front([(math.inf, 0.0), (1.0, 1.0), (0.0, 0.5)]) == [1, 0]


def test_bad_arguments_are_refused():
    with pytest.raises(ValueError, match="maximize must be a pair of booleans"):
        pareto_front([(1, 2)], maximize=(True,))
    with pytest.raises(ValueError, match=r"points\[1\] must be an \(x, y\) pair"):
        pareto_front([(1, 2), (1, 2, 3)])


def sweep_line_front(points: list[tuple[float, float]]) -> set[int]:
    """2-D maxima by one sweep over x descending (Kung, Luccio & Preparata 1975; recalled
    from memory), written for ties: a point survives when its y is the largest among
    points of equal x and larger than every y of points with a larger x."""
    best_to_the_right = -math.inf
    front: set[int] = set()
    for x in sorted({p[0] for p in points}, reverse=True):
        group = [i for i, p in enumerate(points) if p[0] == x]
        top = max(points[i][1] for i in group)
        if top > best_to_the_right:
            front |= {i for i in group if points[i][1] == top}
        best_to_the_right = max(best_to_the_right, top)
    return front


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 6), st.integers(0, 6)), max_size=25),
       st.tuples(st.booleans(), st.booleans()))
def test_front_matches_a_sweep_line_reference(points, maximize):
    oriented = [(x if maximize[0] else -x, y if maximize[1] else -y) for x, y in points]
    front = pareto_front(points, maximize=maximize)
    assert set(front) == sweep_line_front(oriented)
    assert front == sorted(front, key=lambda i: (points[i][0], points[i][1], i))
