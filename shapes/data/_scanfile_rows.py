"""What every format reader of a scan file shares: the limits of a read, and the collector that keeps
a file's rows in bounded memory (each row kept with probability ``max_points / rows``, every row
checked finite). The formats are read in ``_scanfile_text``, ``_scanfile_ply``, ``_scanfile_arrays``
and ``_scanfile_e57``; :func:`shapes.data.read_points` picks one by the suffix (``_scanfile``).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from shapes.errors import MeshError
from shapes.seeding import rng

MAX_FILE_POINTS = 50_000_000  # more points than any single scan of a hand-sized part needs
CHUNK_ROWS = 262_144  # binary rows per chunk: 6 MB of float64 coordinates, so the temporaries stay near 50 MB
_TEXT_CHUNK = 100_000  # text lines per parse call


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


def _numbers(tokens: list[str]) -> list[float] | None:
    try:
        return [float(t) for t in tokens]
    except ValueError:
        return None
