"""A virtual range scanner: what one camera sees of a part, as a point cloud.

An orthographic grid of parallel rays is cast at the mesh from one direction; only each ray's
first hit is kept, so the far side of the part is missing just as in a real single-view scan.
Ray casting goes through ``mesh.ray``, which is trimesh's Embree intersector when ``embreex`` is
installed (about a hundred times faster than trimesh's pure-Python fallback, which also needs rtree).
"""

from __future__ import annotations

import math

import numpy as np
import trimesh

from shapes.errors import InputError, MeshError, ShapesError
from shapes.seeding import rng
from shapes.data._sample import _check_count

__all__ = ["scan_view", "random_direction", "ray_backend"]


def random_direction(seed=None) -> np.ndarray:
    """A unit vector uniform on the sphere (a normalised Gaussian draw).

    Returns
    -------
    direction : (3,) float64
    """
    gen = rng(seed)
    while True:
        v = gen.standard_normal(3)
        norm = float(np.linalg.norm(v))
        if norm > 1e-12:  # essentially never loops; guards the zero vector
            return v / norm


def ray_backend(mesh: trimesh.Trimesh) -> str:
    """Name the ray intersector trimesh uses for ``mesh``: ``"embree"`` or ``"python"``."""
    return "embree" if "embree" in type(mesh.ray).__module__ else "python"


def _frame(direction: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two unit vectors spanning the image plane orthogonal to ``direction``."""
    helper = np.eye(3)[int(np.argmin(np.abs(direction)))]
    u = np.cross(direction, helper)
    u /= np.linalg.norm(u)
    return u, np.cross(direction, u)


def _cast(mesh, direction, resolution, gen):
    """Cast a resolution x resolution grid; return hit points, their face ids."""
    centre = np.asarray(mesh.bounds, dtype=np.float64).mean(axis=0)
    radius = float(np.linalg.norm(np.asarray(mesh.vertices) - centre, axis=1).max())
    u, w = _frame(direction)
    # a random in-plane turn and sub-pixel shift of the grid, so two scans from the same
    # direction with different seeds see different surface points
    angle = gen.uniform(0.0, 2.0 * math.pi)
    u, w = math.cos(angle) * u + math.sin(angle) * w, -math.sin(angle) * u + math.cos(angle) * w
    pitch = 2.0 * radius / resolution
    ticks = -radius + pitch * (np.arange(resolution) + 0.5)  # (R,)
    offset = (gen.random(2) - 0.5) * pitch
    a, b = np.meshgrid(ticks + offset[0], ticks + offset[1], indexing="ij")
    plane = a.reshape(-1, 1) * u + b.reshape(-1, 1) * w  # (R*R, 3)
    origins = centre + plane - 2.0 * radius * direction
    directions = np.broadcast_to(direction, origins.shape)
    try:
        locations, rays, faces = mesh.ray.intersects_location(origins, directions, multiple_hits=False)
    except ImportError as exc:  # without embreex, trimesh's fallback needs rtree
        raise ShapesError(
            f"ray casting needs the embreex package (or rtree for trimesh's slow fallback): {exc}"
        ) from exc
    order = np.argsort(np.asarray(rays), kind="stable")  # ray order, so a seed fixes the result
    locations = np.asarray(locations, dtype=np.float64)[order]
    return locations, np.asarray(faces, dtype=np.int64)[order], radius


def scan_view(
    mesh: trimesh.Trimesh,
    count: int,
    view_dir=None,
    seed=None,
    resolution: int | None = None,
    noise: float = 0.0,
) -> tuple[np.ndarray, np.ndarray]:
    """Simulate a single-view range scan of a mesh.

    Parallel rays travel along ``view_dir`` from a plane in front of the mesh's bounding
    sphere; each ray keeps its first hit only (the visible surface). ``count`` points are
    then drawn without replacement from the hits. If there are fewer hits than ``count``,
    the grid is refined once (to about twice the needed rays, from the measured hit
    fraction); if still too few, points are drawn **with replacement**, so some repeat.

    Parameters
    ----------
    mesh : trimesh.Trimesh
    count : int
        Points in the returned cloud.
    view_dir : (3,) float, optional
        Direction the camera looks (the rays travel along it; it need not be unit length).
        Default: uniform on the sphere, drawn from ``seed``.
    seed : None, int or numpy.random.Generator
    resolution : int, optional
        Rays per side of the square grid. Default ``max(32, ceil(sqrt(8 * count)))``: the grid
        covers the bounding sphere's disc, and 8 rays per point leave room for thin parts
        that fill only a small part of the view.
    noise : float
        Standard deviation of Gaussian depth noise along each ray, as a fraction of the RMS
        radius of the noise-free cloud about its centroid (so after :func:`normalise` it is
        roughly the noise in normalised units); ``0.01`` is a coarse hand-held scanner on a
        part the size of the view.

    Returns
    -------
    points : (count, 3) float64
    normals : (count, 3) float64
        Unit normals of the faces hit (they face the camera on a closed mesh: ``n · view_dir < 0``).

    Raises
    ------
    MeshError
        No ray hit the mesh (e.g. a flat sheet seen exactly edge-on).
    """
    count = _check_count(count)
    if not (isinstance(noise, (int, float, np.floating)) and np.isfinite(noise) and noise >= 0):
        raise InputError(f"noise should be a finite number >= 0, got {noise!r} instead.")
    gen = rng(seed)
    if view_dir is None:
        direction = random_direction(gen)
    else:
        direction = np.asarray(view_dir, dtype=np.float64).reshape(-1)
        norm = float(np.linalg.norm(direction)) if direction.shape == (3,) else 0.0
        if direction.shape != (3,) or not np.isfinite(norm) or norm == 0.0:
            raise InputError(
                f"view_dir should be a non-zero finite vector of shape (3,), got {np.asarray(view_dir).tolist()} instead."
            )
        direction = direction / norm
    if resolution is None:
        resolution = max(32, math.ceil(math.sqrt(8 * count)))
    resolution = _check_count(resolution, "resolution")

    hits, faces, radius = _cast(mesh, direction, resolution, gen)
    if 0 < len(hits) < count:
        # hit fraction measured on the first grid tells how many rays give 2x the need
        fraction = len(hits) / resolution**2
        resolution = math.ceil(math.sqrt(2.0 * count / fraction))
        hits, faces, radius = _cast(mesh, direction, resolution, gen)
    if len(hits) == 0:
        raise MeshError(
            f"virtual scan from direction {np.round(direction, 4).tolist()} hit nothing "
            f"({resolution}x{resolution} rays); the mesh shows no area to this view."
        )
    pick = gen.choice(len(hits), size=count, replace=len(hits) < count)
    points, faces = hits[pick], faces[pick]
    if noise > 0:
        rms = float(np.sqrt(np.mean(np.sum((hits - hits.mean(axis=0)) ** 2, axis=1))))
        sigma = noise * (rms if rms > 0 else radius)
        points = points + gen.normal(0.0, sigma, size=(count, 1)) * direction
    normals = np.asarray(mesh.face_normals, dtype=np.float64)[faces]
    return points, normals
