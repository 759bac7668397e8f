"""Percentile-bootstrap intervals for single values and for set measures.

`bootstrap_ci` resamples numbers (Efron & Tibshirani 1993, sec. 13.3); `bootstrap_ci_sets`
resamples whole samples and hands the statistic, beside the resampled list, which
original sample each position copies, so that set measures such as distinct-n and
self-BLEU can keep copies apart (see `tui.sweeps.metrics`). Both can keep strata (the samples
of one prompt are redrawn among themselves) and both draw the same index matrix for
the same size, seed and strata. Pure numpy.
"""

from __future__ import annotations

import math
from typing import Callable, Hashable, Sequence, TypeVar

import numpy as np

T = TypeVar("T")
SetStatistic = Callable[[list[T], np.ndarray], float]


def _check_bootstrap(n_resamples: object, confidence: object) -> None:
    if isinstance(n_resamples, bool) or not isinstance(n_resamples, int) or n_resamples < 1:
        raise ValueError(f"n_resamples must be an integer >= 1, got {n_resamples!r}")
    if not isinstance(confidence, (int, float)) or not 0 < confidence < 1:
        raise ValueError(f"confidence must be in (0, 1), got {confidence!r}")


def resample_indices(n: int, n_resamples: int, seed: int,
                     strata: Sequence[Hashable] | None = None) -> np.ndarray:
    """Bootstrap index matrix (n_resamples, n), drawn with replacement.

    With ``strata`` each position is redrawn from its own stratum, so every resample
    keeps the stratum sizes. Deterministic for a seed.
    """
    rng = np.random.default_rng(seed)
    if strata is None:
        return rng.integers(0, n, size=(n_resamples, n))
    labels = list(strata)
    if len(labels) != n:
        raise ValueError(f"strata has {len(labels)} entries for {n} values")
    out = np.empty((n_resamples, n), dtype=np.int64)
    for label in dict.fromkeys(labels):
        where = np.asarray([i for i, s in enumerate(labels) if s == label])
        out[:, where] = where[rng.integers(0, len(where), size=(n_resamples, len(where)))]
    return out


def _percentile_interval(estimate: float, replicates: np.ndarray, confidence: float,
                         recentre: bool = False) -> tuple[float, float, float]:
    finite = replicates[~np.isnan(replicates)]  # undefined resamples are left out
    if len(finite) == 0:
        return float(estimate), math.nan, math.nan
    if recentre and not math.isnan(estimate):
        finite = finite - (finite.mean() - estimate)
    alpha = (1 - confidence) / 2
    low, high = np.percentile(finite, [100 * alpha, 100 * (1 - alpha)])
    return float(estimate), float(low), float(high)


def bootstrap_ci(values: Sequence[float], statistic: Callable[[np.ndarray], float] = np.mean,
                 n_resamples: int = 1000, confidence: float = 0.95, seed: int = 0, *,
                 strata: Sequence[Hashable] | None = None) -> tuple[float, float, float]:
    """(estimate, low, high): percentile bootstrap (Efron & Tibshirani 1993, sec. 13.3).

    The estimate is ``statistic(values)``; low and high are the (1 - confidence)/2 and
    (1 + confidence)/2 percentiles (numpy's linear interpolation) of the statistic
    over ``n_resamples`` resamples of ``values`` with replacement. NaN replicates are
    left out. Empty values give NaN throughout.
    """
    _check_bootstrap(n_resamples, confidence)
    data = np.asarray(values, dtype=np.float64)
    if len(data) == 0:
        return math.nan, math.nan, math.nan
    index = resample_indices(len(data), n_resamples, seed, strata)
    replicates = np.array([statistic(data[row]) for row in index], dtype=np.float64)
    return _percentile_interval(float(statistic(data)), replicates, confidence)


def bootstrap_ci_sets(samples: Sequence[T], fn: SetStatistic, n_resamples: int = 1000,
                      confidence: float = 0.95, seed: int = 0, *,
                      strata: Sequence[Hashable] | None = None,
                      recentre: bool = False) -> tuple[float, float, float]:
    """Percentile bootstrap of a statistic over a set, resampling samples with replacement.

    ``fn(resampled, sources)`` gets the resampled list and, for each position, the
    index of the original sample it copies (``np.arange(n)`` for the estimate), so a
    set measure can keep copies apart (``lambda s, src: distinct_n(s, 2, sources=src)``).
    The index matrix is the same as `bootstrap_ci` draws for the same n, seed and strata.
    ``recentre``: shift the replicates so that their mean is the estimate (the
    bootstrap bias estimate taken off, Efron & Tibshirani 1993, sec. 10.2; why set
    measures need it: `tui.sweeps.metrics`).
    """
    _check_bootstrap(n_resamples, confidence)
    items = list(samples)
    if not items:
        return math.nan, math.nan, math.nan
    index = resample_indices(len(items), n_resamples, seed, strata)
    replicates = np.array([fn([items[i] for i in row], row) for row in index], dtype=np.float64)
    return _percentile_interval(fn(items, np.arange(len(items))), replicates, confidence,
                                recentre)
