"""Even coverage of a class's parameter range for the demo catalog.

Discrete traits (a size, a hole count, sealed or open) take balanced levels; continuous ones
are drawn one per stratum of their range. A class's instances then spread over the whole range
with no lonely extreme, so an instance held out for testing lies between training ones.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

__all__ = ["level_counts", "levels", "strata", "grid_strata", "pick_spread"]


def level_counts(k: int, n: int) -> list[int]:
    """How many of ``n`` instances take each of ``k`` ordered levels.

    As even as possible; the spare ones go to the ends first (level 0, k-1, 1, k-2, ...), so the
    extremes of a range are never rarer than its middle.

    Returns
    -------
    counts : (k,) ints summing to n
    """
    assert k >= 1 and n >= 0, (k, n)
    base, extra = divmod(n, k)
    order = []
    lo, hi = 0, k - 1
    while lo <= hi:
        order += [lo] if lo == hi else [lo, hi]
        lo, hi = lo + 1, hi - 1
    counts = [base] * k
    for i in order[:extra]:
        counts[i] += 1
    return counts


def levels(values: Sequence, n: int) -> list:
    """``n`` entries of ``values`` in their order, each repeated as :func:`level_counts` says."""
    out = []
    for v, c in zip(values, level_counts(len(values), n)):
        out += [v] * c
    return out


def strata(gen: np.random.Generator, n: int, lo: float, hi: float) -> np.ndarray:
    """One uniform draw in each of ``n`` equal strata of [lo, hi], in shuffled order.

    Returns
    -------
    values : (n,) float
    """
    u = (gen.permutation(n) + gen.uniform(size=n)) / n  # (n,)
    return lo + (hi - lo) * u


def grid_strata(gen: np.random.Generator, n: int, lo: float, hi: float, step: float, shuffle: bool = False) -> list[float]:
    """``n`` distinct values of the grid lo, lo + step, ..., hi: one from each of ``n`` runs of it.

    Distinct values make distinct instance names; the runs spread them over the whole range.
    Sorted ascending unless ``shuffle``.
    """
    if n == 0:
        return []
    grid = lo + step * np.arange(int(round((hi - lo) / step)) + 1)
    assert len(grid) >= n, f"grid [{lo}, {hi}] step {step} has {len(grid)} values, fewer than {n}"
    picks = np.array([run[gen.integers(len(run))] for run in np.array_split(grid, n)])
    if shuffle:
        picks = picks[gen.permutation(n)]
    return [float(round(v, 6)) for v in picks]


def pick_spread(items: Sequence, n: int) -> list:
    """``n`` items evenly spaced along ``items`` (first and last included), n <= len(items)."""
    assert 1 <= n <= len(items), (n, len(items))
    if n == 1:
        return [items[0]]
    idx = np.round(np.linspace(0, len(items) - 1, n)).astype(int)
    return [items[i] for i in idx]
