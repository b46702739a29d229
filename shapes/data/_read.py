"""Read CAD meshes and scan files, turning every way a file can be wrong into one clear line.

Loaders from trimesh raise whatever their parser trips over (``ValueError: setting an array
element with a sequence``); here each problem is checked or caught and re-raised as a
:class:`~shapes.errors.MeshError` that names the file and says what was expected and found.
"""

from __future__ import annotations

import io
import os
import re
import struct
from pathlib import Path

import numpy as np
import trimesh

from shapes.errors import InputError, MeshError
from shapes.data._sample import sample_surface

__all__ = [
    "MESH_SUFFIXES",
    "POINT_SUFFIXES",
    "SCAN_SUFFIXES",
    "MIN_SCAN_POINTS",
    "SCAN_MESH_POINTS",
    "read_mesh",
    "read_scan",
]

# Formats trimesh reads without extra packages; a GLB scene is flattened into one mesh.
MESH_SUFFIXES = (".stl", ".obj", ".ply", ".off", ".glb")
# Plain point files a scanner or a spreadsheet writes.
POINT_SUFFIXES = (".xyz", ".txt", ".csv", ".npy")
SCAN_SUFFIXES = tuple(sorted(set(MESH_SUFFIXES + POINT_SUFFIXES)))

# Fewer points than this carry too little shape to name a part (a 32-point cloud already
# struggles to show a hole); below it a scan is almost certainly a wrong file or a crop.
MIN_SCAN_POINTS = 32
# Points sampled from a mesh file given to read_scan: the default cloud size of the sampler.
SCAN_MESH_POINTS = 2048

_STL_HEADER = 84  # 80-byte header + uint32 triangle count
_STL_RECORD = 50  # normal (3 f4) + 3 vertices (9 f4) + uint16 attribute


def _supported(suffixes) -> str:
    return ", ".join(suffixes)


def _check_file(path: Path, suffixes, what: str) -> str:
    """Common checks before parsing; return the lower-case suffix."""
    if not path.exists():
        raise MeshError(f"{what} file {path} not found.")
    if path.is_dir():
        raise MeshError(f"{what} file {path} is a folder; expected a file.")
    suffix = path.suffix.lower()
    if suffix not in suffixes:
        raise MeshError(
            f"{what} file {path} has unsupported suffix '{path.suffix or '(none)'}'; "
            f"supported: {_supported(suffixes)}."
        )
    if path.stat().st_size == 0:
        raise MeshError(f"{what} file {path} is empty (0 bytes).")
    return suffix


def _stl_source(path: Path) -> io.BytesIO | None:
    """Check a binary STL's length against its triangle count; return trimmed bytes or None.

    Returns None for ASCII STL (trimesh parses it from the path). A binary file longer than
    its header promises (some exporters pad) is cut to the promised length; one that is
    shorter is truncated, which trimesh does not always notice.
    """
    data = path.read_bytes()
    size = len(data)
    expected = None
    if size >= _STL_HEADER:
        (count,) = struct.unpack("<I", data[80:84])
        expected = _STL_HEADER + _STL_RECORD * count
        if size == expected:
            return io.BytesIO(data)
    # ASCII STL begins with "solid"; binary headers sometimes do too, so the exact length
    # test above wins and only then is the text form considered.
    head = data[:1024].lstrip()
    if head[:5].lower() == b"solid" and (b"facet" in data[:4096] or b"endsolid" in data[-512:]):
        return None
    if expected is None:
        raise MeshError(
            f"mesh file {path} is a truncated binary STL: {size} bytes, "
            f"but the header alone needs {_STL_HEADER}."
        )
    if size < expected:
        raise MeshError(
            f"mesh file {path} is a truncated binary STL: header says {count} triangles "
            f"({expected} bytes) but the file has {size} bytes."
        )
    return io.BytesIO(data[:expected])


def _load(path: Path, suffix: str) -> trimesh.Trimesh:
    """Parse with trimesh, without processing (which would silently drop NaN vertices)."""
    source = _stl_source(path) if suffix == ".stl" else None
    try:
        if source is not None:
            loaded = trimesh.load(source, file_type="stl", force="mesh", process=False)
        else:
            loaded = trimesh.load(str(path), file_type=suffix[1:], force="mesh", process=False)
    except MeshError:
        raise
    except Exception as exc:  # trimesh raises many kinds; the user needs one line
        detail = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise MeshError(
            f"mesh file {path} could not be parsed as {suffix[1:].upper()}: {detail[:160]}"
        ) from exc
    if not isinstance(loaded, trimesh.Trimesh):
        raise MeshError(
            f"mesh file {path} held a {type(loaded).__name__}; expected a triangle mesh."
        )
    return loaded


def read_mesh(path: str | os.PathLike) -> trimesh.Trimesh:
    """Read a triangle mesh from STL (ASCII or binary), OBJ, PLY, OFF or GLB.

    A GLB scene is flattened into one mesh with each node's transform applied.

    Parameters
    ----------
    path : str or PathLike
        The mesh file; the suffix picks the format (case-insensitive).

    Returns
    -------
    mesh : trimesh.Trimesh
        Vertices merged, in the file's units (mm for the demo catalog).

    Raises
    ------
    MeshError
        Missing file, unsupported suffix, empty file, truncated binary STL, unparsable
        content, no faces, non-finite vertices, or zero surface area.
    """
    path = Path(path)
    suffix = _check_file(path, MESH_SUFFIXES, "mesh")
    mesh = _load(path, suffix)
    vertices = np.asarray(mesh.vertices)
    faces = np.asarray(mesh.faces)
    if len(faces) == 0:
        raise MeshError(
            f"mesh file {path} has no faces; expected a triangle mesh "
            "(a point cloud goes to read_scan)."
        )
    bad = ~np.isfinite(vertices).all(axis=1)
    if bad.any():
        raise MeshError(
            f"mesh file {path} has {int(bad.sum())} vertex(es) with NaN or inf coordinates "
            f"(first at index {int(np.flatnonzero(bad)[0])}); expected finite coordinates."
        )
    if faces.min() < 0 or faces.max() >= len(vertices):
        raise MeshError(
            f"mesh file {path} has faces indexing vertex {int(faces.max())} but only "
            f"{len(vertices)} vertices exist."
        )
    if not mesh.area > 0.0:
        raise MeshError(
            f"mesh file {path} has zero surface area (all {len(faces)} faces are degenerate)."
        )
    mesh.merge_vertices()
    return mesh


def _parse_table(path: Path) -> np.ndarray:
    """First three numeric columns of a text table; one header line and # comments allowed."""
    try:
        text = path.read_text(encoding="utf-8", errors="strict")
    except UnicodeDecodeError as exc:
        raise MeshError(f"scan file {path} is not a text file (byte {exc.start} is not UTF-8).") from exc
    lines = [(k + 1, ln.strip()) for k, ln in enumerate(text.splitlines())]
    lines = [(k, ln) for k, ln in lines if ln and not ln.startswith(("#", "//", "%"))]
    if not lines:
        raise MeshError(f"scan file {path} has no data lines; expected rows of x y z.")
    split = re.compile(r"[,;\s]+")

    def numbers(line: str) -> list[float] | None:
        try:
            return [float(tok) for tok in split.split(line.strip(",; \t"))]
        except ValueError:
            return None

    if numbers(lines[0][1]) is None:  # a header line such as "x,y,z"
        lines = lines[1:]
    if not lines:
        raise MeshError(f"scan file {path} has a header but no data lines; expected rows of x y z.")
    rows = []
    for lineno, line in lines:
        values = numbers(line)
        if values is None:
            raise MeshError(
                f"scan file {path}, line {lineno}: expected numbers, found '{line[:60]}'."
            )
        if len(values) < 3:
            raise MeshError(
                f"scan file {path}, line {lineno}: expected at least 3 columns (x y z), "
                f"found {len(values)}."
            )
        rows.append(values[:3])
    return np.asarray(rows, dtype=np.float64)  # (N, 3)


def _parse_npy(path: Path) -> np.ndarray:
    try:
        array = np.load(path, allow_pickle=False)
    except Exception as exc:
        raise MeshError(f"scan file {path} could not be read as .npy: {str(exc)[:160]}") from exc
    if array.ndim != 2 or array.shape[1] != 3:
        raise MeshError(
            f"scan file {path} should hold an array of shape (N, 3), got {array.shape} instead."
        )
    if not np.issubdtype(array.dtype, np.number):
        raise MeshError(f"scan file {path} holds {array.dtype} values; expected numbers.")
    return array.astype(np.float64)


def _parse_ply_points(path: Path) -> np.ndarray | None:
    """A PLY without faces is a point cloud; one with faces is a mesh and is sampled."""
    try:
        loaded = trimesh.load(str(path), file_type="ply", process=False)
    except Exception as exc:
        detail = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise MeshError(f"scan file {path} could not be parsed as PLY: {detail[:160]}") from exc
    if isinstance(loaded, trimesh.Trimesh) and len(loaded.faces) > 0:
        return None  # a mesh: the caller samples it through read_mesh
    vertices = getattr(loaded, "vertices", None)
    if vertices is None:
        raise MeshError(f"scan file {path} held a {type(loaded).__name__}; expected points.")
    return np.asarray(vertices, dtype=np.float64)


def read_scan(
    path: str | os.PathLike,
    *,
    mesh_points: int = SCAN_MESH_POINTS,
    min_points: int = MIN_SCAN_POINTS,
    seed=None,
) -> np.ndarray:
    """Read a scanned point cloud from a file a practitioner has.

    Formats: ``.xyz``/``.txt``/``.csv`` (the first three numeric columns; one header line and
    ``#`` comment lines are skipped; separators: spaces, tabs, commas, semicolons), ``.npy``
    (an ``(N, 3)`` array), ``.ply`` without faces (its vertices), and any mesh file (STL,
    OBJ, OFF, GLB, or PLY with faces), whose surface is sampled with ``mesh_points``
    area-weighted points by :func:`sample_surface` — a mesh's vertices alone are spread by
    the tessellation, not by the surface, so they are no stand-in for a scan.

    Parameters
    ----------
    path : str or PathLike
    mesh_points : int
        Points sampled from a mesh file (default 2048, the sampler's usual cloud size).
    min_points : int
        Fewest points accepted (default 32).
    seed : None, int or numpy.random.Generator
        Only used to sample mesh files.

    Returns
    -------
    points : (N, 3) float64

    Raises
    ------
    MeshError
        Missing, empty or unparsable file, wrong number of columns, NaN/inf coordinates,
        fewer than ``min_points`` points.
    """
    path = Path(path)
    suffix = _check_file(path, SCAN_SUFFIXES, "scan")
    if int(mesh_points) < 1:
        raise InputError(f"mesh_points should be a positive integer, got {mesh_points} instead.")
    points = None
    if suffix in (".xyz", ".txt", ".csv"):
        points = _parse_table(path)
    elif suffix == ".npy":
        points = _parse_npy(path)
    elif suffix == ".ply":
        points = _parse_ply_points(path)
    if points is None:  # a mesh file
        points, _ = sample_surface(read_mesh(path), int(mesh_points), seed=seed)
    bad = ~np.isfinite(points).all(axis=1)
    if bad.any():
        raise MeshError(
            f"scan file {path} has {int(bad.sum())} point(s) with NaN or inf coordinates "
            f"(first at row {int(np.flatnonzero(bad)[0])}); expected finite coordinates."
        )
    if len(points) < min_points:
        raise MeshError(
            f"scan file {path} has {len(points)} points; need at least {min_points}."
        )
    return points
