"""The trade-off front of a sweep: recipes that no other recipe beats on both axes.

A sweep plots each recipe on two measures (say, distinct-2 against mean
log-probability: diverse text versus text the model finds likely). The recipes worth
a look are the non-dominated ones; this module finds them. Pure Python.

Dominance: with each axis turned so that larger is better, point a dominates point b
when a is at least as good as b on both axes and strictly better on at least one.
Equal points do not dominate each other, so duplicates are all on the front. A point
with a NaN coordinate is neither on the front nor dominates anything. Infinite values
compare as ordinary numbers.
"""

from __future__ import annotations

import math
from typing import Sequence


def _oriented(point: tuple[float, float], maximize: tuple[bool, bool]) -> tuple[float, float]:
    """The point with each axis turned so that larger is better."""
    return (point[0] if maximize[0] else -point[0], point[1] if maximize[1] else -point[1])


def dominates(a: tuple[float, float], b: tuple[float, float],
              maximize: tuple[bool, bool] = (True, True)) -> bool:
    """True when `a` is at least as good as `b` on both axes and better on one."""
    (ax, ay), (bx, by) = _oriented(a, maximize), _oriented(b, maximize)
    if any(math.isnan(v) for v in (ax, ay, bx, by)):
        return False
    return ax >= bx and ay >= by and (ax > bx or ay > by)


def _check(points: Sequence[tuple[float, float]], maximize: object) -> list[tuple[float, float]]:
    if (not isinstance(maximize, tuple) or len(maximize) != 2
            or not all(isinstance(m, bool) for m in maximize)):
        raise ValueError(f"maximize must be a pair of booleans, got {maximize!r}")
    out = []
    for i, p in enumerate(points):
        if len(p) != 2:
            raise ValueError(f"points[{i}] must be an (x, y) pair, got {p!r}")
        out.append((float(p[0]), float(p[1])))
    return out


def pareto_front(points: Sequence[tuple[float, float]],
                 maximize: tuple[bool, bool] = (True, True)) -> list[int]:
    """Indices of the non-dominated points, sorted by x ascending (then y, then index).

    ``maximize`` says for each axis whether larger is better. O(n^2), fine for the
    hundreds of recipes a sweep holds.
    """
    pts = _check(points, maximize)
    live = [i for i, (x, y) in enumerate(pts) if not (math.isnan(x) or math.isnan(y))]
    front = [i for i in live
             if not any(dominates(pts[j], pts[i], maximize) for j in live if j != i)]
    return sorted(front, key=lambda i: (pts[i][0], pts[i][1], i))
