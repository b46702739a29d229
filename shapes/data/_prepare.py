"""A scan or mesh file made into the cloud a trained network takes, the way its training clouds were made.

:func:`prepare_cloud` reads the file (:func:`shapes.data.read_points`), samples a mesh with the
training sampler, or cleans, estimates normals for, thins and normalises a point file; a
:class:`CloudRecipe` says how the training clouds were made (``shapes predict`` fills it from the
run's record).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from shapes.data._build import NORMALS_K, NORMALS_POINTS, dense_normals, sample_cloud
from shapes.data._clean import CleanSettings, clean_points
from shapes.data._read import MIN_SCAN_POINTS
from shapes.data._sample import farthest_point_subsample, normalise
from shapes.data._scanfile import UNITS, check_spread, read_points
from shapes.errors import InputError, MeshError
from shapes.seeding import rng

__all__ = ["Cloud", "CloudRecipe", "prepare_cloud"]


@dataclass
class Cloud:
    """One input made ready for the network.

    points : (N, 3) float32, centroid 0 and unit RMS radius
    normals : (N, 3) float32 unit vectors (from the file or estimated), or None when the file has
        none and the backbone takes none
    source : how the cloud was made, for the report
    notes : what the reader noted (units, thinning while reading, ignored columns)
    cleanup : one dict per clean-up step run (``step``, ``removed``, ``why``)
    """

    points: np.ndarray
    normals: np.ndarray | None
    source: str
    notes: list = field(default_factory=list)
    cleanup: list = field(default_factory=list)


@dataclass(frozen=True)
class CloudRecipe:
    """How the training clouds were made.

    points : points per cloud
    sampler : the sampler's record (``mode``, ``oversample``, ``noise``), as a dataset's meta.json has it
    fewest : the fewest points a point file may keep, and ``why`` (for the message)
    normals_k, normals_points, orientation : the estimated normals' neighbours, the points they are
        estimated on, and their sign without a sensor position (``single-view`` or ``propagate``)
    """

    points: int
    sampler: dict = field(default_factory=dict)
    fewest: int = MIN_SCAN_POINTS
    why: str = "fewer points carry too little shape to name a part"
    normals_k: int = NORMALS_K
    normals_points: int = NORMALS_POINTS
    orientation: str = "single-view"


def prepare_cloud(path: str | os.PathLike, recipe: CloudRecipe, seed=0, needs_normals: bool = False, *,
                  units: str = "mm", clean: CleanSettings | None = None, normals: str = "auto",
                  viewpoint=None) -> Cloud:
    """Read one scan or mesh file into a cloud made the way ``recipe`` says the training clouds were.

    Meshes (STL, OBJ, OFF, GLB, PLY with faces) are sampled with the training sampler:
    ``recipe.sampler`` gives the mode (a single-view virtual scan when the clouds were scans only,
    the full surface otherwise), the oversampling before farthest-point thinning and the noise, and
    ``recipe.points`` the count. The face normals of the sampled points come along.

    Point files (E57, PLY without faces, ``.xyz``/``.txt``/``.csv``, ``.npy``, ``.npz``; see
    :func:`shapes.data.read_points`) go, in this order: read (in ``units``, converted to mm) →
    clean (:func:`shapes.data.clean_points` with ``clean``; None: the defaults) → normals, when
    they must be estimated, on up to ``recipe.normals_points`` of the points, as the training scans'
    were (:func:`shapes.data.dense_normals`) → thin to the training point count by
    farthest-point subsampling (kept whole when smaller, but at least ``recipe.fewest``) → normalise to unit RMS radius.

    Normals (only when the backbone takes them): ``normals="auto"`` uses the file's and estimates them
    when it has none, ``"file"`` uses only the file's (an error when it has none), ``"estimated"``
    ignores the file's. Estimation is :func:`shapes.data.estimate_normals` (local PCA) before thinning,
    with ``recipe.normals_k`` neighbours, each normal turned toward the
    sensor: ``viewpoint`` (the file's frame and units) if given, else the file's own (an E57 scan's
    pose, a PLY ``comment viewpoint``), else by ``recipe.orientation`` (``"single-view"`` for one view
    of a scanner, ``"propagate"`` for a cloud merged from several views).
    ``source`` says which.
    ``seed`` (None, int or numpy Generator) drives the reading, clean-up, sampling and thinning.

    Raises
    ------
    MeshError
        Unreadable file, degenerate cloud, too few points after clean-up, or no normals for a
        backbone that needs them when they cannot be estimated either.
    """
    path = Path(path)
    gen = rng(seed)
    target = recipe.points
    scan = read_points(path, units, seed=gen)
    if scan.is_mesh:
        sampler = recipe.sampler
        settings = {"points": target, "oversample": int(sampler.get("oversample", 2)),
                    "noise": float(sampler.get("noise", 0.0))}
        virtual = sampler.get("mode") == "scan"
        points, nrm, _ = sample_cloud(scan.mesh, virtual, settings, gen)  # as the shards were
        return Cloud(points.astype(np.float32), nrm.astype(np.float32),
                     f"mesh, {'virtual scan' if virtual else 'surface'} of {target} points")
    fewest, why = recipe.fewest, recipe.why
    if len(scan.points) < fewest:
        raise MeshError(f"scan file {path} has {len(scan.points)} points; need at least {fewest} ({why}).")
    source = f"points, {scan.rows}"
    if len(scan.points) < scan.rows:
        source += f" read as {len(scan.points)}"
    steps = []
    settings = clean if clean is not None else CleanSettings()
    if settings.stray_points or settings.support_plane or settings.cluster:
        cleaned = clean_points(scan.points, settings, seed=gen)
        steps = cleaned.steps
        removed = len(scan.points) - len(cleaned.keep)
        if removed:
            scan = scan.subset(cleaned.keep)
            source += f", {removed} removed by clean-up,"
            check_spread(scan.points, f"scan file {path} after clean-up", fewest)
    if len(scan.points) < fewest:
        raise MeshError(f"scan file {path} has {len(scan.points)} points after clean-up; need at least {fewest} ({why}).")
    if normals == "estimated":
        scan.normals = None
    elif normals == "file" and needs_normals and scan.normals is None:
        raise MeshError(f"scan file {path} has no surface normals and predict.normals=file forbids estimating them; "
                        "give a PLY with nx ny nz, 6 columns or a .npz with 'normals', or set predict.normals=auto.")
    points, nrm = scan.points, scan.normals
    sensors = scan.sensor_of_points()
    if viewpoint is not None:
        sensors = np.broadcast_to(np.asarray(viewpoint, dtype=np.float64) * UNITS[units], points.shape)
    how, before = None, len(points)
    if needs_normals and nrm is None:  # estimated where the points are dense, as the training scans were
        k, way, dense = recipe.normals_k, recipe.orientation, recipe.normals_points
        try:
            points, nrm, _ = dense_normals(points, dense, k, gen, orientation=way, sensors=sensors)
        except InputError as exc:  # e.g. too few points for the neighbourhoods
            raise MeshError(f"scan file {path} has no surface normals and they cannot be estimated ({exc}); "
                            "give a mesh, a PLY with nx ny nz or a .npz with 'normals'.") from None
        if sensors is not None:
            how = "toward the option's viewpoint" if viewpoint is not None else "toward the file's sensor position"
        else:
            how = "MST orientation" if way == "propagate" else f"{way} orientation"
        how = f"local PCA on {len(points)} points, k={k}, {how}"
    if len(points) > target:
        keep = farthest_point_subsample(points, target, seed=gen)
        points, nrm = points[keep], None if nrm is None else nrm[keep]
    if before > len(points):
        source += f" thinned to {len(points)}"
    try:
        points, _, _ = normalise(points)
    except InputError as exc:  # e.g. every point at one spot
        raise MeshError(f"scan file {path}: {exc}") from None
    if how is not None:
        source += f", normals estimated ({how})"
    elif nrm is not None:
        source += " with normals"
    return Cloud(points.astype(np.float32), None if nrm is None else nrm.astype(np.float32), source,
                 notes=list(scan.notes), cleanup=steps)
