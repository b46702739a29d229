"""Clean-up of a scanned cloud before it is named: stray points, the support plane, other objects.

Three optional steps, run in this order, each reported (how many points it removed and why):

1. **Stray points** (statistical outlier removal): a point whose mean distance to its ``stray_k``
   nearest neighbours exceeds the mean of that quantity over the cloud by more than ``stray_std``
   standard deviations is removed (scipy.spatial.cKDTree for the neighbours).
2. **Support plane**: the plane carrying the most points is found by RANSAC (Fischler & Bolles
   1981, "Random sample consensus", Comm. ACM 24(6)): planes through random triples, scored by the
   points within ``plane_tolerance`` median neighbour spacings, the best refitted to its inliers by
   least squares. It is removed only if it carries at least ``plane_share`` of the points *and*
   extends beyond the part: at least ``plane_beyond`` of its points lie outside the rectangle that
   the part covers on the plane (the largest DBSCAN cluster of the remaining points, as in step 3),
   along its own principal axes, and the part
   stands on one side of it (at most 5% of the remaining points on the other). A large face of the
   part itself (a washer lying flat, a flange) lies within the part's outline and is kept; a plane
   through the middle of a part has part on both sides and is kept.
3. **Largest cluster**: DBSCAN (Ester et al. 1996, KDD) with ``min_samples = cluster_min_points``
   and ``eps = cluster_eps`` times the median distance of the points to their
   ``cluster_min_points``-th neighbour (the paper's k-dist, taken at its median); only the largest
   cluster is kept (other objects on the table, the scanner's stray returns).

The median neighbour spacing (``plane_tolerance``) is the median distance from each point to its
nearest other point. Both spacings are measured once on the input cloud, so the settings hold at
any scale and in any units.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, fields

import numpy as np
from scipy.spatial import cKDTree

from shapes.errors import ConfigError, InputError
from shapes.seeding import rng

__all__ = ["CleanSettings", "Cleaned", "clean_points", "neighbour_spacing"]

_RANSAC_MAX = 2000  # cap on RANSAC draws whatever the settings ask
_RANSAC_SCORE = 20_000  # points on which each candidate plane is scored (a seeded random subset)
_CANDIDATES = 64  # candidate planes scored per matrix product
_ONE_SIDE = 0.05  # a support carries the part on one side: at most this share of the rest lies below it


@dataclass
class CleanSettings:
    """Which clean-up steps run and how; every step can be switched off.

    Attributes
    ----------
    stray_points : bool
        Statistical outlier removal on (default True).
    stray_k : int
        Neighbours whose mean distance is compared (default 16; common practice, the same
        neighbourhood as the normals).
    stray_std : float
        Standard deviations above the mean beyond which a point is a stray (default 3.0; common practice.
        Measured on clean single-view virtual scans of the demo parts, 3000 points: 2.0 removed 1-5%
        of the part, thread crests and grazed rims first; 3.0 removes 0.3-1.8%, and flying pixels
        far off the surface still go).
    support_plane : bool
        Support-plane removal (default False: measured on clean single-view scans of the demo parts,
        the largest flat face of a flange, a bearing or a pulley passed for a table and 15-65% of
        the part went with it; switch it on for scans of parts lying on a table).
    plane_share : float
        Smallest share of the points a support plane carries (default 0.15; common practice: a table
        around a part seen at a part-filling field of view holds a fifth to most of the points).
    plane_tolerance : float
        Largest distance of a plane's points from it, in median neighbour spacings (default 1.5;
        common practice: the scatter of a flat surface is below the spacing of its points).
    plane_beyond : float
        Share of the plane's points outside the part's outline needed to call it a support
        (default 0.2; common practice).
    plane_confidence : float
        Probability that RANSAC draws at least one all-inlier triple when the plane carries
        ``plane_share`` of the points: ``ceil(log(1 - c) / log(1 - share**3))`` draws, at most 2000
        (default 0.99; Fischler & Bolles 1981).
    cluster : bool
        Keep only the largest DBSCAN cluster (default False: a spring seen from the side, or a part
        seen through its own gaps, falls into several clusters, and on clean demo scans the step
        removed up to 64% of a spring; switch it on when other objects share the scan).
    cluster_eps : float
        DBSCAN radius in median k-dists, k = ``cluster_min_points`` (default 2.0; common practice:
        twice the typical radius that holds k neighbours, so nearly every surface point is a core point
        and a gap of a few spacings separates objects).
    cluster_min_points : int
        DBSCAN ``min_samples`` (default 4, the value Ester et al. 1996 recommend for 2-D data, and a
        scanned surface is 2-D).
    """

    stray_points: bool = True
    stray_k: int = 16
    stray_std: float = 3.0
    support_plane: bool = False
    plane_share: float = 0.15
    plane_tolerance: float = 1.5
    plane_beyond: float = 0.2
    plane_confidence: float = 0.99
    cluster: bool = False
    cluster_eps: float = 2.0
    cluster_min_points: int = 4

    def __post_init__(self):
        def bad(name, expected):
            raise ConfigError(f"clean.{name} should be {expected}, got {getattr(self, name)!r} instead.")

        for f in fields(self):
            value = getattr(self, f.name)
            if f.type in (bool, "bool") and not isinstance(value, bool):
                bad(f.name, "true or false")
        for name in ("stray_k", "cluster_min_points"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 2:
                bad(name, "an integer >= 2")
        for name in ("stray_std", "plane_tolerance", "cluster_eps"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not value > 0:
                bad(name, "a positive number")
        for name in ("plane_share", "plane_beyond", "plane_confidence"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value < 1:
                bad(name, "a share in (0, 1)")

    @classmethod
    def from_dict(cls, options: dict | None) -> "CleanSettings":
        """Settings from a mapping (the ``predict.clean`` config section); unknown keys are refused."""
        options = dict(options or {})
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(options) - known)
        if unknown:
            raise ConfigError(f"clean has no option {unknown[0]!r}; expected some of {', '.join(sorted(known))}.")
        return cls(**options)

    @classmethod
    def off(cls) -> "CleanSettings":
        return cls(stray_points=False, support_plane=False, cluster=False)

    def as_dict(self) -> dict:
        return asdict(self)


@dataclass
class Cleaned:
    """Result of :func:`clean_points`.

    keep : (M,) int64 indices of the kept points, increasing
    steps : list of dict, one per step run: ``step``, ``removed``, ``why``
    spacing : float, the median neighbour spacing of the input (its units)
    """

    keep: np.ndarray
    steps: list
    spacing: float


def neighbour_spacing(points: np.ndarray, k: int = 1) -> float:
    """Median distance from each point to its k-th nearest other point (positive distances only)."""
    k = min(int(k), len(points) - 1)
    if k < 1:
        return 0.0
    d, _ = cKDTree(points).query(points, k=k + 1)
    d = d[:, k]
    d = d[d > 0]
    return float(np.median(d)) if len(d) else 0.0


def _strays(points: np.ndarray, s: CleanSettings) -> tuple[np.ndarray, str]:
    k = min(int(s.stray_k), len(points) - 1)
    d, _ = cKDTree(points).query(points, k=k + 1)
    mean = d[:, 1:].mean(axis=1)
    limit = mean.mean() + s.stray_std * mean.std()
    keep = mean <= limit
    return keep, f"mean distance to {k} neighbours above {limit:.4g} (mean + {s.stray_std:g} std)"


def _plane_fit(points: np.ndarray) -> tuple[np.ndarray, float]:
    centre = points.mean(axis=0)
    _, _, vt = np.linalg.svd(points - centre, full_matrices=False)
    normal = vt[-1]
    return normal, float(normal @ centre)


def _support_plane(points: np.ndarray, s: CleanSettings, spacing: float, kdist: float, gen) -> tuple[np.ndarray, str]:
    n = len(points)
    keep = np.ones(n, dtype=bool)
    tol = s.plane_tolerance * spacing
    if n < 3 or tol <= 0:
        return keep, "too few points for a plane"
    draws = min(_RANSAC_MAX, math.ceil(math.log(1 - s.plane_confidence) / math.log(1 - s.plane_share ** 3)))
    sub = points[gen.choice(n, _RANSAC_SCORE, replace=False)] if n > _RANSAC_SCORE else points
    triples = sub[gen.integers(0, len(sub), size=(draws, 3))]  # (D, 3, 3)
    normals = np.cross(triples[:, 1] - triples[:, 0], triples[:, 2] - triples[:, 0])
    length = np.linalg.norm(normals, axis=1)
    ok = length > 1e-12 * max(1.0, float(np.abs(sub).max())) ** 2
    normals, triples = normals[ok] / length[ok, None], triples[ok]
    if not len(normals):
        return keep, "no plane through the points"
    offsets = np.einsum("ij,ij->i", normals, triples[:, 0])
    best, best_count = 0, -1
    for start in range(0, len(normals), _CANDIDATES):
        counts = (np.abs(sub @ normals[start:start + _CANDIDATES].T - offsets[start:start + _CANDIDATES])
                  <= tol).sum(axis=0)
        j = int(np.argmax(counts))
        if counts[j] > best_count:
            best, best_count = start + j, int(counts[j])
    normal, offset = normals[best], offsets[best]
    inliers = np.abs(points @ normal - offset) <= tol
    if inliers.sum() >= 3:  # least-squares refit on the inliers, then the inliers of the refit plane
        normal, offset = _plane_fit(points[inliers])
        inliers = np.abs(points @ normal - offset) <= tol
    share = float(inliers.mean())
    if share < s.plane_share:
        return keep, f"largest plane holds {100 * share:.1f}% of the points, under {100 * s.plane_share:g}%: kept"
    rest = points[~inliers]
    if len(rest) >= s.cluster_min_points and kdist > 0:  # the part: the largest object off the plane
        main, _ = _largest_cluster(rest, s, kdist)
        rest = rest[main]
    if len(rest) < max(3, s.cluster_min_points):
        return keep, f"the largest plane holds {100 * share:.1f}% of the points and little stands off it: kept"
    side = rest @ normal - offset
    other = min(int((side > 0).sum()), int((side < 0).sum())) / len(rest)
    if other > _ONE_SIDE:
        return keep, (f"largest plane ({100 * share:.1f}% of the points) has {100 * other:.0f}% of the rest on its "
                      "other side: it cuts through the part, kept")
    # the part's outline on the plane: a rectangle along the principal axes of its projection
    u = np.cross(normal, [1.0, 0.0, 0.0] if abs(normal[0]) < 0.9 else [0.0, 1.0, 0.0])
    u /= np.linalg.norm(u)
    v = np.cross(normal, u)
    rest2 = np.stack([rest @ u, rest @ v], axis=1)
    plane2 = np.stack([points[inliers] @ u, points[inliers] @ v], axis=1)
    centre = rest2.mean(axis=0)
    _, axes = np.linalg.eigh(np.cov((rest2 - centre).T))
    r, q = (rest2 - centre) @ axes, (plane2 - centre) @ axes
    low, high = r.min(axis=0) - tol, r.max(axis=0) + tol
    outside = float((~((q >= low) & (q <= high)).all(axis=1)).mean())
    if outside < s.plane_beyond:
        return keep, (f"largest plane ({100 * share:.1f}% of the points) lies within the part's outline "
                      f"({100 * outside:.0f}% outside): taken for a face of the part, kept")
    keep[inliers] = False
    return keep, (f"support plane: {100 * share:.1f}% of the points within {tol:.4g} of a plane, "
                  f"{100 * outside:.0f}% of them outside the part's outline (RANSAC, {draws} draws)")


def _largest_cluster(points: np.ndarray, s: CleanSettings, spacing: float) -> tuple[np.ndarray, str]:
    from sklearn.cluster import DBSCAN

    eps = s.cluster_eps * spacing
    if eps <= 0:
        return np.ones(len(points), dtype=bool), "no spacing to cluster by"
    labels = DBSCAN(eps=eps, min_samples=int(s.cluster_min_points)).fit(points).labels_
    found = labels[labels >= 0]
    if not len(found):
        return np.ones(len(points), dtype=bool), f"no cluster of {s.cluster_min_points} points within {eps:.4g}: kept all"
    sizes = np.bincount(found)
    largest = int(np.argmax(sizes))
    noise = int((labels < 0).sum())
    return labels == largest, (f"kept the largest of {len(sizes)} DBSCAN cluster(s) (eps {eps:.4g}, "
                               f"min {s.cluster_min_points} points); {noise} unclustered")


def clean_points(points, settings: CleanSettings | None = None, seed=None) -> Cleaned:
    """Run the clean-up steps that ``settings`` switches on (see the module docstring).

    Parameters
    ----------
    points : (N, 3) finite numbers
    settings : CleanSettings or None
        None: the defaults (every step on).
    seed : None, int or numpy.random.Generator
        Drives RANSAC's draws.

    Returns
    -------
    Cleaned
        ``keep`` indices into ``points`` and one report per step run.

    Raises
    ------
    InputError
        Points not a finite (N, 3) array.
    """
    s = settings if settings is not None else CleanSettings()
    points = np.asarray(points)
    if points.ndim != 2 or points.shape[1] != 3 or not np.issubdtype(points.dtype, np.number):
        raise InputError(f"points should be numbers of shape (N, 3), got {points.dtype} of shape {points.shape} instead.")
    points = points.astype(np.float64, copy=False)
    if not np.isfinite(points).all():
        raise InputError("points should be finite, got NaN or inf values instead.")
    gen = rng(seed)
    index = np.arange(len(points))
    steps = []
    spacing = neighbour_spacing(points) if len(points) >= 2 else 0.0
    kdist = neighbour_spacing(points, s.cluster_min_points) if len(points) >= 2 else 0.0
    plan = [("stray points", s.stray_points, lambda p: _strays(p, s)),
            ("support plane", s.support_plane, lambda p: _support_plane(p, s, spacing, kdist, gen)),
            ("largest cluster", s.cluster, lambda p: _largest_cluster(p, s, kdist))]
    for name, on, step in plan:
        if not on:
            continue
        if len(index) < 3:
            steps.append({"step": name, "removed": 0, "why": "too few points left"})
            continue
        keep, why = step(points[index])
        steps.append({"step": name, "removed": int((~keep).sum()), "why": why})
        index = index[keep]
    return Cleaned(index.astype(np.int64), steps, spacing)
