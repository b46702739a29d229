"""PLY scan files, ASCII or binary (either byte order): the header (with its ``comment viewpoint``)
and the vertex element's ``x y z`` and optional ``nx ny nz``, read in chunks."""

from __future__ import annotations

import io
import itertools
import re
from pathlib import Path

import numpy as np

from shapes.errors import MeshError
from shapes.data._scanfile_rows import _TEXT_CHUNK, CHUNK_ROWS, _first_line, _numbers, _too_many

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
