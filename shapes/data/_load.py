"""Load point-cloud shards written by :func:`build_dataset` and serve them to torch.

The clouds of a split are memory maps of the dataset's files (:mod:`shapes.data._store`): loading a split
reads its headers and its per-cloud numbers, and :meth:`CloudSplit.batch` copies the rows of one batch.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import torch
from torch.utils.data import Dataset

from shapes.errors import DataError, InputError
from shapes.data._split import SPLITS
from shapes.data._store import FORMATS, META_FILE, OPTIONAL_KEYS, SHARD_KEYS, open_split, release

__all__ = ["read_meta", "load_split", "CloudSplit", "CloudDataset", "collate_clouds"]

_META_KEYS = ("format", "classes", "twins", "handed", "instances", "sampler", "counts")


def read_meta(out_dir: str | os.PathLike) -> dict:
    """Read and check ``meta.json`` of a dataset folder.

    Raises
    ------
    DataError
        Folder or file missing, invalid JSON, unknown format, missing keys.
    """
    path = Path(out_dir) / META_FILE
    if not path.is_file():
        raise DataError(f"dataset {out_dir} has no {META_FILE}; make one with `shapes sample`.")
    try:
        meta = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise DataError(f"dataset {out_dir}: {META_FILE} is unreadable: {exc}") from exc
    if not isinstance(meta, dict) or meta.get("format") not in FORMATS:
        found = meta.get("format") if isinstance(meta, dict) else type(meta).__name__
        raise DataError(f"dataset {out_dir}: {META_FILE} should have \"format\": 1 or 2, got {found!r} instead "
                        "(a dataset written by another version of shapes: sample it again with `shapes sample`).")
    missing = [k for k in _META_KEYS if k not in meta]
    if missing:
        raise DataError(f"dataset {out_dir}: {META_FILE} lacks keys {missing}.")
    return meta


@dataclass
class CloudSplit:
    """One split of a dataset, as numpy arrays.

    ``points`` and ``normals`` are read-only memory maps of the dataset's files (arrays in memory for a
    dataset of format 1): index them, or take a batch with :meth:`batch`, rather than converting them
    whole; ``numpy.array(split.points)`` makes a copy in memory when one is wanted.

    Attributes
    ----------
    points : (M, N, 3) float32
        Normalised clouds (centroid 0, unit RMS radius).
    normals : (M, N, 3) float32
    labels : (M,) int64
        Index into ``meta["classes"]``.
    instance : (M,) int32
        Index into ``meta["instances"]``.
    scale : (M,) float32
        RMS radius of each cloud before normalising, in catalog units.
    meta : dict
    split : str
    kind : (M,) int8
        0 for a full-surface cloud, 1 for a virtual scan (all 0 for shards written before the key).
    visible : (M,) float32
        Share of the part's surface area the cloud shows (1 for a full surface).
    """

    points: np.ndarray
    normals: np.ndarray
    labels: np.ndarray
    instance: np.ndarray
    scale: np.ndarray
    meta: dict
    split: str
    kind: np.ndarray | None = None
    visible: np.ndarray | None = None

    def __post_init__(self):
        m = len(self.labels)
        for key, (dtype, default) in OPTIONAL_KEYS.items():
            if getattr(self, key) is None:
                setattr(self, key, np.full(m, default, dtype=dtype))

    @property
    def classes(self) -> list[str]:
        return list(self.meta["classes"])

    def __len__(self) -> int:
        return len(self.labels)

    def batch(self, index) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(points (b, N, 3) float32, normals (b, N, 3) float32, labels (b,) int64)`` of the clouds at
        ``index`` (a sequence of ints, in its order): writable copies of those rows alone. The mapped pages
        they were copied from leave the process's resident memory again (:func:`release`), so a whole
        epoch of batches holds no more than one batch."""
        index = np.asarray(index, dtype=np.int64).reshape(-1)
        points = np.asarray(self.points[index], dtype=np.float32)
        release(self.points)
        normals = np.asarray(self.normals[index], dtype=np.float32)
        release(self.normals)
        return points, normals, np.asarray(self.labels[index], dtype=np.int64)


def load_split(out_dir: str | os.PathLike, split: str) -> CloudSplit:
    """Load ``train``, ``val`` or ``test`` of a dataset folder.

    The clouds are mapped read-only from ``<split>/points.npy`` and ``normals.npy``, not read (a dataset
    of format 1, one ``<split>.npz`` per split, is read whole).

    Raises
    ------
    DataError
        Unknown split, missing, truncated or damaged array files, arrays of inconsistent shapes.
    """
    meta = read_meta(out_dir)
    if split not in SPLITS:
        raise DataError(f"split should be one of {list(SPLITS)}, got {split!r} instead.")
    out_dir = Path(out_dir)
    arrays, extra, name = open_split(out_dir, split, meta["format"])
    # the numbers of one cloud each are small: in memory, so that indexing them costs no page faults
    arrays.update({k: np.array(arrays[k]) for k in ("labels", "instance", "scale")})
    extra = {k: np.array(v) for k, v in extra.items()}
    m = len(arrays["labels"])
    pts = arrays["points"]
    if pts.ndim != 3 or pts.shape[0] != m or pts.shape[2] != 3 or arrays["normals"].shape != pts.shape \
            or any(arrays[k].shape != (m,) for k in ("labels", "instance", "scale")):
        shapes = {k: v.shape for k, v in arrays.items()}
        raise DataError(f"dataset {out_dir}: {name} has inconsistent array shapes {shapes}.")
    if m and not (0 <= arrays["labels"].min() and arrays["labels"].max() < len(meta["classes"])):
        raise DataError(f"dataset {out_dir}: {name} has labels outside 0..{len(meta['classes']) - 1}.")
    if any(v.shape != (m,) for v in extra.values()):
        raise DataError(f"dataset {out_dir}: {name} has inconsistent array shapes "
                        f"{ {k: v.shape for k, v in extra.items()} } for {m} clouds.")
    return CloudSplit(meta=meta, split=split, **arrays, **extra)


class CloudDataset(Dataset):
    """A torch Dataset over a :class:`CloudSplit`.

    Items are ``(points (N, 3) float32 tensor, label int)``. An optional ``transform``
    maps the points tensor to a new one (e.g. a random pose) each time an item is read.
    """

    def __init__(self, split: CloudSplit, transform: Callable[[torch.Tensor], torch.Tensor] | None = None):
        self.split = split
        self.transform = transform

    def __len__(self) -> int:
        return len(self.split.labels)

    def __getitem__(self, index: int) -> tuple[torch.Tensor, int]:
        points = torch.from_numpy(np.array(self.split.points[index], dtype=np.float32))  # a copy of one cloud
        if self.transform is not None:
            points = self.transform(points)
        return points, int(self.split.labels[index])

    def __getitems__(self, indices) -> list[tuple[torch.Tensor, int]]:
        """A batch's items read in one gather from the memory map (a DataLoader calls this when it exists)."""
        points, _, labels = self.split.batch(indices)
        out = [(torch.from_numpy(p), int(label)) for p, label in zip(points, labels)]
        return out if self.transform is None else [(self.transform(p), label) for p, label in out]


def collate_clouds(batch) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """Stack clouds of possibly different sizes, padding with zeros.

    Parameters
    ----------
    batch : sequence of (points (N_i, 3) tensor or array, label int)

    Returns
    -------
    points : (B, N_max, 3) float32
    mask : (B, N_max) bool
        True at real points, False at padding.
    labels : (B,) int64
    """
    if len(batch) == 0:
        raise InputError("batch should hold at least one (points, label) pair, got an empty batch instead.")
    clouds = [torch.as_tensor(p, dtype=torch.float32) for p, _ in batch]
    for k, c in enumerate(clouds):
        if c.ndim != 2 or c.shape[1] != 3:
            raise InputError(f"batch[{k}] points should have shape (N, 3), got {tuple(c.shape)} instead.")
    n_max = max(c.shape[0] for c in clouds)
    points = torch.zeros(len(clouds), n_max, 3, dtype=torch.float32)
    mask = torch.zeros(len(clouds), n_max, dtype=torch.bool)
    for k, c in enumerate(clouds):
        points[k, : c.shape[0]] = c
        mask[k, : c.shape[0]] = True
    labels = torch.as_tensor([int(label) for _, label in batch], dtype=torch.long)
    return points, mask, labels
