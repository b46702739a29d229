"""The D2 shape distribution (Osada, Funkhouser, Chazelle and Dobkin 2002, "Shape distributions",
ACM Transactions on Graphics 21(4)): the distribution of the distance between two random points
of a shape.

Only distances between points enter, so D2 is unchanged by any rotation, translation and
reflection (E(3)); dividing by the cloud's RMS radius makes it unchanged by a uniform scaling too.
It therefore cannot tell a handed part from its mirror twin: that blindness is the point of a
baseline.

Scale: each distance is divided by the cloud's RMS radius about its centroid,
``sqrt(mean |x_i - c|^2)``. The RMS radius is an average over every point, so one stray point
moves it by O(1/N), where the largest distance (the other usual choice) would move with it
entirely. After the division every histogram spans the same fixed range ``[0, D2_RANGE]``.
"""

from __future__ import annotations

import numpy as np

from shapes.errors import InputError
from shapes.seeding import rng

__all__ = ["D2_RANGE", "D2_PAIRS", "rms_radius", "d2_distances", "d2_histogram", "d2_features"]

# Upper end of the histogram, in RMS radii. Two points lie at most r_i + r_j apart, and for
# common solids the farthest pair is well inside 4: a sphere's is 2, a thin rod's 2*sqrt(3) = 3.46
# (its ends lie sqrt(3) RMS radii from the centre). The rare longer distance is counted in the
# last bin, so a histogram always sums to 1.
D2_RANGE = 4.0
# Pairs drawn per cloud by default. A cloud with no more distinct pairs than this (N <= 512)
# uses every pair once instead: exact for that cloud, and no randomness at all.
D2_PAIRS = 2**17


def _check_cloud(points, name: str = "points") -> np.ndarray:
    arr = np.asarray(points)
    if arr.ndim != 2 or arr.shape[1] != 3:
        raise InputError(f"{name} should have shape (N, 3), got {arr.shape} instead.")
    if arr.shape[0] < 2:
        raise InputError(f"{name} should hold at least 2 points, got {arr.shape[0]} instead.")
    if not np.issubdtype(arr.dtype, np.number) or not np.isfinite(arr).all():
        raise InputError(f"{name} should be finite numbers, got dtype {arr.dtype} with non-finite or non-numeric values instead.")
    return arr.astype(np.float64, copy=False)


def rms_radius(points) -> float:
    """RMS distance of the points from their centroid.

    Parameters
    ----------
    points : (N, 3) float

    Returns
    -------
    radius : float, ``sqrt(mean_i |x_i - mean(x)|^2)``
    """
    arr = _check_cloud(points)
    return float(np.sqrt(((arr - arr.mean(0)) ** 2).sum(1).mean()))


def _pair_index(n: int, pairs: int | None, seed) -> tuple[np.ndarray, np.ndarray]:
    total = n * (n - 1) // 2
    if pairs is None or total <= pairs:
        return np.triu_indices(n, k=1)  # every distinct pair once
    gen = rng(seed)
    i = gen.integers(0, n, size=pairs)
    j = gen.integers(0, n - 1, size=pairs)
    j = j + (j >= i)  # uniform over j != i
    return i, j


def _check_pairs(pairs) -> int | None:
    if pairs is None:
        return None
    if isinstance(pairs, bool) or not isinstance(pairs, (int, np.integer)) or pairs < 1:
        raise InputError(f"pairs should be a positive int or None, got {pairs!r} instead.")
    return int(pairs)


def d2_distances(points, pairs: int | None = D2_PAIRS, seed=None) -> np.ndarray:
    """Distances between pairs of points of one cloud, in units of its RMS radius.

    Parameters
    ----------
    points : (N, 3) float
    pairs : int or None
        Pairs to draw, uniformly with replacement among ordered pairs ``i != j``. When the cloud
        has no more than ``pairs`` distinct pairs, or ``pairs`` is None, every distinct pair is
        used once, in a fixed order (no randomness).
    seed : int, numpy Generator or None
        Seed of the pair draw (:func:`shapes.seeding.rng`).

    Returns
    -------
    distances : (P,) float64, ``|x_i - x_j| / rms_radius(points)``
    """
    arr = _check_cloud(points)
    pairs = _check_pairs(pairs)
    scale = rms_radius(arr)
    if not scale > 0:
        raise InputError(f"points should be spread out, got {len(arr)} points all at one location instead.")
    i, j = _pair_index(len(arr), pairs, seed)
    x, y, z = np.ascontiguousarray(arr.T)  # one gather per coordinate: ~9x faster than arr[i] - arr[j]
    dx, dy, dz = x[i] - x[j], y[i] - y[j], z[i] - z[j]
    return np.sqrt(dx * dx + dy * dy + dz * dz) / scale


def d2_histogram(points, bins: int = 64, pairs: int | None = D2_PAIRS, seed=None) -> np.ndarray:
    """The D2 shape distribution of one cloud as a histogram.

    Parameters
    ----------
    points : (N, 3) float
    bins : int
        Equal-width bins over ``[0, D2_RANGE]`` RMS radii.
    pairs, seed : as in :func:`d2_distances`

    Returns
    -------
    histogram : (bins,) float64
        Share of the pairs in each bin; sums to 1. Distances beyond ``D2_RANGE`` count in the
        last bin.
    """
    if isinstance(bins, bool) or not isinstance(bins, (int, np.integer)) or bins < 1:
        raise InputError(f"bins should be a positive int, got {bins!r} instead.")
    d = d2_distances(points, pairs, seed)
    index = np.minimum((d * (bins / D2_RANGE)).astype(np.int64), bins - 1)
    return np.bincount(index, minlength=bins).astype(np.float64) / len(d)


def d2_features(clouds, bins: int = 64, pairs: int | None = D2_PAIRS, seed=None) -> np.ndarray:
    """D2 histograms of many clouds.

    Parameters
    ----------
    clouds : (M, N, 3) float, or a sequence of M arrays (N_i, 3)
    bins, pairs : as in :func:`d2_histogram`
    seed : int, numpy Generator or None
        With an int, cloud ``k`` draws its pairs from ``rng([seed, k])``, so its histogram does
        not depend on the clouds before it; a Generator is shared by the clouds in order.

    Returns
    -------
    features : (M, bins) float64
    """
    if isinstance(clouds, np.ndarray):
        if clouds.ndim != 3 or clouds.shape[2] != 3:
            raise InputError(f"clouds should have shape (M, N, 3), got {clouds.shape} instead.")
    elif not isinstance(clouds, (list, tuple)):
        raise InputError(f"clouds should be an (M, N, 3) array or a list of (N, 3) arrays, got {type(clouds).__name__} instead.")
    if len(clouds) == 0:
        raise InputError("clouds should hold at least one cloud, got none instead.")
    if isinstance(bins, bool) or not isinstance(bins, (int, np.integer)) or bins < 1:
        raise InputError(f"bins should be a positive int, got {bins!r} instead.")
    if seed is not None and not isinstance(seed, np.random.Generator):
        if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
            raise InputError(f"seed should be a non-negative int, a numpy Generator or None, got {seed!r} instead.")
    out = np.empty((len(clouds), bins), dtype=np.float64)
    for k, cloud in enumerate(clouds):
        # an int seed gives each cloud its own stream; a Generator is shared in order
        cloud_seed = rng([int(seed), k]) if isinstance(seed, (int, np.integer)) else seed
        out[k] = d2_histogram(_check_cloud(cloud, f"clouds[{k}]"), bins, pairs, cloud_seed)
    return out
