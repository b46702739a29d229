"""Turn a catalog of meshes into point-cloud shards: the job behind ``shapes sample``.

Layout of the output folder (written whole or not at all; see :mod:`shapes.data._store`)::

    out_dir/
      meta.json                      classes, twins, handed, instances, sampler settings, ...
      train/ val/ test/              one plain .npy file per array: points.npy (M, N, 3) float32,
                                     normals.npy (M, N, 3) float32, labels.npy (M,) int64,
                                     instance.npy (M,) int32, scale.npy (M,) float32,
                                     kind.npy (M,) int8 (0 full surface, 1 virtual scan),
                                     visible.npy (M,) float32 (share of the surface area seen; 1 for surfaces)

Each cloud is written to its split's files as it is drawn, so sampling holds one cloud, not the dataset.
"""

from __future__ import annotations

import math
import os
import sys
from pathlib import Path
from typing import Callable

import numpy as np
import torch
import trimesh
from tqdm import tqdm

import shapes
from shapes import _checks as check
from shapes._atomic import atomic_dir, write_json
from shapes.errors import ConfigError, DataError
from shapes.data._catalog import _check_twins, read_catalog
from shapes.data._normals import estimate_normals
from shapes.data._scanfile import orient_toward
from shapes.data._read import read_mesh
from shapes.data._twins import TWIN_MODES, resolve_twins, twin_lines
from shapes.data._sample import farthest_point_subsample, normalise, sample_surface
from shapes.data._clean import CleanSettings, clean_points
from shapes.data._scan import ScannerSettings, scan_part, scan_view
from shapes.data._split import SPLITS, split_groups
from shapes.data._store import FORMAT, META_FILE, OPTIONAL_KEYS, SHARD_KEYS, SplitWriter

__all__ = ["build_dataset", "sample_cloud", "draw_cloud", "dense_normals", "DEFAULT_COPIES", "MODES",
           "NORMAL_SOURCES", "NORMALS_K", "NORMALS_POINTS", "META_FILE", "SHARD_KEYS", "OPTIONAL_KEYS", "SURFACE", "SCAN"]

# Copies per instance: training sees each part in several samplings; test has more than val
# because its accuracy is the number reported.
DEFAULT_COPIES = {"train": 8, "val": 2, "test": 4}
MODES = ("surface", "scan", "mixed")
# Where a virtual scan's normals come from: the faces of the mesh, or local PCA on the points
# themselves, turned toward the (unknown) sensor, which is what a bare x y z scan file gives at
# prediction time; training on them makes both alike. Full-surface clouds keep the mesh's
# normals either way: a mesh file has faces, and on thin walls sampled more coarsely than their
# thickness no estimate finds the outside (see shapes.data._normals).
NORMAL_SOURCES = ("mesh", "estimated")
# Neighbours of the PCA normals. 16 spans about a tenth of a part's surface at 512-1024 points:
# enough to average out scanner noise, small enough not to round off edges (Hoppe et al. 1992
# use a small fixed neighbourhood for the same reason). # common practice
NORMALS_K = 16
# Points the normals of a scan are estimated on, before it is thinned to the model's count. A
# thread's flank or a helical tooth is far finer than the spacing of 512 points; the normal at each
# kept point leans with the helix only if it is estimated where the scanner's points are dense.
# Measured on clean single-view virtual scans of the demo parts (k = 16, median angle to the true
# normal): an M10 stud 15.9 deg when estimated on 512 points, 4.8 deg on 4096, 3.3 deg on 8192; a
# helical gear 5.6 / 0.0 / 0.0 deg; a spring 39.8 / 17.4 / 12.5 deg, and at 512 and 1024 points the
# single-view signs of the spring came out reversed (which mimics its mirror twin).
NORMALS_POINTS = 8192
# The sparsest training scan has NORMALS_POINTS / SPARSEST returns (never fewer than the cloud's
# surface draw): scanners differ in resolution by more than an order of magnitude, and a model
# trained only on scans of 2048 returns or more, whose normals lean with the helix, lost the hand
# of studs and brackets on scan files of 1000 points (a demo run: 79.7% at 3000 points, 59.4% at
# 1000, handed 71.9% -> 37.5%; bench/accuracy_scans.py --points).
SPARSEST = 16
SURFACE, SCAN = 0, 1  # values of ``kind``


def _check_settings(points, copies, mode, scan_fraction, oversample, noise, seed, normals="mesh",
                    normals_k=NORMALS_K, normals_points=NORMALS_POINTS, twins="auto") -> dict:
    points = check.integer("points", points, low=2)
    oversample = check.integer("oversample", oversample, low=1)
    seed = check.integer("seed", seed, low=0)
    copies = dict(DEFAULT_COPIES if copies is None else copies)
    if set(copies) != set(SPLITS):
        raise ConfigError(f"copies should have keys {list(SPLITS)}, got {sorted(copies)} instead.")
    copies = {s: check.integer(f"copies[{s!r}]", copies[s], low=0) for s in SPLITS}
    if mode not in MODES:
        raise ConfigError(f"mode should be one of {list(MODES)}, got {mode!r} instead.")
    for name, value in (("scan_fraction", scan_fraction), ("noise", noise)):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value < 0:
            raise ConfigError(f"{name} should be a finite number >= 0, got {value!r} instead.")
    if scan_fraction > 1:
        raise ConfigError(f"scan_fraction should be in [0, 1], got {scan_fraction!r} instead.")
    if normals not in NORMAL_SOURCES:
        raise ConfigError(f"normals should be one of {list(NORMAL_SOURCES)}, got {normals!r} instead.")
    normals_k = check.integer("normals_k", normals_k, low=3)
    if normals == "estimated" and normals_k >= points:
        raise ConfigError(f"normals_k should be below points = {points}, got {normals_k} instead.")
    normals_points = check.integer("normals_points", normals_points, low=points)
    twins = check.choice("twins", twins, TWIN_MODES)
    return dict(points=points, copies=copies, mode=mode, scan_fraction=float(scan_fraction),
                oversample=oversample, noise=float(noise), seed=seed, normals=normals, normals_k=normals_k,
                normals_points=normals_points, twins=twins)


def _check_out_dir(out_dir: Path, root: Path) -> None:
    """Refuse to replace a folder that is not a dataset, or one holding the catalog."""
    if out_dir == root or root.is_relative_to(out_dir):
        raise DataError(f"out_dir {out_dir} holds the catalog {root}; choose another folder.")
    if out_dir.exists():
        if not out_dir.is_dir():
            raise DataError(f"out_dir {out_dir} is a file; expected a folder.")
        if any(out_dir.iterdir()) and not (out_dir / META_FILE).exists():
            raise DataError(
                f"out_dir {out_dir} exists and is not a shapes dataset (no {META_FILE}); "
                "refusing to replace it."
            )


def _scan_copies(n_copies: int, mode: str, scan_fraction: float) -> int:
    """How many of an instance's copies are virtual scans (the first ones)."""
    if mode == "surface":
        return 0
    if mode == "scan":
        return n_copies
    return math.floor(scan_fraction * n_copies + 0.5)  # half up: 1 copy at 0.5 is a scan


def training_scanner(gen, noise: float = 0.0) -> ScannerSettings:
    """A scanner drawn at random for one training scan, so a model does not learn one scanner.

    One view (the file a user names is most often one view). The camera stands 2.5 to 8 bounding
    radii away, with a field of view that the part fills to between 45% and 95% of its width. Half
    the scanners are clean (no depth noise, stray points or mixed pixels; grazing dropout only), as
    a good structured-light scanner on a matt part nearly is; the other half have depth noise from
    none to 0.3% of the part's radius at the near end, stray points up to 1% and mixed pixels at the
    scanner's default. ``noise`` is added to every scanner's depth noise. Drawn from ``gen``.

    Measured (vector_gate, 512 points, bare x y z test scans from a clean orthographic scanner,
    ``bench/accuracy_scans.py``): trained on clean orthographic scans, 75.0% (12 epochs); on
    perspective scans that all carried noise, stray points and mixed pixels, 64.1% (22 epochs), most
    of the loss in the hand of studs, helical gears and brackets: depth noise hides the thread and
    tooth hand that clean normals show, so clean scans stay in the mix.
    """
    distance = float(gen.uniform(2.5, 8.0))
    fill = float(gen.uniform(0.45, 0.95))  # share of the half-angle the part's bounding sphere takes
    fov = 2.0 * math.degrees(math.asin(min(1.0, 1.0 / distance / fill)))
    clean = bool(gen.random() < 0.5)
    return ScannerSettings(field_of_view=min(fov, 120.0), distance=distance, views=1,
                           noise_base=(0.0 if clean else float(gen.uniform(0.0, 0.003))) + noise,
                           noise_range=0.0 if clean else ScannerSettings.noise_range,
                           outlier_share=0.0 if clean else float(gen.uniform(0.0, 0.01)),
                           mixed_pixels=0.0 if clean else ScannerSettings.mixed_pixels,
                           visibility_samples=2048)


# Scans in training go through the same clean-up as a scan file at prediction time (its default).
_CLEAN = CleanSettings()


def dense_normals(points: np.ndarray, count: int, k: int, gen, orientation: str = "single-view",
                  sensors: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Estimate a scan's normals where its points are dense, then keep ``count`` of them.

    The normals are estimated (:func:`estimate_normals`, local PCA over ``k`` neighbours) on the whole
    cloud, on a random ``count`` of its points when it has more, each turned toward its sensor
    position in ``sensors`` (N, 3) when known, else by ``orientation``. Used alike for the training
    scans and for a scan file at prediction time, so both carry normals of one kind.

    Returns the kept points, their unit normals and the indices kept (into ``points``).
    """
    keep = np.arange(len(points))
    if len(points) > count:
        keep = np.sort(gen.choice(len(points), size=count, replace=False))
    pts = points[keep]
    centre = pts.mean(axis=0)
    radius = float(np.sqrt(np.mean(np.sum((pts - centre) ** 2, axis=1)))) or 1.0
    unit = (pts - centre) / radius  # PCA and the signs do not depend on it; round-off does
    if sensors is None:
        nrm, _ = estimate_normals(unit, k=k, orientation=orientation)
    else:
        nrm, _ = estimate_normals(unit, k=k)
        nrm = orient_toward(unit, nrm, (sensors[keep] - centre) / radius)
    return pts, nrm, keep


def draw_cloud(mesh, scan: bool, s: dict, gen) -> tuple[np.ndarray, np.ndarray, float, float]:
    """One normalised cloud as the shards hold it, and the share of the surface it shows.

    ``scan``: a single-view virtual scan by a scanner drawn at random (:func:`training_scanner`:
    perspective camera at a random distance, depth noise, grazing dropout, mixed pixels and stray
    points), then cleaned of stray points as a scan file is at prediction time; else
    ``s["points"] * s["oversample"]`` area-weighted samples of the whole surface. Either way the
    cloud is then thinned to ``s["points"]`` by farthest-point subsampling, as :func:`shapes.predict`
    thins a scan file, and centred and scaled to unit RMS radius. ``s["noise"]`` (RMS radii) adds
    depth noise to scans and moves surface points along the normal.

    A scan has ``points * oversample`` returns with mesh normals. With ``s["normals"] ==
    "estimated"`` it has instead a number of returns drawn log-uniformly between
    ``s["normals_points"] / SPARSEST`` (at least ``points * oversample``) and all of it (scanners differ in resolution), and its normals are
    estimated on those returns before thinning (:func:`dense_normals`, single-view signs), exactly
    as for a bare scan file at prediction time; a full surface keeps the mesh's normals.

    Returns
    -------
    points : (N, 3) float64, centroid 0, unit RMS radius
    normals : (N, 3) float64 unit vectors
    scale : float, RMS radius before normalising, in mesh units
    visible : float, share of the surface area seen (1.0 for a full surface)
    """
    n = s["points"]
    many = n * s["oversample"]
    visible = 1.0
    estimated = scan and s.get("normals", "mesh") == "estimated"
    if scan:
        if estimated:
            top = max(int(s.get("normals_points", NORMALS_POINTS)), many)
            many = int(round(math.exp(gen.uniform(math.log(max(top // SPARSEST, many)), math.log(top)))))
        result = scan_part(mesh, max(many, n + n // 4), training_scanner(gen, s["noise"]), seed=gen)
        pts, nrm, visible = result.points, result.normals, float(result.visible_share)
        kept = clean_points(pts, _CLEAN, seed=gen).keep
        if len(kept) >= n:  # (a tiny cloud may lose more to the clean-up than it can spare)
            pts, nrm = pts[kept], nrm[kept]
        if estimated:
            pts, nrm, _ = dense_normals(pts, len(pts), int(s.get("normals_k", NORMALS_K)), gen)
    else:
        pts, nrm = sample_surface(mesh, many, seed=gen)
    keep = farthest_point_subsample(pts, n, seed=gen)
    pts, nrm = pts[keep], nrm[keep]
    if s["noise"] > 0 and not scan:
        rms = math.sqrt(np.mean(np.sum((pts - pts.mean(axis=0)) ** 2, axis=1)))
        pts = pts + gen.normal(0.0, s["noise"] * rms, size=(n, 1)) * nrm
    pts, _, scale = normalise(pts)
    return pts, nrm, scale, visible


def sample_cloud(mesh, scan: bool, s: dict, gen) -> tuple[np.ndarray, np.ndarray, float]:
    """One normalised cloud as the shards hold it: points (N, 3), normals (N, 3), scale in mesh units.

    See :func:`draw_cloud`; used for the shards and by ``shapes predict``, so a new mesh is sampled
    exactly like the training data.
    """
    pts, nrm, scale, _ = draw_cloud(mesh, scan, s, gen)
    return pts, nrm, scale


def _relative(file: Path, root: Path) -> str:
    try:
        return file.relative_to(root).as_posix()
    except ValueError:
        return str(file)


def build_dataset(
    catalog_dir: str | os.PathLike,
    out_dir: str | os.PathLike,
    *,
    points: int = 1024,
    copies: dict[str, int] | None = None,
    mode: str = "mixed",
    scan_fraction: float = 0.5,
    oversample: int = 2,
    noise: float = 0.0,
    normals: str = "estimated",
    normals_k: int = NORMALS_K,
    normals_points: int = NORMALS_POINTS,
    split_fractions=(0.6, 0.2, 0.2),
    seed: int = 0,
    progress: bool = False,
    twins: str = "auto",
    say: Callable[[str], None] | None = None,
) -> Path:
    """Sample every instance of a catalog into train/val/test point-cloud shards.

    Groups are split per class (see :func:`split_groups`), then each instance gets
    ``copies[split]`` clouds. A cloud is either ``points * oversample`` area-weighted
    surface samples thinned to ``points`` by farthest-point subsampling (``mode="surface"``),
    or a single-view virtual scan from a random direction (``"scan"``), or, for
    ``"mixed"``, the first ``floor(scan_fraction * copies + 0.5)`` copies are scans and the rest
    surface samples. Each cloud is then centred and scaled to unit RMS radius; the scale
    (in catalog units) is stored beside it.

    Parameters
    ----------
    catalog_dir : path
        A catalog folder (:func:`read_catalog`).
    out_dir : path
        Output folder; replaced whole if it already holds a dataset.
    points : int
        Points per cloud (default 1024, enough for holes and threads to show at 2 cores' speed).
    copies : dict split -> int
        Clouds per instance and split (default ``{"train": 8, "val": 2, "test": 4}``).
    mode : {"surface", "scan", "mixed"}
        Default ``"mixed"``: a model that saw both names full meshes and single-view scans.
    scan_fraction : float
        Share of scan copies in ``"mixed"`` mode (default 0.5: half complete, half partial).
    oversample : int
        Surface samples per kept point before FPS (default 2: FPS evens out the random
        clumps of plain sampling at twice the sampling cost).
    noise : float
        Gaussian noise as a fraction of each cloud's RMS radius, along the ray for scans
        and along the surface normal for surface samples (default 0: clean CAD).
    normals : {"mesh", "estimated"}
        The clouds' normals: the faces hit, or estimated from the points as for a bare scan file.
    normals_k : int
        Neighbours of the estimated normals.
    normals_points : int
        A scan's normals are estimated on up to this many of its points before it is thinned
        (default 8192; see :func:`draw_cloud`).
    split_fractions : (3,) float
        Train/val/test shares of each class's groups.
    seed : int
        Seeds the split and every cloud; cloud ``(instance i, copy k)`` is drawn from
        ``SeedSequence([seed, i, k])``, so it does not depend on the order of work.
    progress : bool
        Show a progress bar on a terminal.
    twins : {"auto", "derived", "declared"}
        Where the mirror-twin map comes from (:func:`resolve_twins`), decided once the options, the
        output folder and the split are checked: ``"auto"`` (default) derives it from the geometry when
        the catalog declares none and checks a declared one; ``"derived"`` always takes the geometry's;
        ``"declared"`` takes the catalog's unchecked. The record, less its clock reading, is stored as
        ``meta["twin_check"]``.
    say : callable, optional
        Called with each line about the twin map (:func:`twin_lines`; disagreements start with
        ``warning:``) before sampling starts; None says nothing.

    Returns
    -------
    out_dir : Path

    Raises
    ------
    DataError, MeshError, ConfigError
        Bad catalog, a bad mesh (nothing is written: no out_dir, no temp folder), bad option.
    """
    s = _check_settings(points, copies, mode, scan_fraction, oversample, noise, seed, normals, normals_k,
                        normals_points, twins)
    catalog = read_catalog(catalog_dir)
    out_dir = Path(out_dir).expanduser().resolve()
    _check_out_dir(out_dir, catalog.root)
    split_of = split_groups(catalog, split_fractions, seed=np.random.SeedSequence([s["seed"], 0x5117]))
    record = resolve_twins(catalog, s["twins"])
    for line in twin_lines(record) if say is not None else ():
        say(line)
    twin_map = _check_twins(dict(record.pop("map")), catalog.classes, catalog.root, "the decided twin map")
    twin_check = {k: v for k, v in record.items() if k != "seconds"}  # the clock reading stays out of meta.json
    label = {c: k for k, c in enumerate(catalog.classes)}

    n = s["points"]
    counts = {sp: sum(s["copies"][sp] for inst in catalog.instances if split_of[inst.group] == sp) for sp in SPLITS}
    meta = {
        "format": FORMAT,
        "classes": list(catalog.classes),
        "twins": twin_map,
        "handed": {c: twin_map[c] != c for c in catalog.classes},
        "twin_check": twin_check,
        "instances": [
            {"class": inst.cls, "file": _relative(inst.file, catalog.root), "group": inst.group,
             "split": split_of[inst.group]}
            for inst in catalog.instances
        ],
        "sampler": {
            "points": n,
            "copies": s["copies"],
            "mode": s["mode"],
            "scan_fraction": s["scan_fraction"],
            "oversample": s["oversample"],
            "noise": s["noise"],
            "noise_units": "fraction of the cloud's RMS radius; along the ray (scan) or the surface normal (surface)",
            "scanner": "one view, perspective, drawn per scan: distance U(2.5, 8) bounding radii, part filling "
                       "45-95% of the view, grazing dropout 60-80 deg; half of them clean, half with depth noise "
                       "U(0, 0.3%) of the radius, stray points U(0, 1%) and mixed pixels at depth edges; plus "
                       "sample.noise; then stray-point clean-up (mean + 3 std of the 16-neighbour distance)",
            "thinning": "farthest-point subsampling of points * oversample surface samples or scan hits",
            "normals": {"source": s["normals"], "k": s["normals_k"],
                        **({"applies_to": "virtual scans (full surfaces keep the mesh's)", "method": "pca",
                            "orientation": "single-view", "points": s["normals_points"],
                            "estimated_on": f"the scan's returns before thinning, 1/{SPARSEST} of 'points' "
                                            "(at least points x oversample) to all of it (log-uniform per scan)"}
                           if s["normals"] == "estimated" else {})},
            "split_fractions": [float(f) for f in split_fractions],
            "normalise": "centroid to origin, unit RMS radius; scale (catalog units) stored per cloud",
        },
        "seed": s["seed"],
        "catalog": str(catalog.root),
        "units": catalog.units,
        "versions": {"shapes": shapes.__version__, "numpy": np.__version__,
                     "trimesh": trimesh.__version__, "torch": torch.__version__},
        "counts": counts,
    }
    with atomic_dir(out_dir) as tmp:  # an interrupted or failed run leaves neither out_dir nor a half of it
        writers = {sp: SplitWriter(tmp / sp, counts[sp], n) for sp in SPLITS}
        bar = tqdm(catalog.instances, desc="sampling", unit="mesh", disable=not (progress and sys.stderr.isatty()))
        for i, inst in enumerate(bar):
            mesh = read_mesh(inst.file)
            split = split_of[inst.group]
            n_scans = _scan_copies(s["copies"][split], s["mode"], s["scan_fraction"])
            for k in range(s["copies"][split]):
                gen = np.random.default_rng(np.random.SeedSequence([s["seed"], i, k]))
                pts, nrm, scale, visible = draw_cloud(mesh, k < n_scans, s, gen)
                writers[split].add(points=pts, normals=nrm, labels=label[inst.cls], instance=i, scale=scale,
                                   kind=SCAN if k < n_scans else SURFACE, visible=visible)
        bar.close()
        for writer in writers.values():
            writer.close()
        write_json(tmp / META_FILE, meta)
    return out_dir
