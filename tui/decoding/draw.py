"""Turning a final distribution into a token: the inverse-CDF draw, and entropy.

The engine draws with one uniform number u per pane and step, so a replay with the
same numbers gives the same text. Tokens are laid out by descending probability,
ties by ascending token id, and u picks the token whose slice of [0, 1) holds it:
for probabilities [0.5, 0.3, 0.2], u < 0.5 gives the first, u < 0.8 the second,
the rest the third.
"""

from __future__ import annotations

import math

import numpy as np

from tui.decoding.ranking import first_reaching
from tui.decoding.stage import RecipeError


def _checked(probs: object) -> np.ndarray:
    p = np.asarray(probs, dtype=np.float64)
    if p.ndim != 1 or p.size == 0:
        raise RecipeError(f"probs must be a non-empty vector of shape (V,), got shape {p.shape}")
    if not (np.isfinite(p.max()) and p.min() >= 0.0):
        raise RecipeError("probs must be finite and non-negative")
    return p


def draw(probs: object, u: float) -> int:
    """The token at position u of the distribution's inverse CDF, u in [0, 1).

    Only tokens with probability > 0 take part, and the CDF is scaled by the total,
    so float rounding can at worst shift u onto the last kept token, never onto a
    zero-probability one.
    """
    if isinstance(u, bool) or not isinstance(u, (int, float, np.floating, np.integer)) or not 0.0 <= u < 1.0:
        raise RecipeError(f"u must be a number in [0, 1), got {u!r}")
    p = _checked(probs)
    kept = np.flatnonzero(p > 0.0)
    if kept.size == 0:
        raise RecipeError("probs are all zero: nothing to draw")
    weights = p[kept]
    target = float(u) * float(weights.sum())
    # Positive doubles order like their bit patterns, which spread evenly over the
    # orders of magnitude a peaked distribution spans.
    keys = weights.view(np.int64)
    return int(kept[first_reaching(keys, weights, target, inclusive=False, descending=True)])


def draw_order(probs: object) -> np.ndarray:
    """Token ids with probability > 0 in draw order: descending probability, ties by id."""
    p = _checked(probs)
    kept = np.flatnonzero(p > 0.0)
    return kept[np.argsort(-p[kept], kind="stable")]


def entropy(probs: object, base: float | None = None) -> float:
    """Shannon entropy of a distribution, in nats (or in `base`, e.g. 2 for bits).

    `probs` is normalised first, as scipy.stats.entropy does; zeros contribute 0.
    """
    p = _checked(probs)
    total = float(p.sum())
    if total <= 0.0:
        raise RecipeError("probs are all zero: entropy is undefined")
    nz = p / total
    nz = nz[nz > 0.0]  # after dividing: a subnormal entry can round to 0
    nats = -float((nz * np.log(nz)).sum())
    nats = max(nats, 0.0)  # rounding can leave -0.0 or -1e-17 for one-hot
    return nats / math.log(base) if base is not None else nats
