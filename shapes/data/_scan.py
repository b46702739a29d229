"""A virtual range scanner: what one camera sees of a part, as a point cloud.

Two scanners, both offered by this module:

- :func:`scan_view`, the simple one: an orthographic grid of parallel rays cast at the mesh from
  one direction; only each ray's first hit is kept, so the far side of the part is missing just as
  in a real single-view scan.
- :func:`scan_part`, the realistic one (:class:`ScannerSettings`): one to three perspective
  cameras at a working distance, merged in the part frame, with depth noise that grows with range,
  dropout at grazing angles, stray points, mixed pixels along silhouettes and an optional table
  under the part.

The cameras and rays are in ``_scan_rays`` (with :func:`scan_view`), what the sensor makes of
them in ``_scan_sensor``; this module holds the settings and merges the views of :func:`scan_part`.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, fields
from typing import NamedTuple

import numpy as np
import trimesh

from shapes import _checks
from shapes.errors import ConfigError, InputError, MeshError
from shapes.seeding import rng
from shapes.data._sample import _check_count
from shapes.data._scan_rays import _frame, _part_sphere, _placed_directions, random_direction, ray_backend, scan_view
from shapes.data._scan_sensor import _OUTLIER, SCAN_LABELS, _scan_one, _visible_share

__all__ = [
    "scan_view",
    "random_direction",
    "ray_backend",
    "ScannerSettings",
    "ScanResult",
    "scan_part",
    "SCAN_LABELS",
    "CAMERA_PLACEMENTS",
]

CAMERA_PLACEMENTS = ("sphere", "upright")
"""How :func:`scan_part` places its cameras (see :class:`ScannerSettings`)."""

_MAX_RESOLUTION = 2048  # the refined grid never exceeds this many pixels per side (memory bound)
_RAYS_PER_POINT = 8  # default grid: about this many rays inside the part's outline per wanted point


@dataclass(frozen=True)
class ScannerSettings:
    """How the virtual scanner of :func:`scan_part` is built and placed.

    Lengths are relative to the part: ``R`` below is the *bounding radius*, the largest distance of
    a vertex from the centre of the mesh's axis-aligned bounding box, so the same settings give the
    same scan of a part in mm or in inches.

    Attributes
    ----------
    field_of_view : float
        Full opening angle of the square image, degrees (default 40; common practice: structured-light
        bench scanners open 30-50 degrees).
    distance : float
        Working distance, camera centre to the part's centre, in bounding radii (default 3.0; common
        practice). The part must lie inside the camera's measuring volume, as every acceptance test of
        VDI/VDE 2634 Part 2 (optical 3-D measuring systems based on area scanning) presumes, so the
        bounding sphere must fit the field of view: ``distance * sin(field_of_view / 2) >= 1``.
    resolution : int or None
        Pixels per side of the square image (default None: chosen from ``count`` so that about 8 rays
        per wanted point fall inside the bounding sphere's outline over all views, at least 32; the
        same rule as :func:`scan_view`).
    views : int
        Number of cameras, 1 to 3 (default 1), merged in the part frame. With ``"sphere"`` placement
        two views look from opposite sides (the part turned over) and three views lie 120 degrees
        apart on a great circle (a turntable); with ``"upright"`` the views are spread evenly in azimuth.
    placement : str
        ``"sphere"`` (default): the first view direction is uniform on the sphere (a uniformly random
        rotation of the pattern above), for parts in any pose. ``"upright"``: cameras look down at the
        part from above (+z) at ``elevation`` degrees, as on a bench scanner, from a random first
        azimuth. Required with ``support_plane``.
    elevation : float
        Angle of an ``"upright"`` camera above the horizontal, degrees, in (0, 90] (default 45;
        common practice for a bench scanner looking down at a part on its table).
    noise_base : float
        Depth noise at zero range, in bounding radii (default 0.001; common practice).
    noise_range : float
        Growth of the depth noise with range (default 0.0002; common practice): a point at range ``r``
        from its camera is moved along its ray by a Gaussian of standard deviation
        ``sigma = R * (noise_base + noise_range * (r / R) ** 2)``; the square law is that of
        triangulation and structured-light sensors, whose depth error grows with the square of the
        range (Khoshelham & Oude Elberink 2012, Sensors 12(2), from memory). At the default distance
        the noise is about 0.3% of R.
    grazing_start : float
        Incidence angle (between the ray and the surface normal), degrees, above which returns start
        to drop out (default 60; common practice: the light returned falls with the cosine of the
        incidence and the projected pattern smears, so steep surfaces return less and less).
    grazing_cutoff : float
        Incidence angle beyond which nothing returns, degrees (default 80; common practice). Between
        the two, a return drops out with probability rising linearly from 0 to 1. 90 and 90 turn the
        dropout off.
    outlier_share : float
        Share of the returned points that are stray points, in [0, 0.5] (default 0.005; common
        practice: reflections and multipath give a few stray returns per thousand). Each lies on a
        random pixel's ray of a random view, at a range uniform over the bounding sphere's depth
        ``[distance - 1, distance + 1] * R``. Exactly ``floor(outlier_share * count + 0.5)`` of them.
    mixed_pixels : float
        Probability, in [0, 1], that a pixel on a depth edge (a silhouette against the background or
        the table) returns a mixed point: its footprint straddles both surfaces and the sensor reports
        a range between them, uniform from the foreground's range to the background's (default 0.5;
        common practice; the "mixed pixels" of range sensors, Hebert & Krotkov 1992, Image and Vision
        Computing 10(3), from memory). A neighbour that returns nothing counts as background one
        bounding radius behind the pixel.
    support_plane : bool
        Put the part on a table (default False): the plane ``z = min z`` of the mesh, a disc of radius
        ``support_extent * R`` about the part's centre, rendered like the part (it hides what lies
        behind it, returns points with noise and dropout, and makes mixed pixels along the part's
        outline). The part stays in its own pose; rotate the mesh first for another resting pose.
    keep_support : bool
        Keep the table's points in the result (default True); False still renders the table (it
        hides and makes mixed pixels) but returns only the other points.
    support_extent : float
        Radius of the table disc in bounding radii, > 1 (default 2.0; common practice: the table shows
        around the part in every view at the default field of view).
    visibility_samples : int
        Points drawn uniformly over the mesh's area to estimate :attr:`ScanResult.visible_share`
        (default 4096: standard error at most 0.008; 0 skips it and gives NaN).
    """

    field_of_view: float = 40.0
    distance: float = 3.0
    resolution: int | None = None
    views: int = 1
    placement: str = "sphere"
    elevation: float = 45.0
    noise_base: float = 0.001
    noise_range: float = 0.0002
    grazing_start: float = 60.0
    grazing_cutoff: float = 80.0
    outlier_share: float = 0.005
    mixed_pixels: float = 0.5
    support_plane: bool = False
    keep_support: bool = True
    support_extent: float = 2.0
    visibility_samples: int = 4096

    def __post_init__(self):
        name = "scanner.{}".format
        _checks.number(name("field_of_view"), self.field_of_view, low=0, high=150, low_open=True, unit="degrees")
        _checks.number(name("distance"), self.distance, low=1, low_open=True, unit="bounding radii")
        _checks.optional(_checks.integer, name("resolution"), self.resolution, low=8, high=_MAX_RESOLUTION)
        _checks.integer(name("views"), self.views, low=1, high=3)
        _checks.choice(name("placement"), self.placement, CAMERA_PLACEMENTS)
        _checks.number(name("elevation"), self.elevation, low=0, high=90, low_open=True, unit="degrees")
        _checks.number(name("noise_base"), self.noise_base, low=0, unit="bounding radii")
        _checks.number(name("noise_range"), self.noise_range, low=0)
        _checks.number(name("grazing_start"), self.grazing_start, low=0, high=90, unit="degrees")
        _checks.number(name("grazing_cutoff"), self.grazing_cutoff, low=0, high=90, unit="degrees")
        _checks.number(name("outlier_share"), self.outlier_share, low=0, high=0.5)
        _checks.number(name("mixed_pixels"), self.mixed_pixels, low=0, high=1)
        _checks.boolean(name("support_plane"), self.support_plane)
        _checks.boolean(name("keep_support"), self.keep_support)
        _checks.number(name("support_extent"), self.support_extent, low=1, low_open=True, unit="bounding radii")
        _checks.integer(name("visibility_samples"), self.visibility_samples, low=0)
        if self.grazing_cutoff < self.grazing_start:
            raise ConfigError(
                f"scanner.grazing_cutoff should be >= scanner.grazing_start ({self.grazing_start:g} degrees), "
                f"got {self.grazing_cutoff:g} degrees instead."
            )
        reach = self.distance * math.sin(math.radians(self.field_of_view) / 2.0)
        if reach < 1.0:
            least = 1.0 / math.sin(math.radians(self.field_of_view) / 2.0)
            raise ConfigError(
                f"scanner.distance should be >= {least:.4g} bounding radii so the part fits a "
                f"{self.field_of_view:g}-degree field of view, got {self.distance:g} instead."
            )
        if self.support_plane and self.placement != "upright":
            raise ConfigError(
                f"scanner.placement should be 'upright' when scanner.support_plane is true "
                f"(the cameras look down at the table), got {self.placement!r} instead."
            )

    @classmethod
    def from_dict(cls, options: dict | None) -> "ScannerSettings":
        """Settings from a mapping (a config section); unknown keys are refused."""
        options = dict(options or {})
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(options) - known)
        if unknown:
            raise ConfigError(
                f"scanner has no option {unknown[0]!r}; expected some of {', '.join(sorted(known))}."
            )
        return cls(**options)

    def as_dict(self) -> dict:
        return asdict(self)


class ScanResult(NamedTuple):
    """What :func:`scan_part` returns; every array is in the mesh's own frame and units.

    Attributes
    ----------
    points : (count, 3) float64
        The merged cloud of all views, shuffled.
    normals : (count, 3) float64
        Unit normals: for a surface point the normal of the face hit (on a closed mesh it faces the
        camera, ``n . (viewpoint - point) > 0``); for a table point the table's normal ``+z``; for a
        mixed pixel or a stray point the unit vector from the point back toward its camera.
    labels : (count,) int8
        Index into :data:`SCAN_LABELS`: 0 surface, 1 support (table), 2 mixed pixel, 3 outlier.
    view : (count,) int64
        Index into ``viewpoints`` of the camera that saw the point.
    faces : (count,) int64
        Face of the mesh a surface point lies on; -1 for the other labels.
    sigma : (count,) float64
        Standard deviation of the depth noise the point received (mesh units), from its true range.
    viewpoints : (V, 3) float64
        Camera centres.
    visible_share : float
        Estimated share of the mesh's surface *area* that at least one camera can measure: facing
        it, inside its field of view, not hidden by the part, at an incidence within
        ``grazing_cutoff``. Measured on ``visibility_samples`` points drawn uniformly over the area,
        each tested by a ray from every camera (NaN when ``visibility_samples`` is 0).
    """

    points: np.ndarray
    normals: np.ndarray
    labels: np.ndarray
    view: np.ndarray
    faces: np.ndarray
    sigma: np.ndarray
    viewpoints: np.ndarray
    visible_share: float


def _check_views(views, settings: ScannerSettings):
    """``views`` as an int (how many placed cameras) or a (V, 3) array of unit directions."""
    if views is None:
        return settings.views
    if isinstance(views, (int, np.integer)) and not isinstance(views, bool):
        return _checks.integer("views", views, low=1, high=3, error=InputError)
    try:
        array = np.asarray(views, dtype=np.float64) if not isinstance(views, (bool, str)) else np.zeros(0)
    except (TypeError, ValueError):  # ragged or not numbers
        array = np.zeros(0)
    if array.ndim == 1 and array.shape == (3,):
        array = array[None]
    norms = np.linalg.norm(array, axis=-1) if array.ndim == 2 and array.shape[1:] == (3,) else np.zeros(0)
    if not (array.ndim == 2 and array.shape[1:] == (3,) and 1 <= len(array) <= 3
            and np.all(np.isfinite(norms)) and np.all(norms > 0)):
        raise InputError(
            f"views should be None, 1 to 3, or 1 to 3 non-zero finite directions of shape (V, 3), "
            f"got {f'an array of shape {views.shape}' if isinstance(views, np.ndarray) else repr(views)} instead."
        )
    array = array / norms[:, None]
    if settings.support_plane and np.any(array[:, 2] <= 0):
        bad = int(np.argmax(array[:, 2] <= 0))
        raise InputError(
            f"views[{bad}] should point above the table (z > 0) when scanner.support_plane is true, "
            f"got {np.round(array[bad], 4).tolist()} instead."
        )
    return array


def scan_part(
    mesh: trimesh.Trimesh,
    count: int,
    settings: ScannerSettings = ScannerSettings(),
    seed=None,
    views=None,
) -> ScanResult:
    """Simulate a structured-light scan of a part: one to three perspective views, merged.

    Each camera sits ``settings.distance`` bounding radii from the centre of the part's bounding
    box and looks at it through a square pinhole image of ``settings.resolution`` pixels per side.
    A pixel returns its ray's first hit on the part (or the table), unless the hit drops out at a
    grazing angle; pixels along depth edges may return mixed points between foreground and
    background instead. ``count - n_out`` points are drawn from the returns of all views (without
    replacement when there are enough; otherwise the image is refined once, to about twice the
    needed returns from the measured return rate, and if still short drawn **with replacement**,
    so some repeat), ``n_out = floor(outlier_share * count + 0.5)`` stray points are added, every
    point is moved along its ray by depth noise, and the cloud is shuffled.

    Parameters
    ----------
    mesh : trimesh.Trimesh
        The part, in any pose and units; a closed mesh's back faces never return points.
    count : int
        Points in the returned cloud.
    settings : ScannerSettings
        The scanner (default: ``ScannerSettings()``).
    seed : None, int or numpy.random.Generator
        Same seed, same scan, byte for byte.
    views : None, int or (V, 3) array-like
        None: ``settings.views`` cameras placed by ``settings.placement``; an int in 1..3 overrides
        the number; 1 to 3 directions (from the part's centre toward each camera, any length) place
        the cameras explicitly.

    Returns
    -------
    ScanResult
        ``points (count, 3)``, ``normals (count, 3)``, ``labels (count,)``, ``view (count,)``,
        ``faces (count,)``, ``sigma (count,)``, ``viewpoints (V, 3)``, ``visible_share``.

    Raises
    ------
    InputError
        ``count``, ``views`` or ``mesh`` is not usable.
    MeshError
        No view returned any point (e.g. a flat sheet seen exactly edge-on).
    """
    count = _check_count(count)
    if not isinstance(settings, ScannerSettings):
        raise InputError(f"settings should be a ScannerSettings, got {type(settings).__name__} instead.")
    if not isinstance(mesh, trimesh.Trimesh) or len(mesh.faces) == 0:
        raise InputError(
            f"mesh should be a trimesh.Trimesh with faces, got "
            f"{type(mesh).__name__ if not isinstance(mesh, trimesh.Trimesh) else 'a mesh with no faces'} instead."
        )
    vertices = np.asarray(mesh.vertices, dtype=np.float64)
    area = float(mesh.area)
    if not (np.all(np.isfinite(vertices)) and np.isfinite(area) and area > 0):
        raise MeshError(f"mesh should have finite vertices and positive surface area, got area {area:g} instead.")
    views = _check_views(views, settings)
    gen = rng(seed)

    centre, radius = _part_sphere(mesh)
    table_z = float(vertices[:, 2].min()) if settings.support_plane else None
    geometry = (centre, radius, bool(mesh.is_watertight), table_z)
    directions = _placed_directions(settings, views, gen) if isinstance(views, int) else views
    cameras = centre + settings.distance * radius * directions
    n_views = len(cameras)

    n_out = math.floor(settings.outlier_share * count + 0.5)
    need = count - n_out
    half_tan = math.tan(math.radians(settings.field_of_view) / 2.0)
    resolution = settings.resolution
    if resolution is None:
        # share of the image inside the bounding sphere's outline (a disc of tangent radius tan(alpha))
        alpha = math.asin(1.0 / settings.distance)
        inside = math.pi * math.tan(alpha) ** 2 / (4.0 * half_tan**2)
        resolution = max(32, math.ceil(math.sqrt(_RAYS_PER_POINT * max(need, 1) / (n_views * inside))))
        resolution = min(resolution, _MAX_RESOLUTION)

    def cast(resolution):
        parts = [_scan_one(mesh, cam, (centre - cam) / np.linalg.norm(centre - cam), resolution, settings,
                           geometry, gen) for cam in cameras]
        pool = {key: np.concatenate([p[key] for p in parts]) for key in parts[0] if key != "cast"}
        pool["view"] = np.concatenate([np.full(len(p["labels"]), k, dtype=np.int64) for k, p in enumerate(parts)])
        return pool

    pool = cast(resolution)
    found = len(pool["labels"])
    if 0 < found < need and resolution < _MAX_RESOLUTION:
        # the return rate of the first image tells how many pixels give twice the need
        resolution = min(_MAX_RESOLUTION, math.ceil(resolution * math.sqrt(2.0 * need / found)))
        pool = cast(resolution)
        found = len(pool["labels"])
    if found == 0:
        raise MeshError(
            f"virtual scan from {n_views} view(s) returned no point ({resolution}x{resolution} pixels each); "
            f"the mesh shows no measurable area to these cameras."
        )
    pick = gen.choice(found, size=need, replace=found < need)
    take = {key: value[pick] for key, value in pool.items()}

    if n_out:
        which = gen.integers(0, n_views, size=n_out)
        rays = np.empty((n_out, 3))
        for k in range(n_views):
            sel = which == k
            forward = (centre - cameras[k]) / np.linalg.norm(centre - cameras[k])
            u, w = _frame(forward)
            a, b = gen.uniform(-half_tan, half_tan, size=(2, int(sel.sum())))
            ray = forward + a[:, None] * u + b[:, None] * w
            rays[sel] = ray / np.linalg.norm(ray, axis=1, keepdims=True)
        ranges = radius * gen.uniform(settings.distance - 1.0, settings.distance + 1.0, size=n_out)
        strays = {"points": cameras[which] + ranges[:, None] * rays, "normals": -rays,
                  "labels": np.full(n_out, _OUTLIER, dtype=np.int8), "faces": np.full(n_out, -1, dtype=np.int64),
                  "ranges": ranges, "rays": rays, "view": which.astype(np.int64)}
        take = {key: np.concatenate([take[key], strays[key]]) for key in take}

    sigma = radius * (settings.noise_base + settings.noise_range * (take["ranges"] / radius) ** 2)
    points = take["points"]
    if np.any(sigma > 0):
        points = points + (gen.standard_normal(count) * sigma)[:, None] * take["rays"]
    order = gen.permutation(count)
    share = _visible_share(mesh, cameras, settings, geometry, gen)
    return ScanResult(
        points=np.ascontiguousarray(points[order], dtype=np.float64),
        normals=np.ascontiguousarray(take["normals"][order], dtype=np.float64),
        labels=take["labels"][order].astype(np.int8),
        view=take["view"][order].astype(np.int64),
        faces=take["faces"][order].astype(np.int64),
        sigma=sigma[order].astype(np.float64),
        viewpoints=cameras.astype(np.float64),
        visible_share=share,
    )
