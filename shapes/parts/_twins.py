"""Tell whether two meshes are one rigid motion apart, whether a part is chiral, and which
classes of a folder are mirror images of each other.

Two meshes are one rotation and translation apart when their relative residual after
:func:`align_rigid` (``_align``: principal-axes starts, point-to-point then point-to-plane ICP, no
reflection) is at most ``tol``; a part is chiral when its mirror image is not a rotation of it.

:func:`check_twins` runs the twin search over a catalog folder (or a mapping of meshes) and
compares the result with a declared map (``catalog.json`` twins or ``twins.json``).
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np
import trimesh

from shapes.errors import DataError, InputError, MeshError
from shapes.parts._align import _check_mesh, _surface_moments, align_rigid
from shapes.parts._mesh import mirror_mesh

__all__ = ["is_rotation_of", "is_chiral", "find_mirror_twins", "check_twins", "TwinReport", "DEFAULT_TOL"]

# Relative residual below which two surfaces count as the same up to a rotation. Measured on every
# instance of the demo catalog (mirror image in a random pose): achiral parts align to
# 3e-5..4e-4, the subtlest handed parts (long studs with short threads) stay >= 3e-3.
DEFAULT_TOL = 1.2e-3


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
