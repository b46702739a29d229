"""Tell whether two meshes are one rigid motion apart, whether a part is chiral, and which
classes of a folder are mirror images of each other.

Rigid alignment without reflection: both surfaces are centred and put in their principal-axes
frames (exact area moments); every proper (det +1) pairing of the axes is a candidate, and where
two principal moments nearly coincide (turned parts) the candidates are also turned about the
distinct axis in 10 degree steps. The best few candidates by a coarse nearest-neighbour score
are refined by point-to-point ICP (trimesh.registration, reflection off) and then point-to-plane
ICP. The result is scored by the symmetric mean distance from surface samples of each mesh to
the other surface, divided by the RMS radius of the surface about its centroid. That relative
residual is what ``tol`` bounds.

:func:`check_twins` runs the twin search over a catalog folder (or a mapping of meshes) and
compares the result with a declared map (``catalog.json`` twins or ``twins.json``).
"""

from __future__ import annotations

import itertools
import json
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np
import trimesh
from trimesh.registration import icp

from shapes.errors import DataError, InputError, MeshError
from shapes.parts._mesh import mirror_mesh

__all__ = [
    "Alignment", "align_rigid", "is_rotation_of", "is_chiral", "find_mirror_twins", "check_twins", "TwinReport", "DEFAULT_TOL",
]

# Relative residual below which two surfaces count as the same up to a rotation. Measured on every
# instance of the demo catalog (mirror image in a random pose): achiral parts align to
# 3e-5..4e-4, the subtlest handed parts (long studs with short threads) stay >= 3e-3.
DEFAULT_TOL = 1.2e-3
_DENSE = 64000  # samples of the distance oracle: its error falls ~1/count (measured 5e-4 mm here)
_GAP = 0.1  # principal moments closer than 10 % are treated as equal (axis ill-defined)
_STEPS = 36  # turns about a distinct axis: 10 degree steps, inside ICP's basin for gear teeth
_KEEP = 4  # candidates refined by ICP


@dataclass(frozen=True)
class Alignment:
    """Best proper rigid motion taking mesh A onto mesh B.

    Attributes
    ----------
    matrix : (4, 4) float, homogeneous transform with det(R) = +1, x_B = R x_A + t
    residual : symmetric mean surface distance after alignment / RMS radius of A's surface
    distance : the same residual in mesh units (mm)
    """

    matrix: np.ndarray
    residual: float
    distance: float


def _check_mesh(mesh, name: str) -> trimesh.Trimesh:
    if not isinstance(mesh, trimesh.Trimesh):
        raise InputError(f"{name} should be a trimesh.Trimesh, got {type(mesh).__name__} instead.")
    if len(mesh.faces) == 0 or not mesh.area > 0:
        raise InputError(f"{name} should have faces of positive area, got {len(mesh.faces)} faces, area {mesh.area:g} instead.")
    return mesh


def _samples(mesh: trimesh.Trimesh, count: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Area-uniform surface points (count, 3) and their face normals (count, 3)."""
    points, face = trimesh.sample.sample_surface(mesh, count, seed=seed)
    return np.asarray(points), np.asarray(mesh.face_normals[face])


def _surface_moments(mesh: trimesh.Trimesh) -> tuple[np.ndarray, np.ndarray]:
    """Exact area-weighted centroid (3,) and covariance (3, 3) of the surface.

    Per triangle (a, b, c) of area A: integral of x x^T = A / 12 (s s^T + a a^T + b b^T + c c^T)
    with s = a + b + c. Exact moments keep symmetric parts (a flange with 8 holes) exactly
    isotropic in their plane, where sampled moments would invent a spurious gap.
    """
    tri = np.asarray(mesh.triangles, dtype=np.float64)  # (F, 3, 3)
    area = np.asarray(mesh.area_faces, dtype=np.float64)  # (F,)
    total = area.sum()
    s = tri.sum(1)  # (F, 3)
    centre = (area[:, None] * s / 3.0).sum(0) / total
    second = np.einsum("f,fi,fj->ij", area, s, s) + np.einsum("f,fki,fkj->ij", area, tri, tri)
    cov = second / (12.0 * total) - np.outer(centre, centre)
    return centre, cov


def _frame(mesh: trimesh.Trimesh) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Centroid (3,), principal axes as columns (3, 3) sorted by decreasing variance, variances (3,)."""
    centre, cov = _surface_moments(mesh)
    values, vectors = np.linalg.eigh(cov)
    order = np.argsort(values)[::-1]
    return centre, vectors[:, order], values[order]


def _about(axis: int, angle: float) -> np.ndarray:
    c, s = math.cos(angle), math.sin(angle)
    i, j = [k for k in range(3) if k != axis]
    rot = np.eye(3)
    rot[i, i], rot[i, j], rot[j, i], rot[j, j] = c, -s, s, c
    return rot


def _candidates(va: np.ndarray, vb: np.ndarray, values: np.ndarray) -> list[np.ndarray]:
    """Proper rotations R with R va ~ vb up to axis signs, plus turns about a distinct axis
    where the other two principal moments nearly coincide."""
    signs = [np.diag(s) for s in itertools.product((1.0, -1.0), repeat=3)]
    base = [vb @ s @ va.T for s in signs]
    base = [r for r in base if np.linalg.det(r) > 0]  # 4 proper pairings
    g01 = (values[0] - values[1]) / values[0]
    g12 = (values[1] - values[2]) / values[0]
    turns = []
    if g01 < _GAP and g12 < _GAP:  # nearly isotropic: turn about every axis
        turns = [(ax, k) for ax in range(3) for k in range(_STEPS)]
    elif g01 < _GAP:
        turns = [(2, k) for k in range(_STEPS)]
    elif g12 < _GAP:
        turns = [(0, k) for k in range(_STEPS)]
    out = list(base)
    for ax, k in turns:
        turn = vb @ _about(ax, 2.0 * math.pi * k / _STEPS) @ vb.T  # turn in B's frame
        out.extend(turn @ r for r in base)
    return out


class _Surface:
    """Dense area-uniform samples of a mesh with their faces: a nearest-point oracle without an
    R-tree. The exact distance to the mesh is taken over the faces of the ``k`` samples nearest
    to the query, which contain the closest face unless it is a sliver too small to be sampled."""

    def __init__(self, mesh: trimesh.Trimesh, count: int, seed: int):
        points, face = trimesh.sample.sample_surface(mesh, count, seed=seed)
        self.points = np.asarray(points)  # (M, 3)
        self.face = np.asarray(face)  # (M,)
        self.normals = np.asarray(mesh.face_normals[self.face])  # (M, 3)
        self.triangles = np.asarray(mesh.triangles)  # (F, 3, 3)
        self.tree = trimesh.PointCloud(self.points).kdtree

    def nearest_sample(self, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Closest sample points (N, 3) and their normals (N, 3)."""
        _, ix = self.tree.query(p, 1)
        return self.points[ix], self.normals[ix]

    def distance(self, p: np.ndarray, k: int = 8) -> np.ndarray:
        """Distance (N,) from each point to the mesh surface."""
        _, ix = self.tree.query(p, k)  # (N, k)
        faces = self.face[ix]  # (N, k)
        rep = np.repeat(p, k, axis=0)  # (N * k, 3)
        closest = trimesh.triangles.closest_point(self.triangles[faces.ravel()], rep)
        return np.linalg.norm(closest - rep, axis=1).reshape(-1, k).min(1)  # (N,)


def _plane_step(p: np.ndarray, q: np.ndarray, n: np.ndarray) -> np.ndarray:
    """One linearised point-to-plane step: the small proper motion (4, 4) minimising
    sum(((R p + t) - q) . n)^2."""
    a = np.concatenate([np.cross(p, n), n], axis=1)  # (N, 6)
    b = ((q - p) * n).sum(1)  # (N,)
    x, *_ = np.linalg.lstsq(a, b, rcond=None)
    w, t = x[:3], x[3:]
    angle = float(np.linalg.norm(w))
    rot = np.eye(3)
    if angle > 0:
        k = w / angle
        kx = np.array([[0.0, -k[2], k[1]], [k[2], 0.0, -k[0]], [-k[1], k[0], 0.0]])
        rot = np.eye(3) + math.sin(angle) * kx + (1.0 - math.cos(angle)) * kx @ kx  # Rodrigues: proper
    step = np.eye(4)
    step[:3, :3], step[:3, 3] = rot, t
    return step


def _icp_plane(moving: np.ndarray, target: _Surface, matrix: np.ndarray, iterations: int = 30) -> np.ndarray:
    """Point-to-plane ICP from ``matrix``: converges below the sample spacing, unlike point-to-point."""
    for _ in range(iterations):
        p = trimesh.transform_points(moving, matrix)
        q, n = target.nearest_sample(p)
        step = _plane_step(p, q, n)
        matrix = step @ matrix
        if np.abs(step - np.eye(4)).max() < 1e-8:
            break
    return matrix


def align_rigid(mesh_a: trimesh.Trimesh, mesh_b: trimesh.Trimesh, samples: int = 2000, seed: int = 0) -> Alignment:
    """Find the proper rigid motion (no reflection, no scaling) that best lays ``mesh_a`` on ``mesh_b``.

    Parameters
    ----------
    mesh_a, mesh_b : meshes in any pose
    samples : surface points per mesh for the final score (the distance oracle uses >= 32x as many)
    seed : seed of the surface sampling

    Returns
    -------
    Alignment with the transform and the relative residual
    """
    mesh_a, mesh_b = _check_mesh(mesh_a, "mesh_a"), _check_mesh(mesh_b, "mesh_b")
    if samples < 200:
        raise InputError(f"samples should be >= 200, got {samples} instead.")
    pa, _ = _samples(mesh_a, samples, seed)
    pb, _ = _samples(mesh_b, samples, seed + 1)
    dense = max(32 * samples, _DENSE)
    surf_a, surf_b = _Surface(mesh_a, dense, seed + 2), _Surface(mesh_b, dense, seed + 3)
    ca, va, la = _frame(mesh_a)
    cb, vb, lb = _frame(mesh_b)
    scale = float(np.sqrt(la.sum()))  # RMS distance of the surface from its centroid

    coarse = pa[:: max(1, samples // 300)] - ca
    scored = []
    for rot in _candidates(va, vb, (la + lb) / 2.0):
        dist, _ = surf_b.tree.query(coarse @ rot.T + cb, 1)
        scored.append((float(dist.mean()), rot))
    scored.sort(key=lambda x: x[0])

    best = None
    moving = pa[:: max(1, samples // 800)]
    for _, rot in scored[:_KEEP]:
        init = np.eye(4)
        init[:3, :3] = rot
        init[:3, 3] = cb - rot @ ca
        # point-to-point first (wide basin), then point-to-plane (accurate)
        matrix, _, _ = icp(
            moving, surf_b.points[::4], initial=init, threshold=1e-6, max_iterations=10, reflection=False, scale=False
        )
        matrix = _icp_plane(moving, surf_b, matrix, iterations=10)
        score = float(surf_b.distance(trimesh.transform_points(moving, matrix)).mean())
        if best is None or score < best[0]:
            best = (score, matrix)
    matrix = _icp_plane(pa, surf_b, best[1])
    there = float(surf_b.distance(trimesh.transform_points(pa, matrix)).mean())
    back = float(surf_a.distance(trimesh.transform_points(pb, np.linalg.inv(matrix))).mean())
    dist = max(there, back)
    assert np.linalg.det(matrix[:3, :3]) > 0, "alignment must be a proper rotation"
    return Alignment(matrix=matrix, residual=dist / scale, distance=dist)


def _invariants(mesh: trimesh.Trimesh) -> np.ndarray:
    """Area, |volume| and the principal moments of the surface: equal for rigid and mirror copies."""
    values = np.sort(np.linalg.eigvalsh(_surface_moments(mesh)[1]))
    return np.concatenate([[mesh.area, abs(mesh.volume)], values])


def _similar(a: np.ndarray, b: np.ndarray, tol: float) -> bool:
    return bool(np.all(np.abs(a - b) <= tol * np.maximum(np.abs(a), np.abs(b)) + 1e-12))


def is_rotation_of(
    mesh_a: trimesh.Trimesh, mesh_b: trimesh.Trimesh, samples: int = 2000, tol: float = DEFAULT_TOL, seed: int = 0
) -> bool:
    """True when ``mesh_b`` is ``mesh_a`` moved by a rotation and a translation (no reflection).

    Parameters
    ----------
    mesh_a, mesh_b : meshes in any pose
    samples : surface points per mesh
    tol : largest relative residual (mean surface distance / RMS radius) still called a match
    """
    mesh_a, mesh_b = _check_mesh(mesh_a, "mesh_a"), _check_mesh(mesh_b, "mesh_b")
    if not tol > 0:
        raise InputError(f"tol should be > 0, got {tol!r} instead.")
    if not _similar(_invariants(mesh_a), _invariants(mesh_b), 0.05):
        return False  # area, volume or moments differ: no rigid motion can match them
    return align_rigid(mesh_a, mesh_b, samples, seed).residual <= tol


def is_chiral(mesh: trimesh.Trimesh, samples: int = 2000, tol: float = DEFAULT_TOL, seed: int = 0) -> bool:
    """True when the mirror image of ``mesh`` is not a rotation of it (a handed part)."""
    return not is_rotation_of(mesh, mirror_mesh(_check_mesh(mesh, "mesh")), samples, tol, seed)


def find_mirror_twins(
    meshes: Mapping[str, trimesh.Trimesh | Sequence[trimesh.Trimesh]], samples: int = 2000, tol: float = DEFAULT_TOL
) -> dict[str, str]:
    """Map each class to the class holding its mirror images; every other class maps to itself.

    Parameters
    ----------
    meshes : class name -> one mesh, or a list of instance meshes; two classes are twins when
        the mirror image of an instance of one is a rotation of an instance of the other

    Returns
    -------
    twins : class name -> twin class name, symmetric. A handed class whose twin is not in
        ``meshes`` also maps to itself; :func:`is_chiral` tells it from an achiral class.
    """
    if not isinstance(meshes, Mapping) or not meshes:
        raise InputError(f"meshes should be a non-empty mapping of class name to meshes, got {type(meshes).__name__} instead.")
    groups = {}
    for name, value in meshes.items():
        items = [value] if isinstance(value, trimesh.Trimesh) else list(value)
        if not items:
            raise InputError(f"class {name!r} should have at least one mesh, got none instead.")
        groups[name] = [_check_mesh(m, f"meshes[{name!r}]") for m in items]
    inv = {n: [_invariants(m) for m in ms] for n, ms in groups.items()}
    names = list(groups)
    twins = {n: n for n in names}
    for i, a in enumerate(names):
        if twins[a] != a:
            continue
        for b in names[i + 1 :]:
            if twins[b] != b:
                continue
            # A match of an achiral part with another class only means the two classes hold the
            # same shape; twins must be handed, so a match is confirmed with is_chiral.
            if _any_mirror_match(groups[a], inv[a], groups[b], inv[b], samples, tol) and is_chiral(groups[a][0], samples, tol):
                twins[a], twins[b] = b, a
                break
    return twins


def _any_mirror_match(ma, ia, mb, ib, samples, tol) -> bool:
    for mesh_a, inv_a in zip(ma, ia):
        for mesh_b, inv_b in zip(mb, ib):
            if _similar(inv_a, inv_b, 0.02) and is_rotation_of(mirror_mesh(mesh_a), mesh_b, samples, tol):
                return True
    return False


# -- a catalog's twin map, checked against its geometry ---------------------------------------

_MESH_SUFFIXES = (".stl", ".obj", ".ply", ".off", ".glb")  # the mesh formats a catalog folder may hold (README)


@dataclass(frozen=True)
class TwinReport:
    """What the geometry says about the mirror twins of a set of classes.

    Attributes
    ----------
    twins : dict str -> str, the detected map (:func:`find_mirror_twins`): each class to the class
        holding its mirror images, or to itself
    achiral : tuple of str, classes whose mirror image is a rotation of them
    pairs : tuple of (str, str), detected mirror twins, in class order
    unpaired : tuple of str, handed classes whose mirror image is no class of the set
    declared : dict str -> str or None, the declared map compared against (completed
        symmetrically, every unlisted class its own twin), or None when there was none
    warnings : tuple of str, one line per class where the declared map and the geometry disagree
    """

    twins: dict[str, str]
    achiral: tuple[str, ...]
    pairs: tuple[tuple[str, str], ...]
    unpaired: tuple[str, ...]
    declared: dict[str, str] | None
    warnings: tuple[str, ...]

    @property
    def agrees(self) -> bool:
        """True when a declared map was given and the geometry confirms every entry of it."""
        return self.declared is not None and not self.warnings

    def summary(self) -> str:
        """A few lines for a log or a report."""
        lines = [
            f"mirror twins: {', '.join(f'{a} <-> {b}' for a, b in self.pairs) or 'none'}",
            f"achiral: {', '.join(self.achiral) or 'none'}",
            f"handed without a twin in the set: {', '.join(self.unpaired) or 'none'}",
        ]
        if self.declared is not None:
            lines.append("declared map: " + ("confirmed" if not self.warnings else f"{len(self.warnings)} disagreement(s)"))
        lines.extend(f"warning: {w}" for w in self.warnings)
        return "\n".join(lines)


def _load_mesh(path: Path) -> trimesh.Trimesh:
    if not path.is_file():
        raise MeshError(f"mesh file {path} should exist, got no such file instead.")
    try:
        mesh = trimesh.load(path, force="mesh")
    except Exception as exc:  # trimesh raises many types for a damaged file
        raise MeshError(f"mesh file {path} should be a readable mesh, got an error: {str(exc)[:120]}") from exc
    if not isinstance(mesh, trimesh.Trimesh) or len(mesh.faces) == 0:
        raise MeshError(f"mesh file {path} should hold triangles, got none instead.")
    return mesh


def _read_json(path: Path):
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise DataError(f"{path} should be readable JSON, got an error: {str(exc)[:120]}") from exc


def _read_folder(root: Path, instances: int | None) -> tuple[dict[str, list[trimesh.Trimesh]], dict[str, str] | None]:
    """Meshes per class and the declared twin map of a catalog folder (``catalog.json`` format 1,
    or one sub-folder per class with an optional ``twins.json``)."""
    if not root.is_dir():
        raise DataError(f"catalog folder {root} should exist, got no such folder instead.")
    take = slice(None) if instances is None else slice(0, instances)
    catalog = root / "catalog.json"
    if catalog.is_file():
        doc = _read_json(catalog)
        entries = doc.get("classes") if isinstance(doc, dict) else None
        if not isinstance(doc, dict) or doc.get("format") != 1 or not isinstance(entries, list):
            raise DataError(f"{catalog} should hold {{\"format\": 1, \"classes\": [...]}}, got something else instead.")
        meshes, declared = {}, {}
        for k, entry in enumerate(entries):
            ok = isinstance(entry, dict) and isinstance(entry.get("name"), str) and isinstance(entry.get("instances"), list)
            if not ok or not entry["instances"]:
                raise DataError(f"{catalog}: classes[{k}] should have a \"name\" and a non-empty \"instances\" list.")
            files = [item.get("file") if isinstance(item, dict) else None for item in entry["instances"]][take]
            if not all(isinstance(f, str) for f in files):
                raise DataError(f"{catalog}: class {entry['name']!r} should give a \"file\" for every instance.")
            meshes[entry["name"]] = [_load_mesh(root / f) for f in files]
            if "twin" in entry:
                declared[entry["name"]] = entry["twin"]
        return meshes, declared
    meshes = {}
    for folder in sorted(p for p in root.iterdir() if p.is_dir() and not p.name.startswith(".")):
        files = sorted(p for p in folder.iterdir() if p.suffix.lower() in _MESH_SUFFIXES)[take]
        if files:
            meshes[folder.name] = [_load_mesh(f) for f in files]
    if not meshes:
        raise DataError(f"catalog folder {root} should hold catalog.json or sub-folders of {'/'.join(_MESH_SUFFIXES)} meshes, got neither instead.")
    twins = root / "twins.json"
    return meshes, (_read_json(twins) if twins.is_file() else None)


def _complete(declared, names: list[str]) -> dict[str, str]:
    """A partial declared map made symmetric; every unlisted class is its own twin."""
    if not isinstance(declared, Mapping):
        raise InputError(f"declared should map class names to class names, got {type(declared).__name__} instead.")
    known = set(names)
    full = {n: n for n in names}
    given: dict[str, str] = {}
    for a, b in declared.items():
        for name in (a, b):
            if name not in known:
                raise InputError(f"declared twins should name classes of the set {sorted(known)}, got {name!r} instead.")
        for x, y in ((a, b), (b, a)):
            if given.get(x, y) != y:
                raise InputError(f"declared twins should pair each class with one class, got {x!r} paired with both {given[x]!r} and {y!r} instead.")
            given[x] = y
    full.update(given)
    return full


def check_twins(
    source: str | os.PathLike | Mapping[str, trimesh.Trimesh | Sequence[trimesh.Trimesh]],
    declared: Mapping[str, str] | None = None,
    instances: int | None = None,
    samples: int = 2000,
    tol: float = DEFAULT_TOL,
) -> TwinReport:
    """Find the mirror twins of a set of classes from their geometry and check a declared map.

    Parameters
    ----------
    source : a catalog folder (``catalog.json`` format 1, or one sub-folder of meshes per class
        with an optional ``twins.json``), or a mapping class name -> mesh or list of meshes
    declared : class -> twin, possibly partial (``{"bracket_left": "bracket_right"}``; unlisted
        classes are their own twin). None with a folder compares against the folder's own map
        (``twin`` fields of ``catalog.json``, or ``twins.json``), if it has one.
    instances : meshes read per class from a folder (the first ones); None reads them all.
        Twins are found when any instance of one class is the mirror image of any of the other's.
    samples, tol : as in :func:`is_rotation_of`

    Returns
    -------
    TwinReport

    Raises
    ------
    DataError, MeshError : the folder, its JSON or a mesh cannot be read
    InputError : a bad mapping, or a declared map naming unknown classes or pairing a class twice
    """
    if instances is not None and (isinstance(instances, bool) or not isinstance(instances, int) or instances < 1):
        raise InputError(f"instances should be a positive int or None, got {instances!r} instead.")
    if isinstance(source, (str, os.PathLike)):
        meshes, own = _read_folder(Path(source), instances)
        if declared is None:
            declared = own
    else:
        meshes = source
    if not isinstance(meshes, Mapping) or not meshes:
        raise InputError(f"meshes should be a non-empty mapping of class name to meshes, got {type(meshes).__name__} instead.")
    full = None if declared is None else _complete(declared, list(meshes))  # before the slow part
    twins = find_mirror_twins(meshes, samples, tol)  # checks every mesh
    names = list(twins)
    first = {n: (m if isinstance(m, trimesh.Trimesh) else list(m)[0]) for n, m in meshes.items()}
    unpaired = tuple(n for n in names if twins[n] == n and is_chiral(first[n], samples, tol))
    achiral = tuple(n for n in names if twins[n] == n and n not in unpaired)
    pairs = tuple((a, twins[a]) for a in names if twins[a] != a and names.index(a) < names.index(twins[a]))
    warnings = []
    for n in names if full is not None else ():
        said, found = full[n], twins[n]
        if said == found:
            if n in unpaired:
                warnings.append(f"{n}: declared without a twin, but it is handed (its mirror image is not a rotation "
                                f"of it) and no class of the set is its mirror image.")
            continue
        what = ("achiral (its mirror image is a rotation of it)" if n in achiral
                else "handed with no twin in the set" if n in unpaired else f"the mirror twin of {found}")
        said_text = "its own twin (achiral)" if said == n else f"the twin of {said}"
        warnings.append(f"{n}: declared {said_text}, but the geometry finds it {what}.")
    return TwinReport(twins=twins, achiral=achiral, pairs=pairs, unpaired=unpaired, declared=full, warnings=tuple(warnings))
