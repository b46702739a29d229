"""Surface sampling, farthest-point subsampling and normalisation of point clouds.

Array in, array out; every random draw goes through :func:`shapes.seeding.rng`, so the same seed
gives the same cloud.
"""

from __future__ import annotations

import numpy as np
import trimesh

from shapes.errors import InputError
from shapes.seeding import rng

__all__ = ["sample_surface", "farthest_point_subsample", "normalise"]


def _check_count(count, name: str = "count") -> int:
    if isinstance(count, bool) or not isinstance(count, (int, np.integer)) or count < 1:
        raise InputError(f"{name} should be a positive integer, got {count!r} instead.")
    return int(count)


def _check_points(points, name: str = "points") -> np.ndarray:
    points = np.asarray(points)
    if points.ndim != 2 or points.shape[1] != 3:
        raise InputError(f"{name} should have shape (N, 3), got {points.shape} instead.")
    if not np.issubdtype(points.dtype, np.number):
        raise InputError(f"{name} should be numbers, got dtype {points.dtype} instead.")
    return points


def sample_surface(
    mesh: trimesh.Trimesh, count: int, seed=None
) -> tuple[np.ndarray, np.ndarray]:
    """Sample points uniformly over a mesh's surface.

    A face is chosen with probability proportional to its area, then a point uniformly
    inside it (two uniform barycentric draws, folded back into the triangle when they
    land in the other half of the parallelogram).

    Parameters
    ----------
    mesh : trimesh.Trimesh
    count : int
        Number of points.
    seed : None, int or numpy.random.Generator

    Returns
    -------
    points : (count, 3) float64
    normals : (count, 3) float64
        Unit normals of the faces the points lie on.
    """
    count = _check_count(count)
    triangles = np.asarray(mesh.triangles, dtype=np.float64)  # (F, 3 corners, 3)
    areas = np.asarray(mesh.area_faces, dtype=np.float64)  # (F,)
    total = float(areas.sum())
    if len(triangles) == 0 or not np.isfinite(total) or total <= 0.0:
        raise InputError(
            f"mesh should have positive finite surface area, got {total} "
            f"over {len(triangles)} faces instead."
        )
    gen = rng(seed)
    cumulative = np.cumsum(areas)
    # searchsorted on the running area is an inverse-CDF draw; clip guards the last bin
    # against round-off in the cumulative sum.
    face = np.searchsorted(cumulative, gen.random(count) * cumulative[-1], side="right")
    face = np.minimum(face, len(areas) - 1)
    uv = gen.random((count, 2))  # (count, 2)
    flip = uv.sum(axis=1) > 1.0
    uv[flip] = 1.0 - uv[flip]
    corner = triangles[face]  # (count, 3, 3)
    points = (
        corner[:, 0]
        + uv[:, :1] * (corner[:, 1] - corner[:, 0])
        + uv[:, 1:] * (corner[:, 2] - corner[:, 0])
    )
    normals = np.asarray(mesh.face_normals, dtype=np.float64)[face]
    return points, normals


def farthest_point_subsample(
    points, count: int, seed=None, start: int | None = None
) -> np.ndarray:
    """Pick ``count`` points greedily, each the farthest from those already picked.

    O(N · count) time and O(N) memory: one running array of squared distances to the
    picked set is updated per pick. Ties go to the lowest index (``argmax``).

    Parameters
    ----------
    points : (N, 3) float
    count : int
        How many to keep, ``1 <= count <= N``.
    seed : None, int or numpy.random.Generator
        Draws the first pick when ``start`` is None.
    start : int, optional
        Index of the first pick.

    Returns
    -------
    indices : (count,) int64
        Distinct indices into ``points``, in the order they were picked.
    """
    points = _check_points(points).astype(np.float64, copy=False)
    count = _check_count(count)
    n = len(points)
    if count > n:
        raise InputError(f"count should be at most the number of points ({n}), got {count} instead.")
    if start is None:
        start = int(rng(seed).integers(n))
    elif not 0 <= int(start) < n:
        raise InputError(f"start should be an index in [0, {n}), got {start} instead.")
    # one contiguous array per axis and in-place ufuncs: about 5x faster than a (N, 3)
    # row-wise sum per pick, and exact (no |p|^2 - 2 p.q + |q|^2 cancellation)
    x, y, z = (np.ascontiguousarray(points[:, j]) for j in range(3))
    indices = np.empty(count, dtype=np.int64)
    nearest = np.full(n, np.inf)  # squared distance to the picked set
    dist, term = np.empty(n), np.empty(n)
    pick = indices[0] = int(start)
    for k in range(1, count):
        np.subtract(x, x[pick], out=dist)
        dist *= dist
        np.subtract(y, y[pick], out=term)
        term *= term
        dist += term
        np.subtract(z, z[pick], out=term)
        term *= term
        dist += term
        np.minimum(nearest, dist, out=nearest)
        nearest[pick] = -1.0  # picked points are never picked again, even among duplicates
        pick = indices[k] = int(np.argmax(nearest))
    return indices


def normalise(points) -> tuple[np.ndarray, np.ndarray, float]:
    """Move the centroid to the origin and scale to unit RMS radius.

    ``points_out = (points - centroid) / scale`` with ``scale = sqrt(mean |p - centroid|²)``,
    so ``points_out`` has mean 0 and ``mean |p|² = 1``.

    Parameters
    ----------
    points : (N, 3) float

    Returns
    -------
    points : (N, 3) float64
    centroid : (3,) float64
    scale : float
        The RMS radius in the input's units (mm for the demo catalog).

    Raises
    ------
    InputError
        Fewer than 2 points, non-finite values, or all points (numerically) at one spot.
    """
    points = _check_points(points).astype(np.float64, copy=False)
    if len(points) < 2:
        raise InputError(f"points should hold at least 2 points to normalise, got {len(points)} instead.")
    if not np.isfinite(points).all():
        raise InputError("points should be finite, got NaN or inf values instead.")
    centroid = points.mean(axis=0)
    centred = points - centroid
    scale = float(np.sqrt(np.mean(np.sum(centred**2, axis=1))))
    # relative test: a cloud 1 µm across sitting 1 km from the origin is still a cloud,
    # but spread at round-off level of its coordinates is one point
    magnitude = max(1.0, float(np.abs(centroid).max()))
    if not scale > 1e-12 * magnitude:
        raise InputError(
            f"points should be spread out to normalise, got RMS radius {scale:g} "
            f"(all {len(points)} points at one spot) instead."
        )
    return centred / scale, centroid, scale
