"""Read a scan file as it arrives from a scanner, in bounded memory, into one :class:`ScanFile`.

This module picks the reader by the suffix, converts units and checks the cloud; each format's
reader lives beside it (``_scanfile_text``, ``_scanfile_ply``, ``_scanfile_arrays``, ``_scanfile_e57``),
and all of them keep rows through the collector of ``_scanfile_rows``.

Formats (chosen by the suffix, case-insensitive):

- ``.e57`` — ASTM E2807 (the E57 open standard for 3D imaging data), through the ``pye57``
  package. Coordinates in an E57 file are metres by the standard, so ``units`` does not apply to it.
  Every scan (``data3D`` entry) is turned into the file's frame by its pose, a unit rotation
  quaternion ``(w, x, y, z)`` and a translation: ``p_file = R(q) p_scan + t``, and all scans are
  merged into one cloud. The sensor of each scan sits at its local origin, so its position in the
  file's frame is ``t`` (:attr:`ScanFile.sensors`, and :attr:`ScanFile.scan_index` says which scan
  each point came from). Cartesian and spherical (range, azimuth, elevation) scans are read;
  points flagged invalid are dropped.
- ``.ply`` — ASCII or binary (either byte order), a ``vertex`` element with ``x y z`` and
  optionally ``nx ny nz``. A PLY with faces is a mesh (read by :func:`read_mesh`). The sensor
  position may be given by a header comment line ``comment viewpoint <x> <y> <z>`` (the file's
  units and frame); it becomes :attr:`ScanFile.viewpoint`.
- ``.xyz`` / ``.txt`` / ``.csv`` — rows of numbers separated by whitespace, commas or
  semicolons. 3 columns are ``x y z``; 6 columns are ``x y z nx ny nz`` when a header line names
  ``nx ny nz`` or, without such a header, when every row's last three values form a unit vector
  (otherwise, e.g. colours, they are ignored with a note); other counts keep the first three
  columns. Leading non-numeric lines are header lines; ``#``, ``//`` and ``%`` lines are comments.
  A decimal comma (``-0,1072;-9,1757;3,2``, or ``-0,1072 -9,1757 3,2``) is detected and read.
  Comma-separated whole numbers in 4 to 6 columns are refused: with decimal commas and ``,``
  between the columns the file cannot be read unambiguously.
- ``.npy`` — an ``(N, 3)`` array, or ``(N, 6)`` with normals. ``.npz`` — ``points`` ``(N, 3)``
  and optional ``normals`` ``(N, 3)``.
- Meshes (``.stl .obj .off .glb``, and ``.ply`` with faces) come back with :attr:`ScanFile.mesh`.

Bounded memory: a file larger than :data:`MAX_FILE_BYTES` (2 GiB) or of more than
:data:`MAX_FILE_POINTS` (50 million) points is refused with one line before it is read. Any
other file is read in chunks of :data:`CHUNK_ROWS` rows, and when it holds more than ``max_points``
(:data:`READ_POINTS`, 200 000, by default) each row is kept with probability
``max_points / rows`` (one seeded uniform draw per row), so the memory held is the chunk plus the
kept points, whatever the file's size. The thinned cloud is still far denser than the clouds the
networks take (about a thousand points), so nothing a classifier sees is lost.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from shapes.errors import InputError, MeshError
from shapes.data._read import MESH_SUFFIXES, MIN_SCAN_POINTS, read_mesh
from shapes.data._scanfile_arrays import _read_npy, _read_npz
from shapes.data._scanfile_e57 import _read_e57
from shapes.data._scanfile_ply import _ply_header, _read_ply
from shapes.data._scanfile_rows import CHUNK_ROWS, MAX_FILE_POINTS, _Collector
from shapes.data._scanfile_text import _read_text

__all__ = [
    "ScanFile",
    "read_points",
    "check_spread",
    "orient_toward",
    "UNITS",
    "POINT_FILE_SUFFIXES",
    "READ_SUFFIXES",
    "MAX_FILE_BYTES",
    "MAX_FILE_POINTS",
    "READ_POINTS",
    "CHUNK_ROWS",
]

# Millimetres per unit. 1 in = 25.4 mm exactly: NIST SP 811 (2008), Appendix B, and the 1959
# international yard and pound agreement; 1 m = 1000 mm by the SI prefix.
UNITS = {"mm": 1.0, "m": 1000.0, "in": 25.4}
POINT_FILE_SUFFIXES = (".csv", ".e57", ".npy", ".npz", ".ply", ".txt", ".xyz")
READ_SUFFIXES = tuple(sorted(set(POINT_FILE_SUFFIXES) | set(MESH_SUFFIXES)))

MAX_FILE_BYTES = 2 * 1024**3  # 2 GiB: about 70 M text rows or 170 M binary float32 points
READ_POINTS = 200_000  # points kept while reading; clean-up and farthest-point thinning start here
_DEGENERATE = 1e-5  # relative singular value below which a spread counts as flat (see check_spread)


@dataclass
class ScanFile:
    """What a scan file holds, in millimetres.

    Attributes
    ----------
    path : Path
    points : (N, 3) float64
        In mm, in the file's frame (for a mesh: its vertices).
    normals : (N, 3) float64 unit vectors, or None when the file has none (or they were unusable).
    viewpoint : (3,) float64 or None
        The sensor position in the same frame, when the file states one (a PLY ``comment viewpoint``,
        or an E57 file of one scan with a pose or spherical coordinates).
    sensors : (S, 3) float64 or None
        Each E57 scan's sensor position; ``points[i]`` was seen from ``sensors[scan_index[i]]``.
    scan_index : (N,) int32 or None
    mesh : trimesh.Trimesh or None
        The mesh, scaled to mm, when the file is a mesh.
    rows : int
        Points in the file before thinning.
    notes : list of str
        What was done on the way (unit conversion, thinning, ignored columns).
    """

    path: Path
    points: np.ndarray
    normals: np.ndarray | None = None
    viewpoint: np.ndarray | None = None
    sensors: np.ndarray | None = None
    scan_index: np.ndarray | None = None
    mesh: object | None = None
    rows: int = 0
    notes: list[str] = field(default_factory=list)

    @property
    def is_mesh(self) -> bool:
        return self.mesh is not None

    def subset(self, keep: np.ndarray) -> "ScanFile":
        """The same file restricted to the rows ``keep`` (indices or a boolean mask)."""
        return ScanFile(self.path, self.points[keep], None if self.normals is None else self.normals[keep],
                        self.viewpoint, self.sensors, None if self.scan_index is None else self.scan_index[keep],
                        self.mesh, self.rows, list(self.notes))

    def sensor_of_points(self) -> np.ndarray | None:
        """(N, 3) the sensor position each point was seen from, or None when the file gives none."""
        if self.sensors is not None and self.scan_index is not None:
            return self.sensors[self.scan_index]
        if self.viewpoint is not None:
            return np.broadcast_to(self.viewpoint, self.points.shape)
        return None


# --------------------------------------------------------------------------------- checks


def check_spread(points: np.ndarray, where: str, min_points: int = MIN_SCAN_POINTS) -> None:
    """Refuse a cloud that cannot be a scanned surface, with one line starting with ``where``.

    Refused: no points; a single point; all points identical; fewer than ``min_points`` points, or
    fewer than ``min_points`` distinct points, or fewer distinct points than a tenth of the rows
    (a stuck sensor repeating itself); all points on one line or on one plane, judged by the
    singular values ``s1 >= s2 >= s3`` of the centred cloud: ``s2 <= 1e-5 s1`` (a line) or
    ``s3 <= 1e-5 s1`` (a plane; a relative spread of 1e-5 is 1 µm over 10 cm, below any scanner's noise).

    Raises
    ------
    MeshError
    """
    n = len(points)
    if n == 0:
        raise MeshError(f"{where} has no points; expected a scanned surface.")
    if n == 1:
        raise MeshError(f"{where} holds a single point; expected a scanned surface of at least {min_points} points.")
    distinct = len(np.unique(points, axis=0))
    if distinct == 1:
        raise MeshError(f"{where}: all {n} points are identical; expected a scanned surface.")
    if n < min_points:
        raise MeshError(f"{where} has {n} points; need at least {min_points}.")
    if distinct < min_points or 10 * distinct < n:
        raise MeshError(f"{where} has only {distinct} distinct points among {n} rows; expected a scanned surface "
                        f"of at least {min_points} distinct points.")
    centred = points - points.mean(axis=0)
    s = np.linalg.svd(centred / max(float(np.abs(centred).max()), 1e-300), compute_uv=False)
    if s[1] <= _DEGENERATE * s[0]:
        raise MeshError(f"{where}: all {n} points lie on one line; expected a scanned surface.")
    if s[2] <= _DEGENERATE * s[0]:
        raise MeshError(f"{where}: all {n} points lie on one plane; expected a scanned part, not a flat sheet.")


def orient_toward(points: np.ndarray, normals: np.ndarray, sensors: np.ndarray) -> np.ndarray:
    """Flip each normal to face its sensor: ``n_i . (sensors_i - p_i) >= 0``.

    ``sensors`` is (3,) or (N, 3), in the frame of ``points``. Returns new (N, 3) normals.
    """
    facing = np.einsum("ij,ij->i", normals, np.broadcast_to(sensors, points.shape) - points)
    return np.where(facing[:, None] < 0.0, -normals, normals)


def _unit_or_none(normals: np.ndarray | None, notes: list[str]) -> np.ndarray | None:
    if normals is None:
        return None
    length = np.linalg.norm(normals, axis=1, keepdims=True)
    bad = ~(np.isfinite(length[:, 0]) & (length[:, 0] > 1e-12))
    if bad.any():
        notes.append(f"file normals ignored: {int(bad.sum())} of zero length or NaN (first at row "
                     f"{int(np.flatnonzero(bad)[0])})")
        return None
    return normals / length


# ------------------------------------------------------------------------------ read_points


def read_points(path: str | os.PathLike, units: str = "mm", *, max_points: int = READ_POINTS,
                min_points: int = MIN_SCAN_POINTS, seed=0) -> ScanFile:
    """Read one scan or mesh file into a :class:`ScanFile` in millimetres.

    See the module docstring for the formats, the E57 pose convention, the PLY viewpoint comment and
    the memory bounds.

    Parameters
    ----------
    path : str or PathLike
    units : {"mm", "m", "in"}
        The file's length unit (E57 is always metres). 1 in = 25.4 mm exactly (NIST SP 811).
    max_points : int
        Points kept while reading (default 200 000); larger files are thinned uniformly at random.
    min_points : int
        Fewest (distinct) points accepted by :func:`check_spread` (default 32).
    seed : None, int or numpy.random.Generator
        Drives the thinning while reading.

    Returns
    -------
    ScanFile

    Raises
    ------
    MeshError
        Missing, empty, too large, truncated or unparsable file; unsupported suffix; NaN/inf
        coordinates; a decimal-comma file that cannot be read unambiguously; a degenerate cloud
        (see :func:`check_spread`).
    InputError
        An unknown ``units`` or a bad ``max_points``.
    """
    if units not in UNITS:
        raise InputError(f"units should be one of {', '.join(UNITS)}, got {units!r} instead.")
    if isinstance(max_points, bool) or not isinstance(max_points, (int, np.integer)) or max_points < 1:
        raise InputError(f"max_points should be a positive integer, got {max_points!r} instead.")
    path = Path(path)
    if not path.exists():
        raise MeshError(f"scan file {path} not found.")
    if path.is_dir():
        raise MeshError(f"scan file {path} is a folder; expected a file.")
    suffix = path.suffix.lower()
    if suffix not in READ_SUFFIXES:
        raise MeshError(f"scan file {path} has unsupported suffix '{path.suffix or '(none)'}'; "
                        f"supported: {', '.join(READ_SUFFIXES)}.")
    size = path.stat().st_size
    if size == 0:
        raise MeshError(f"scan file {path} is empty (0 bytes).")
    if size > MAX_FILE_BYTES:
        raise MeshError(f"scan file {path} is {size / 1024**3:.1f} GiB; at most {MAX_FILE_BYTES / 1024**3:.0f} GiB "
                        "is read (thin or crop the scan first).")
    factor = UNITS["m"] if suffix == ".e57" else UNITS[units]
    notes = [] if factor == 1.0 or suffix == ".e57" else [f"units {units} converted to mm (x {factor:g})"]
    ply = _ply_header(path) if suffix == ".ply" else None
    is_mesh = suffix in MESH_SUFFIXES and suffix != ".ply" or (
        ply is not None and any(e["name"] == "face" and e["count"] > 0 for e in ply["elements"]))
    if is_mesh:
        mesh = read_mesh(path)
        if factor != 1.0:
            mesh.apply_scale(factor)
        return ScanFile(path, np.asarray(mesh.vertices, dtype=np.float64), mesh=mesh, rows=len(mesh.vertices),
                        notes=notes)

    made = []

    def collector_for(total: int) -> _Collector:
        made.append(_Collector(path, total, int(max_points), seed))
        return made[-1]

    viewpoint = sensors = index = None
    if suffix in (".xyz", ".txt", ".csv"):
        points, normals, more = _read_text(path, collector_for)
    elif suffix == ".npy":
        points, normals, more = _read_npy(path, collector_for)
    elif suffix == ".npz":
        points, normals, more = _read_npz(path, collector_for)
    elif suffix == ".ply":
        points, normals, more = _read_ply(path, ply, collector_for)
        viewpoint = ply["viewpoint"]
        if viewpoint is not None:
            more.append("sensor position from the PLY 'comment viewpoint'")
    else:  # .e57
        points, normals, more, (sensors, index) = _read_e57(path, collector_for)
        if sensors is not None and len(sensors) == 1:
            viewpoint = sensors[0]
    notes += more
    rows = made[-1].total if made else len(points)
    normals = _unit_or_none(normals, notes)
    points = points * factor
    viewpoint = None if viewpoint is None else viewpoint * factor
    sensors = None if sensors is None else sensors * factor
    check_spread(points, f"scan file {path}", min_points)
    return ScanFile(path, points, normals, viewpoint, sensors, index, None, rows, notes)
