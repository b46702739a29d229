"""Conversions between manifold3d solids and trimesh meshes, a canonical vertex/face order,
mirror images, and the closed-solid check every generated part passes."""

from __future__ import annotations

import manifold3d as mf
import numpy as np
import trimesh

from shapes.errors import InputError, MeshError

__all__ = ["to_trimesh", "from_arrays", "canonical", "mirror_mesh", "check_solid", "with_hand", "MIRROR"]

# The one mirror of the project: x -> -x, i.e. diag(-1, 1, 1).
MIRROR = np.diag([-1.0, 1.0, 1.0])


def from_arrays(vertices: np.ndarray, faces: np.ndarray) -> mf.Manifold:
    """Build a manifold3d solid from our own vertex/face arrays.

    Parameters
    ----------
    vertices : (V, 3) float
    faces : (F, 3) int, counter-clockwise seen from outside
    """
    mesh = mf.Mesh64(
        vert_properties=np.ascontiguousarray(vertices, dtype=np.float64),
        tri_verts=np.ascontiguousarray(faces, dtype=np.uint64),
    )
    solid = mf.Manifold(mesh)
    if solid.status() != mf.Error.NoError or solid.is_empty():
        # Our own sweep produced a mesh that is not an oriented 2-manifold: a generator bug.
        raise MeshError(f"swept mesh should be a closed oriented surface, got status {solid.status()} instead.")
    return solid


def canonical(vertices: np.ndarray, faces: np.ndarray) -> trimesh.Trimesh:
    """Return a mesh in canonical order, rounded to float32 (the precision of the files).

    Vertices are sorted lexicographically, each face is rolled so its smallest index comes
    first (winding kept) and faces are sorted, so the bytes on disk do not depend on the
    order in which a boolean engine happened to emit them.
    """
    vertices = np.asarray(vertices, dtype=np.float32).astype(np.float64)
    faces = np.asarray(faces, dtype=np.int64)
    order = np.lexsort((vertices[:, 2], vertices[:, 1], vertices[:, 0]))
    rank = np.empty_like(order)
    rank[order] = np.arange(len(order))
    vertices = vertices[order]
    faces = rank[faces]
    roll = np.argmin(faces, axis=1)
    idx = (roll[:, None] + np.arange(3)[None, :]) % 3
    faces = np.take_along_axis(faces, idx, axis=1)
    faces = faces[np.lexsort((faces[:, 2], faces[:, 1], faces[:, 0]))]
    used = np.zeros(len(vertices), dtype=bool)
    used[faces.ravel()] = True
    assert used.all(), "manifold output has unreferenced vertices"
    return trimesh.Trimesh(vertices=vertices, faces=faces, process=False)


def to_trimesh(solid: mf.Manifold) -> trimesh.Trimesh:
    """Convert a manifold3d solid into a canonical trimesh (shared vertices)."""
    if solid.status() != mf.Error.NoError:
        raise MeshError(f"boolean result should be a valid solid, got status {solid.status()} instead.")
    mesh = solid.to_mesh64()
    vertices = np.asarray(mesh.vert_properties, dtype=np.float64)[:, :3]
    faces = np.asarray(mesh.tri_verts, dtype=np.int64)
    return canonical(vertices, faces)


def mirror_mesh(mesh: trimesh.Trimesh) -> trimesh.Trimesh:
    """Return the mirror image of ``mesh`` through the plane x = 0.

    Vertex ``i`` of the result is ``diag(-1, 1, 1) @ v_i``; each face's winding is reversed
    so the normals still point outwards and the volume stays positive.
    """
    if not isinstance(mesh, trimesh.Trimesh):
        raise InputError(f"mesh should be a trimesh.Trimesh, got {type(mesh).__name__} instead.")
    vertices = np.asarray(mesh.vertices, dtype=np.float64) @ MIRROR.T
    faces = np.asarray(mesh.faces)[:, ::-1]
    return trimesh.Trimesh(vertices=vertices, faces=np.ascontiguousarray(faces), process=False)


def check_solid(mesh: trimesh.Trimesh, what: str) -> trimesh.Trimesh:
    """Raise MeshError unless ``mesh`` is one closed, consistently wound solid of positive volume."""
    problems = []
    if not mesh.is_watertight:
        problems.append("not watertight")
    if not mesh.is_winding_consistent:
        problems.append("inconsistent winding")
    if problems == [] and not mesh.volume > 0:
        problems.append(f"volume {mesh.volume:.4g} <= 0")
    if problems == [] and mesh.body_count != 1:
        problems.append(f"{mesh.body_count} separate bodies")
    # A file reader merges coincident vertices; coincident or zero-area pieces would then
    # break the solid (they come from exactly coincident faces in a boolean).
    v32 = np.asarray(mesh.vertices, dtype=np.float32)
    dup = len(v32) - len(np.unique(v32, axis=0))
    if dup:
        problems.append(f"{dup} coincident vertices")
    flat = int((mesh.area_faces <= 1e-12).sum())
    if flat:
        problems.append(f"{flat} zero-area faces")
    if problems:
        raise MeshError(f"{what} should be one closed solid with positive volume, got {', '.join(problems)} instead.")
    return mesh


def with_hand(mesh: trimesh.Trimesh, hand: str) -> trimesh.Trimesh:
    """Return the right-hand ``mesh`` as built, or its mirror image for ``hand="left"``."""
    assert hand in ("right", "left"), hand
    return mesh if hand == "right" else mirror_mesh(mesh)
