"""The virtual scanner's cameras and rays: where the cameras stand, the rays through an image's pixels
and the first face each ray hits; and :func:`scan_view`, the simple scanner built on rays alone (an
orthographic grid of parallel rays from one direction, each keeping its first hit).

Ray casting goes through ``mesh.ray``, which is trimesh's Embree intersector when ``embreex`` is
installed (about a hundred times faster than trimesh's pure-Python fallback, which also needs rtree).
What a sensor makes of the hits (noise, dropout, mixed pixels, the table) is in ``_scan_sensor``.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np
import trimesh

from shapes.errors import InputError, MeshError, ShapesError
from shapes.seeding import rng
from shapes.data._sample import _check_count

if TYPE_CHECKING:
    from shapes.data._scan import ScannerSettings


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


def _random_rotation(gen: np.random.Generator) -> np.ndarray:
    """A rotation matrix uniform on SO(3): a unit quaternion from a normalised 4-D Gaussian draw
    (uniform on the 3-sphere, hence a uniform rotation; Shoemake 1992, Graphics Gems III)."""
    while True:
        q = gen.standard_normal(4)
        norm = float(np.linalg.norm(q))
        if norm > 1e-12:
            break
    w, x, y, z = q / norm
    return np.array([
        [1 - 2 * (y * y + z * z), 2 * (x * y - w * z), 2 * (x * z + w * y)],
        [2 * (x * y + w * z), 1 - 2 * (x * x + z * z), 2 * (y * z - w * x)],
        [2 * (x * z - w * y), 2 * (y * z + w * x), 1 - 2 * (x * x + y * y)],
    ])


def _placed_directions(settings: ScannerSettings, n_views: int, gen) -> np.ndarray:
    """Unit vectors from the part's centre toward each camera, (V, 3)."""
    if settings.placement == "upright":
        elevation = math.radians(settings.elevation)
        start = gen.uniform(0.0, 2.0 * math.pi)
        azimuth = start + 2.0 * math.pi * np.arange(n_views) / n_views
        return np.stack([math.cos(elevation) * np.cos(azimuth), math.cos(elevation) * np.sin(azimuth),
                         np.full(n_views, math.sin(elevation))], axis=1)
    turn = 2.0 * math.pi * np.arange(n_views) / n_views
    if n_views == 3:  # a turntable: 120 degrees apart on a great circle
        pattern = np.stack([np.cos(turn), np.sin(turn), np.zeros(3)], axis=1)
    else:  # one view, or the part turned over
        pattern = np.stack([np.zeros(n_views), np.zeros(n_views), np.cos(turn)], axis=1)
    return pattern @ _random_rotation(gen).T


def _part_sphere(mesh) -> tuple[np.ndarray, float]:
    """Centre of the bounding box and the bounding radius (largest vertex distance from it)."""
    vertices = np.asarray(mesh.vertices, dtype=np.float64)
    centre = vertices.min(axis=0) / 2.0 + vertices.max(axis=0) / 2.0
    return centre, float(np.linalg.norm(vertices - centre, axis=1).max())


def _pixel_rays(forward: np.ndarray, resolution: int, half_tan: float, gen) -> np.ndarray:
    """Unit directions through the centres of a resolution x resolution image, row-major.

    The image is turned about the optical axis by a random angle and shifted by a random sub-pixel
    offset, so two scans from the same camera with different seeds see different surface points.
    """
    u, w = _frame(forward)
    angle = gen.uniform(0.0, 2.0 * math.pi)
    u, w = math.cos(angle) * u + math.sin(angle) * w, -math.sin(angle) * u + math.cos(angle) * w
    pitch = 2.0 * half_tan / resolution
    ticks = -half_tan + pitch * (np.arange(resolution) + 0.5)
    offset = (gen.random(2) - 0.5) * pitch
    a, b = np.meshgrid(ticks + offset[0], ticks + offset[1], indexing="ij")
    rays = forward + a.reshape(-1, 1) * u + b.reshape(-1, 1) * w
    return rays / np.linalg.norm(rays, axis=1, keepdims=True)


def _first_hits(mesh, origin: np.ndarray, rays: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """First face each ray from ``origin`` hits (-1: none) and its range along the ray (inf: none).

    Embree finds the face (in float32); the range is then the exact float64 intersection of the ray
    with that face's plane, so a noise-free point lies on its face to float64 round-off.
    """
    origins = np.broadcast_to(origin, rays.shape)
    try:
        face = np.asarray(mesh.ray.intersects_first(origins, rays), dtype=np.int64)
    except ImportError as exc:  # without embreex, trimesh's fallback needs rtree
        raise ShapesError(
            f"ray casting needs the embreex package (or rtree for trimesh's slow fallback): {exc}"
        ) from exc
    ranges = np.full(len(rays), np.inf)
    hit = np.flatnonzero(face >= 0)
    if len(hit):
        normal = np.asarray(mesh.face_normals, dtype=np.float64)[face[hit]]
        corner = np.asarray(mesh.triangles[:, 0], dtype=np.float64)[face[hit]]
        across = np.einsum("ij,ij->i", normal, rays[hit])
        ok = np.abs(across) > 1e-12  # a ray in the face's own plane has no single crossing
        t = np.einsum("ij,ij->i", normal, corner - origin)[ok] / across[ok]
        ranges[hit[ok]] = np.maximum(t, 0.0)
        face[hit[~ok]] = -1
    return face, ranges
