"""Binary PLY with shared vertices: float32 positions, one uchar-counted int32 triangle list.

Written by hand so the bytes depend only on the mesh (no timestamps, no tool banner), which is
what makes regenerating the demo catalog byte-identical. Any PLY reader (trimesh.load) reads it.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import trimesh

from shapes._atomic import atomic_path

__all__ = ["write_ply", "ply_bytes"]

_FACE = np.dtype([("n", "u1"), ("v", "<i4", (3,))])


def ply_bytes(mesh: trimesh.Trimesh) -> bytes:
    """Return the binary little-endian PLY encoding of ``mesh``."""
    vertices = np.ascontiguousarray(mesh.vertices, dtype="<f4")  # (V, 3)
    faces = np.empty(len(mesh.faces), dtype=_FACE)
    faces["n"] = 3
    faces["v"] = np.asarray(mesh.faces, dtype="<i4")  # (F, 3)
    header = (
        "ply\n"
        "format binary_little_endian 1.0\n"
        f"element vertex {len(vertices)}\n"
        "property float x\nproperty float y\nproperty float z\n"
        f"element face {len(faces)}\n"
        "property list uchar int vertex_indices\n"
        "end_header\n"
    ).encode("ascii")
    return header + vertices.tobytes() + faces.tobytes()


def write_ply(path: str | os.PathLike, mesh: trimesh.Trimesh) -> Path:
    """Write ``mesh`` to ``path`` as binary PLY, through a temporary file renamed on success."""
    with atomic_path(path) as tmp:
        tmp.write_bytes(ply_bytes(mesh))
    return Path(path)
