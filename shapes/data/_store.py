"""How a dataset folder holds its clouds on disk, written cloud by cloud and read back as memory maps.

Layout (format 2, what ``shapes sample`` writes)::

    out_dir/
      meta.json
      train/  val/  test/           one folder per split, each array a plain .npy file:
        points.npy    (M, N, 3) float32     normals.npy (M, N, 3) float32
        labels.npy    (M,) int64            instance.npy (M,) int32       scale.npy (M,) float32
        kind.npy      (M,) int8             visible.npy (M,) float32

The big arrays are written row by row as the clouds are drawn, so writing holds one cloud at a time,
and :func:`open_split` maps them read-only (``numpy.load(mmap_mode="r")``): loading
reads nothing but the headers, and a training step reads the pages of its batch only. Folders of
format 1 (``train.npz`` ... holding the same arrays) are still read, whole.
"""

from __future__ import annotations

import math
import mmap
from pathlib import Path

import numpy as np

from shapes.errors import DataError

__all__ = ["META_FILE", "SHARD_KEYS", "OPTIONAL_KEYS", "FORMAT", "FORMATS", "DTYPES", "SplitWriter", "open_split",
           "release"]

META_FILE = "meta.json"
SHARD_KEYS = ("points", "normals", "labels", "instance", "scale")
# Keys added later; shards written before them load with the defaults below.
OPTIONAL_KEYS = {"kind": (np.int8, 0), "visible": (np.float32, 1.0)}
DTYPES = {"points": np.float32, "normals": np.float32, "labels": np.int64, "instance": np.int32,
          "scale": np.float32, **{key: dtype for key, (dtype, _) in OPTIONAL_KEYS.items()}}
CLOUD_KEYS = ("points", "normals")  # (M, N, 3): mapped from disk; the others are one number per cloud
FORMAT = 2  # per-split folders of .npy arrays
FORMATS = (1, 2)  # 1: one .npz per split, read whole


class SplitWriter:
    """Writes one split into ``folder`` (made here), one cloud or block of clouds at a time.

    ``points.npy``/``normals.npy`` are made at their final shape ``(count, n, 3)`` (header first) and
    the rows are written into them in order as they come, with plain file writes: the process holds the
    block being added, never the split. The per-cloud numbers (a few bytes each) are kept and saved by
    :meth:`close`. The folder is meant to sit inside an :func:`shapes._atomic.atomic_dir`, which removes
    it whole when writing stops before :meth:`close`.
    """

    def __init__(self, folder: Path, count: int, n: int):
        self.folder, self.count, self.filled, self.shape = Path(folder), int(count), 0, (int(count), int(n), 3)
        self.folder.mkdir()
        self.files = {}
        for key in CLOUD_KEYS:
            path = self.folder / f"{key}.npy"
            with open(path, "wb") as handle:
                np.lib.format.write_array_header_1_0(
                    handle, {"descr": np.lib.format.dtype_to_descr(np.dtype(DTYPES[key])), "fortran_order": False,
                             "shape": self.shape})
            self.files[key] = open(path, "ab")
        self.numbers = {key: np.zeros(self.count, dtype=dtype) for key, dtype in DTYPES.items() if key not in CLOUD_KEYS}

    def add(self, **rows) -> None:
        """Append ``k`` clouds: every key of the layout, each with a leading axis of ``k`` (or one cloud
        without it: ``points (N, 3)`` and plain numbers)."""
        assert set(rows) == set(DTYPES), sorted(rows)
        single = np.ndim(rows["points"]) == 2
        k = 1 if single else len(rows["points"])
        assert self.filled + k <= self.count, (self.filled, k, self.count)
        for key, handle in self.files.items():
            block = np.ascontiguousarray(rows[key], dtype=DTYPES[key]).reshape((k,) + self.shape[1:])
            handle.write(block.tobytes())  # the rounding to float32 is numpy's cast, as .astype(np.float32)
        for key, array in self.numbers.items():
            array[self.filled:self.filled + k] = rows[key]
        self.filled += k

    def close(self) -> None:
        assert self.filled == self.count, (self.filled, self.count)
        for handle in self.files.values():
            handle.close()
        for key, array in self.numbers.items():
            np.save(self.folder / f"{key}.npy", array)


def release(array: np.ndarray) -> None:
    """Take the pages of a memory-mapped ``array`` out of this process's resident memory.

    The map is read-only and shared (``mmap_mode="r"``), so nothing is lost: the next read faults the
    pages in again, from the page cache while the kernel keeps them there. Without it every page a
    training epoch has read stays mapped and counts in the process's resident memory, up to the whole
    file (Linux ``madvise(2)``, ``MADV_DONTNEED``). Arrays in memory, and platforms without
    ``madvise``, are left as they are.
    """
    handle = getattr(array, "_mmap", None)  # numpy.memmap keeps its mmap.mmap here
    if isinstance(handle, mmap.mmap) and not handle.closed and hasattr(mmap, "MADV_DONTNEED"):
        handle.madvise(mmap.MADV_DONTNEED)


def _mapped(dataset: Path, path: Path) -> np.ndarray:
    """``path`` mapped read-only, after checking that the file holds all its header promises."""
    name = path.relative_to(dataset).as_posix()
    try:
        with open(path, "rb") as handle:
            version = np.lib.format.read_magic(handle)
            read = np.lib.format.read_array_header_1_0 if version == (1, 0) else np.lib.format.read_array_header_2_0
            shape, _, dtype = read(handle)
            offset = handle.tell()
    except Exception as exc:
        raise DataError(f"dataset {dataset}: {name} is not a readable .npy file ({str(exc).strip()[:120]}); "
                        "sample the dataset again with `shapes sample`.") from None
    if dtype.hasobject:
        raise DataError(f"dataset {dataset}: {name} holds Python objects; expected numbers.")
    want = offset + math.prod(shape) * dtype.itemsize
    size = path.stat().st_size
    if size != want:
        what = "truncated" if size < want else "longer than its header says"
        raise DataError(f"dataset {dataset}: {name} is {what} ({size:,} bytes; its header promises {tuple(shape)} "
                        f"{dtype} in {want:,}); sample the dataset again with `shapes sample`.")
    try:
        return np.load(path, mmap_mode="r", allow_pickle=False)
    except Exception as exc:
        raise DataError(f"dataset {dataset}: {name} is unreadable: {str(exc).strip()[:160]}") from None


def open_split(dataset: Path, split: str, format: int) -> tuple[dict, dict, str]:
    """The arrays of one split: ``(required, optional, name)``, the first two dicts of key -> array and
    ``name`` the file or folder they came from. Format 2 maps them read-only; format 1 reads the
    ``.npz`` whole."""
    if format == 1:
        path = dataset / f"{split}.npz"
        if not path.is_file():
            raise DataError(f"dataset {dataset} has no {path.name}.")
        try:
            with np.load(path, allow_pickle=False) as shard:
                missing = [k for k in SHARD_KEYS if k not in shard.files]
                if missing:
                    raise DataError(f"dataset {dataset}: {path.name} lacks arrays {missing}.")
                return ({k: shard[k] for k in SHARD_KEYS}, {k: shard[k] for k in OPTIONAL_KEYS if k in shard.files},
                        path.name)
        except DataError:
            raise
        except Exception as exc:
            raise DataError(f"dataset {dataset}: {path.name} is unreadable: {str(exc)[:160]}") from None
    folder = dataset / split
    if not folder.is_dir():
        raise DataError(f"dataset {dataset} has no {split}/ folder; sample it again with `shapes sample`.")
    missing = [k for k in SHARD_KEYS if not (folder / f"{k}.npy").is_file()]
    if missing:
        raise DataError(f"dataset {dataset}: {split}/ lacks arrays {missing}.")
    required = {k: _mapped(dataset, folder / f"{k}.npy") for k in SHARD_KEYS}
    optional = {k: _mapped(dataset, folder / f"{k}.npy") for k in OPTIONAL_KEYS if (folder / f"{k}.npy").is_file()}
    return required, optional, f"{split}/"
