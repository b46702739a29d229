"""Read a scan file as it arrives from a scanner, in bounded memory, into one :class:`ScanFile`.

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

import io
import itertools
import math
import os
import re
import zipfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from shapes.errors import InputError, MeshError
from shapes.seeding import rng
from shapes.data._read import MESH_SUFFIXES, MIN_SCAN_POINTS, read_mesh

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
MAX_FILE_POINTS = 50_000_000  # more points than any single scan of a hand-sized part needs
READ_POINTS = 200_000  # points kept while reading; clean-up and farthest-point thinning start here
CHUNK_ROWS = 262_144  # binary rows per chunk: 6 MB of float64 coordinates, so the temporaries stay near 50 MB
_TEXT_CHUNK = 100_000  # text lines per parse call
_HEADER_LINES = 100  # leading non-numeric lines accepted as a header
_DEGENERATE = 1e-5  # relative singular value below which a spread counts as flat (see check_spread)
_UNIT_TOL = 1e-2  # |n| within 1 +- this: the last three of six columns are normals


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


# ------------------------------------------------------------------------------------ chunks


class _Collector:
    """Keeps each row with probability ``cap / total`` and checks every row is finite."""

    def __init__(self, path: Path, total: int, cap: int, seed):
        self.path, self.total, self.cap = path, total, cap
        self.p = 1.0 if total <= cap else cap / total
        self.gen = rng(seed) if self.p < 1.0 else None
        self.points, self.normals, self.index = [], [], []
        self.seen = 0

    def add(self, points: np.ndarray, normals: np.ndarray | None = None, index: np.ndarray | None = None) -> None:
        points = np.asarray(points, dtype=np.float64)
        bad = ~np.isfinite(points).all(axis=1)
        if bad.any():
            rows = np.flatnonzero(bad)
            raise MeshError(f"scan file {self.path} has NaN or inf coordinates (first at row "
                            f"{self.seen + int(rows[0])}); expected finite coordinates.")
        if self.gen is not None:
            keep = self.gen.random(len(points)) < self.p
            points = points[keep]
            normals = None if normals is None else normals[keep]
            index = None if index is None else index[keep]
        self.seen += len(bad)
        self.points.append(points)
        if normals is not None:
            self.normals.append(np.asarray(normals, dtype=np.float64))
        if index is not None:
            self.index.append(index)

    def arrays(self) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
        points = np.concatenate(self.points) if self.points else np.zeros((0, 3))
        normals = np.concatenate(self.normals) if self.normals else None
        index = np.concatenate(self.index).astype(np.int32) if self.index else None
        return points, normals, index

    def note(self) -> list[str]:
        if self.p >= 1.0:
            return []
        return [f"{self.total:,} points thinned to {sum(len(p) for p in self.points):,} while reading "
                f"(each kept with probability {self.p:.3g})"]


def _too_many(path: Path, rows: int) -> None:
    if rows > MAX_FILE_POINTS:
        raise MeshError(f"scan file {path} holds {rows:,} points; at most {MAX_FILE_POINTS:,} are read "
                        "(thin or crop the scan first).")


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return (text.splitlines()[0] if text else type(exc).__name__)[:160]


# -------------------------------------------------------------------------------------- text

_COMMENT = ("#", "//", "%")
_DECIMAL_COMMA = re.compile(r"^[+-]?\d*,\d+([eE][+-]?\d+)?$")
_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$|^[+-]?(nan|inf|infinity)$", re.IGNORECASE)
_WHOLE = re.compile(r"^[+-]?\d+$")


def _dialect(line: str) -> tuple[str | None, bool]:
    """(delimiter, decimal comma) of a data line: ';', ',' or None (whitespace)."""
    s = line.strip().strip(";")
    if ";" in s:
        return ";", "," in s
    tokens = s.split()
    if len(tokens) > 1 and any("," in t for t in tokens) and all(_DECIMAL_COMMA.match(t) or _NUMBER.match(t)
                                                                 for t in tokens):
        return None, True  # -0,1072 -9,1757 3,2
    if "," in s:
        return ",", False
    return None, False


def _split(line: str, delimiter: str | None, comma: bool) -> list[str]:
    s = line.strip()
    if delimiter is not None:
        s = s.strip(delimiter + " \t")
    if comma:
        s = s.replace(",", ".")
    return [t.strip() for t in s.split(delimiter)] if delimiter else s.split()


def _numbers(tokens: list[str]) -> list[float] | None:
    try:
        return [float(t) for t in tokens]
    except ValueError:
        return None


def _text_lines(path: Path):
    """(line number, stripped line) of the non-blank, non-comment lines, decoded as UTF-8."""
    with open(path, encoding="utf-8", errors="strict", newline=None) as handle:
        lineno = 0
        try:
            for lineno, line in enumerate(handle, 1):
                line = line.strip()
                if line and not line.startswith(_COMMENT):
                    yield lineno, line
        except UnicodeDecodeError as exc:
            raise MeshError(f"scan file {path} is not a UTF-8 text file (undecodable byte after line {lineno}); "
                            "expected rows of x y z.") from None


def _count_lines(path: Path) -> int:
    count, last = 0, b"\n"
    with open(path, "rb") as handle:
        while block := handle.read(1 << 24):
            count += block.count(b"\n")
            last = block[-1:]
    return count + (last != b"\n")


def _read_text(path: Path, collector_for) -> tuple[np.ndarray, np.ndarray | None, list[str]]:
    with open(path, "rb") as handle:
        head = handle.read(1 << 16)
    if b"\x00" in head:
        raise MeshError(f"scan file {path} is binary (it holds NUL bytes), not text; expected rows of x y z.")
    lines = _text_lines(path)
    header, first, skipped = None, None, 0
    for lineno, line in lines:
        if _numbers(_split(line, *_dialect(line))) is not None:
            first = (lineno, line)
            break
        header, skipped = line, skipped + 1  # the last header line names the columns
        if skipped > _HEADER_LINES:
            raise MeshError(f"scan file {path}, line {lineno}: expected numbers, found '{line[:60]}'.")
    if first is None:
        if header is None:
            raise MeshError(f"scan file {path} has no data lines; expected rows of x y z.")
        raise MeshError(f"scan file {path} has a header but no data lines; expected rows of x y z.")
    delimiter, comma = _dialect(first[1])
    columns = len(_split(first[1], delimiter, comma))
    if columns < 3:
        raise MeshError(f"scan file {path}, line {first[0]}: expected at least 3 columns (x y z), found {columns}.")
    names = [t.strip().lower() for t in re.split(r"[,;\s]+", header.strip())] if header else []
    named = all(k in names for k in ("nx", "ny", "nz"))
    normal_cols = [names.index(k) for k in ("nx", "ny", "nz")] if named else ([3, 4, 5] if columns == 6 else None)
    if normal_cols is not None and max(normal_cols) >= columns:
        normal_cols = None
    collector = collector_for(_count_lines(path))
    whole, chunk = True, [first]
    for block in iter(lambda: list(itertools.islice(lines, _TEXT_CHUNK)), []):
        chunk.extend(block)
        whole = whole and _parse_text_chunk(path, chunk, delimiter, comma, columns, collector, normal_cols)
        chunk = []
    if chunk:
        whole = whole and _parse_text_chunk(path, chunk, delimiter, comma, columns, collector, normal_cols)
    if delimiter == "," and whole and 4 <= columns <= 6:
        raise MeshError(f"scan file {path} holds only whole numbers in {columns} comma-separated columns: decimal "
                        "commas (e.g. '-0,1072') with ',' also between columns cannot be read unambiguously; "
                        "separate the columns with ';' or tabs.")
    points, normals, _ = collector.arrays()
    notes = collector.note() + (["decimal commas read"] if comma else [])
    if normals is not None and not named:
        length = np.linalg.norm(normals, axis=1)
        if not (np.abs(length - 1.0) <= _UNIT_TOL).all():
            normals = None
            notes.append("columns 4-6 are not unit vectors (colours?): ignored")
    if normal_cols is None and columns > 3:
        notes.append(f"columns 4-{columns} ignored")
    return points, normals, notes


def _parse_text_chunk(path, chunk, delimiter, comma, columns, collector, normal_cols) -> bool:
    """Parse one block of (lineno, line); return whether every value was a whole number."""
    text = [line.replace(",", ".") if comma else line for _, line in chunk]
    if delimiter is not None:
        text = [t.strip().strip(delimiter + " \t") for t in text]
    try:
        with np.errstate(all="ignore"):
            table = np.loadtxt(text, delimiter=delimiter, dtype=np.float64, ndmin=2, comments=None)
    except ValueError:
        table = None
    if table is None or table.shape[1] != columns:
        for lineno, line in chunk:  # find and name the first bad line
            tokens = _split(line, delimiter, comma)
            values = _numbers(tokens)
            if values is None:
                raise MeshError(f"scan file {path}, line {lineno}: expected numbers, found '{line[:60]}'.")
            if len(values) < 3:
                raise MeshError(f"scan file {path}, line {lineno}: expected at least 3 columns (x y z), "
                                f"found {len(values)}.")
            if len(values) != columns:
                raise MeshError(f"scan file {path}, line {lineno}: expected {columns} columns like line "
                                f"{chunk[0][0]}, found {len(values)}.")
        raise MeshError(f"scan file {path}: lines {chunk[0][0]}-{chunk[-1][0]} could not be parsed as numbers.")
    normals = table[:, normal_cols] if normal_cols is not None else None
    collector.add(table[:, :3], normals)
    if delimiter != ",":
        return False
    return all(_WHOLE.match(tok) for _, line in chunk[:100] for tok in _split(line, delimiter, comma))


# --------------------------------------------------------------------------------------- PLY

_PLY_TYPES = {"char": "i1", "int8": "i1", "uchar": "u1", "uint8": "u1", "short": "i2", "int16": "i2",
              "ushort": "u2", "uint16": "u2", "int": "i4", "int32": "i4", "uint": "u4", "uint32": "u4",
              "float": "f4", "float32": "f4", "double": "f8", "float64": "f8"}


def _ply_header(path: Path) -> dict:
    with open(path, "rb") as handle:
        head = handle.read(1 << 16)
    end = re.search(rb"end_header[ \t]*\r?\n", head)
    if not head.startswith(b"ply") or end is None:
        what = "does not start with 'ply'" if not head.startswith(b"ply") else "has no 'end_header' line"
        raise MeshError(f"scan file {path} could not be parsed as PLY: it {what}.")
    try:
        lines = head[:end.start()].decode("ascii").splitlines()
    except UnicodeDecodeError:
        raise MeshError(f"scan file {path} could not be parsed as PLY: the header is not ASCII text.") from None
    fmt, elements, viewpoint = None, [], None
    for raw in lines[1:]:
        words = raw.split()
        if not words:
            continue
        if words[0] == "format" and len(words) >= 2:
            fmt = words[1]
        elif words[0] == "comment" and len(words) >= 2 and words[1].lower() == "viewpoint":
            values = _numbers(words[2:5]) if len(words) >= 5 else None
            if values is None or not np.isfinite(values).all():
                raise MeshError(f"scan file {path}: 'comment viewpoint' should give 3 numbers x y z, "
                                f"found '{raw.strip()[:60]}'.")
            viewpoint = np.array(values, dtype=np.float64)
        elif words[0] == "element" and len(words) == 3:
            try:
                count = int(words[2])
            except ValueError:
                raise MeshError(f"scan file {path} could not be parsed as PLY: bad element line '{raw}'.") from None
            elements.append({"name": words[1], "count": count, "props": []})
        elif words[0] == "property" and elements:
            if words[1] == "list" and len(words) == 5:
                elements[-1]["props"].append(("list", words[4]))
            elif len(words) == 3 and words[1] in _PLY_TYPES:
                elements[-1]["props"].append((_PLY_TYPES[words[1]], words[2]))
            else:
                raise MeshError(f"scan file {path} could not be parsed as PLY: bad property line '{raw}'.")
    if fmt not in ("ascii", "binary_little_endian", "binary_big_endian"):
        raise MeshError(f"scan file {path} could not be parsed as PLY: format '{fmt}' "
                        "(expected ascii, binary_little_endian or binary_big_endian).")
    return {"format": fmt, "elements": elements, "viewpoint": viewpoint, "size": end.end()}


def _read_ply(path: Path, header: dict, collector_for) -> tuple[np.ndarray, np.ndarray | None, list[str]]:
    elements = header["elements"]
    names = [e["name"] for e in elements]
    if "vertex" not in names:
        raise MeshError(f"scan file {path} is a PLY without a 'vertex' element; expected points x y z.")
    at = names.index("vertex")
    vertex = elements[at]
    props = [name for _, name in vertex["props"]]
    if not all(k in props for k in ("x", "y", "z")):
        raise MeshError(f"scan file {path}: the PLY vertex element has properties {props}; expected x y z.")
    if any(kind == "list" for kind, _ in vertex["props"]) or any(
            kind == "list" for e in elements[:at] for kind, _ in e["props"]):
        raise MeshError(f"scan file {path}: list properties on or before the PLY vertex element are not read; "
                        "expected a vertex element of scalar properties first.")
    has_normals = all(k in props for k in ("nx", "ny", "nz"))
    n = vertex["count"]
    _too_many(path, n)
    collector = collector_for(n)
    xyz = [props.index(k) for k in ("x", "y", "z")]
    nrm = [props.index(k) for k in ("nx", "ny", "nz")] if has_normals else None
    if header["format"] == "ascii":
        with open(path, "rb") as handle:
            handle.seek(header["size"])
            stream = io.TextIOWrapper(handle, encoding="ascii", errors="replace")
            rows = (line for line in stream if line.strip())
            for e in elements[:at]:
                for _ in itertools.islice(rows, e["count"]):
                    pass
            done = 0
            while done < n:
                block = list(itertools.islice(rows, min(_TEXT_CHUNK, n - done)))
                if len(block) < min(_TEXT_CHUNK, n - done):
                    raise MeshError(f"scan file {path}: the PLY header promises {n} vertices, "
                                    f"found {done + len(block)} rows.")
                try:
                    table = np.loadtxt(block, dtype=np.float64, ndmin=2, comments=None)
                except ValueError as exc:
                    raise MeshError(f"scan file {path}: PLY vertex rows {done}-{done + len(block) - 1} are not "
                                    f"{len(props)} numbers each ({_first_line(exc)}).") from None
                if table.shape[1] != len(props):
                    raise MeshError(f"scan file {path}: PLY vertex rows should have {len(props)} values, "
                                    f"found {table.shape[1]}.")
                collector.add(table[:, xyz], None if nrm is None else table[:, nrm])
                done += len(block)
    else:
        order = "<" if header["format"] == "binary_little_endian" else ">"
        dtype = np.dtype([(name, order + kind) for kind, name in vertex["props"]])
        skip = sum(e["count"] * np.dtype([(nm, order + k) for k, nm in e["props"]]).itemsize for e in elements[:at])
        start = header["size"] + skip
        needed = start + n * dtype.itemsize
        size = path.stat().st_size
        if size < needed:
            raise MeshError(f"scan file {path} is a truncated binary PLY: the header promises {n} vertices "
                            f"({n * dtype.itemsize} bytes) but {max(0, size - start)} bytes follow the header.")
        with open(path, "rb") as handle:
            handle.seek(start)
            done = 0
            while done < n:
                block = np.fromfile(handle, dtype=dtype, count=min(CHUNK_ROWS, n - done))
                pts = np.stack([block[k].astype(np.float64) for k in ("x", "y", "z")], axis=1)
                nr = np.stack([block[k].astype(np.float64) for k in ("nx", "ny", "nz")], axis=1) if nrm else None
                collector.add(pts, nr)
                done += len(block)
    points, normals, _ = collector.arrays()
    return points, normals, collector.note()


# ------------------------------------------------------------------------------- NPY and NPZ


def _npy_header(handle, path: Path, what: str):
    try:
        version = np.lib.format.read_magic(handle)
        read = np.lib.format.read_array_header_1_0 if version == (1, 0) else np.lib.format.read_array_header_2_0
        shape, fortran, dtype = read(handle)
    except Exception as exc:
        raise MeshError(f"scan file {path} could not be read as {what}: {_first_line(exc)}") from None
    return shape, fortran, dtype


def _check_array(path: Path, shape, dtype, name: str | None, widths=(3,)) -> None:
    if len(shape) != 2 or shape[1] not in widths:
        what = f"scan file {path}: '{name}' should be" if name else f"scan file {path} should hold"
        extra = " (or (N, 6): x y z nx ny nz)" if 6 in widths else ""
        raise MeshError(f"{what} an array of shape (N, 3), got {tuple(shape)} instead{extra}.")
    if dtype.hasobject or not np.issubdtype(dtype, np.number):
        raise MeshError(f"scan file {path} holds {dtype} values; expected numbers.")


def _stream_rows(handle, shape, dtype, rows: int):
    """Yield (rows, cols) blocks of a C-order array whose data starts at the handle's position."""
    cols = shape[1]
    done = 0
    while done < shape[0]:
        count = min(rows, shape[0] - done)
        data = handle.read(count * cols * dtype.itemsize)
        if len(data) < count * cols * dtype.itemsize:
            raise MeshError("short")
        yield np.frombuffer(data, dtype=dtype).reshape(count, cols)
        done += count


def _read_npy(path: Path, collector_for) -> tuple[np.ndarray, np.ndarray | None, list[str]]:
    with open(path, "rb") as handle:
        shape, fortran, dtype = _npy_header(handle, path, ".npy")
        _check_array(path, shape, dtype, None, widths=(3, 6))
        _too_many(path, shape[0])
        collector = collector_for(shape[0])
        if fortran:  # column-major: rare; read whole (still bounded by MAX_FILE_BYTES)
            array = np.load(path, allow_pickle=False)
            blocks = (array[i:i + CHUNK_ROWS] for i in range(0, len(array), CHUNK_ROWS))
        else:
            blocks = _stream_rows(handle, shape, dtype, CHUNK_ROWS)
        try:
            for block in blocks:
                collector.add(block[:, :3], block[:, 3:] if shape[1] == 6 else None)
        except MeshError as exc:
            if str(exc) != "short":
                raise
            raise MeshError(f"scan file {path} is a truncated .npy: its header promises {shape} values.") from None
    points, normals, _ = collector.arrays()
    return points, normals, collector.note()


def _read_npz(path: Path, collector_for) -> tuple[np.ndarray, np.ndarray | None, list[str]]:
    try:
        archive = zipfile.ZipFile(path)
    except Exception as exc:
        raise MeshError(f"scan file {path} could not be read as .npz: {_first_line(exc)}") from None
    with archive:
        members = {Path(n).stem: n for n in archive.namelist() if n.endswith(".npy")}
        if "points" not in members:
            raise MeshError(f"scan file {path} should hold an array 'points' (N, 3); found {sorted(members) or 'none'}.")
        try:
            with archive.open(members["points"]) as ph:
                pshape, pfortran, pdtype = _npy_header(ph, path, ".npz")
                _check_array(path, pshape, pdtype, "points")
                nh = archive.open(members["normals"]) if "normals" in members else None
                if nh is not None:
                    nshape, nfortran, ndtype = _npy_header(nh, path, ".npz")
                    _check_array(path, nshape, ndtype, "normals")
                    if nshape[0] != pshape[0]:
                        raise MeshError(f"scan file {path}: 'normals' should have one row per point ({pshape[0]}), "
                                        f"got {nshape[0]} instead.")
                _too_many(path, pshape[0])
                collector = collector_for(pshape[0])
                if pfortran or (nh is not None and nfortran):
                    with np.load(path, allow_pickle=False) as arrays:
                        collector.add(arrays["points"], arrays["normals"] if nh is not None else None)
                else:
                    pblocks = _stream_rows(ph, pshape, pdtype, CHUNK_ROWS)
                    nblocks = _stream_rows(nh, nshape, ndtype, CHUNK_ROWS) if nh is not None else None
                    for block in pblocks:
                        collector.add(block, next(nblocks) if nblocks is not None else None)
                if nh is not None:
                    nh.close()
        except MeshError as exc:
            if str(exc) != "short":
                raise
            raise MeshError(f"scan file {path} is a truncated .npz member.") from None
        except (zipfile.BadZipFile, OSError, EOFError, ValueError) as exc:
            raise MeshError(f"scan file {path} could not be read as .npz: {_first_line(exc)}") from None
    points, normals, _ = collector.arrays()
    return points, normals, collector.note()


# --------------------------------------------------------------------------------------- E57


def _quaternion_matrix(q: np.ndarray) -> np.ndarray:
    """Rotation matrix of the unit quaternion (w, x, y, z) (Hamilton convention, as E57 uses)."""
    w, x, y, z = q
    return np.array([
        [1 - 2 * (y * y + z * z), 2 * (x * y - w * z), 2 * (x * z + w * y)],
        [2 * (x * y + w * z), 1 - 2 * (x * x + z * z), 2 * (y * z - w * x)],
        [2 * (x * z - w * y), 2 * (y * z + w * x), 1 - 2 * (x * x + y * y)],
    ])


def _e57_pose(path: Path, node, index: int) -> tuple[np.ndarray, np.ndarray, bool]:
    if not node.isDefined("pose"):
        return np.eye(3), np.zeros(3), False
    pose = node["pose"]
    q = np.array([1.0, 0.0, 0.0, 0.0])
    t = np.zeros(3)
    if pose.isDefined("rotation"):
        q = np.array([pose["rotation"][k].value() for k in ("w", "x", "y", "z")], dtype=np.float64)
    if pose.isDefined("translation"):
        t = np.array([pose["translation"][k].value() for k in ("x", "y", "z")], dtype=np.float64)
    norm = float(np.linalg.norm(q))
    if not np.isfinite(norm) or norm < 1e-12 or not np.isfinite(t).all():
        raise MeshError(f"scan file {path}: scan {index} has an unusable pose (rotation {q.tolist()}, "
                        f"translation {t.tolist()}); expected a unit quaternion and a finite translation.")
    return _quaternion_matrix(q / norm), t, True


def _read_e57(path: Path, collector_for) -> tuple[np.ndarray, np.ndarray | None, list[str], np.ndarray | None]:
    try:
        import pye57
    except ImportError:  # a declared dependency; only a broken install lands here
        raise MeshError(f"scan file {path}: reading E57 needs the 'pye57' package (pip install pye57).") from None
    try:
        e57 = pye57.E57(str(path))
    except Exception as exc:
        raise MeshError(f"scan file {path} could not be read as E57: {_first_line(exc)}") from None
    try:
        count = e57.scan_count
        if count == 0:
            raise MeshError(f"scan file {path} is an E57 file with no scans (data3D is empty).")
        headers = [e57.get_header(i) for i in range(count)]
        total = sum(int(h.point_count) for h in headers)
        _too_many(path, total)
        collector = collector_for(total)
        sensors, posed = [], []
        for i, header in enumerate(headers):
            fields = header.point_fields
            if all(f in fields for f in ("cartesianX", "cartesianY", "cartesianZ")):
                names, spherical, invalid = ["cartesianX", "cartesianY", "cartesianZ"], False, "cartesianInvalidState"
            elif all(f in fields for f in ("sphericalRange", "sphericalAzimuth", "sphericalElevation")):
                names, spherical = ["sphericalRange", "sphericalAzimuth", "sphericalElevation"], True
                invalid = "sphericalInvalidState"
            else:
                raise MeshError(f"scan file {path}: scan {i} has point fields {fields}; expected cartesianX/Y/Z "
                                "or sphericalRange/Azimuth/Elevation.")
            if invalid in fields:
                names = names + [invalid]
            rotation, translation, has_pose = _e57_pose(path, header.node, i)
            sensors.append(translation)
            posed.append(has_pose or spherical)
            n = int(header.point_count)
            if n == 0:
                continue
            data, buffers = e57.make_buffers(names, min(CHUNK_ROWS, n))
            reader = header.points.reader(buffers)
            try:
                while (got := reader.read()) > 0:
                    a, b, c = (data[k][:got].astype(np.float64) for k in names[:3])
                    if spherical:  # ASTM E2807: azimuth from +x toward +y, elevation from the xy-plane
                        xyz = np.stack([a * np.cos(c) * np.cos(b), a * np.cos(c) * np.sin(b), a * np.sin(c)], axis=1)
                    else:
                        xyz = np.stack([a, b, c], axis=1)
                    if invalid in data:
                        xyz = xyz[data[invalid][:got] == 0]
                    collector.add(xyz @ rotation.T + translation, index=np.full(len(xyz), i, np.int32))
            finally:
                reader.close()
    except MeshError:
        raise
    except Exception as exc:
        raise MeshError(f"scan file {path} could not be read as E57: {_first_line(exc)}") from None
    finally:
        e57.close()
    points, _, index = collector.arrays()
    notes = collector.note() + ["E57 coordinates are metres (ASTM E2807); converted to mm"]
    if count > 1:
        notes.append(f"{count} scans merged into one frame by their poses")
    sensors_arr = np.array(sensors) if all(posed) else None
    if sensors_arr is None:
        notes.append("no scan pose: sensor positions unknown")
    return points, None, notes, (sensors_arr, index)


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

