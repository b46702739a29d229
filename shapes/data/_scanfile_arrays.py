"""NumPy scan files: ``.npy`` ``(N, 3)`` or ``(N, 6)``, and ``.npz`` with ``points`` and optional
``normals``, streamed from their headers in chunks of rows."""

from __future__ import annotations

import zipfile
from pathlib import Path

import numpy as np

from shapes.errors import MeshError
from shapes.data._scanfile_rows import CHUNK_ROWS, _first_line, _too_many


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
