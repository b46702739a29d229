"""What the sensor of :func:`shapes.data.scan_part` makes of its rays: for one camera, the returns of
the part and the table, back faces dropped, mixed pixels along depth edges and dropout at grazing
incidence; and the share of the part's area some camera can measure. The cameras and the ray casting
are in ``_scan_rays``; the settings and the merging of views in ``_scan``.
"""

from __future__ import annotations

import math

import numpy as np

from shapes.data._sample import sample_surface
from shapes.data._scan_rays import _first_hits, _pixel_rays

SCAN_LABELS = ("surface", "support", "mixed", "outlier")
"""What each point of a :class:`ScanResult` is; ``labels`` holds indices into this tuple."""
_SURFACE, _SUPPORT, _MIXED, _OUTLIER = range(4)

# A pixel is on a depth edge when a 4-neighbour lies more than this many pixel footprints behind
# it: a surface would have to be steeper than atan(10) = 84.3 degrees to the line of sight to give
# such a step between neighbouring pixels, beyond the default grazing cut-off (common practice).
_EDGE_STEPS = 10.0


def _scan_one(mesh, camera, forward, resolution, settings, geometry, gen) -> dict:
    """Every return of one camera before sampling: points, normals, labels, faces, ranges, rays."""
    centre, radius, watertight, table_z = geometry
    half_tan = math.tan(math.radians(settings.field_of_view) / 2.0)
    rays = _pixel_rays(forward, resolution, half_tan, gen)
    n = len(rays)
    # only rays inside the bounding sphere's cone can hit the part
    reach = math.sqrt(max(1.0 - (radius / np.linalg.norm(centre - camera)) ** 2, 0.0))
    cone = np.flatnonzero(rays @ forward >= reach - 1e-9)
    face = np.full(n, -1, dtype=np.int64)
    depth = np.full(n, np.inf)
    face[cone], depth[cone] = _first_hits(mesh, camera, rays[cone])
    label = np.full(n, _SURFACE, dtype=np.int8)
    if table_z is not None:
        down = rays[:, 2] < 0
        t_table = np.full(n, np.inf)
        t_table[down] = (table_z - camera[2]) / rays[down, 2]
        spot = camera + t_table[:, None] * rays
        with np.errstate(invalid="ignore"):
            off = np.hypot(spot[:, 0] - centre[0], spot[:, 1] - centre[1])
        on_table = down & (off <= settings.support_extent * radius) & (t_table < depth)
        depth[on_table] = t_table[on_table]
        face[on_table] = -1
        label[on_table] = _SUPPORT

    normals = np.zeros((n, 3))
    got = np.isfinite(depth)
    surface = got & (label == _SURFACE)
    normals[surface] = np.asarray(mesh.face_normals, dtype=np.float64)[face[surface]]
    normals[got & (label == _SUPPORT)] = (0.0, 0.0, 1.0)
    facing = np.einsum("ij,ij->i", normals, rays)  # < 0 when the surface faces the camera
    returns = got.copy()
    if watertight:  # a closed part's back faces are hit only at silhouette round-off: no return
        returns &= ~(surface & (facing >= 0))

    # depth edges: a 4-neighbour more than _EDGE_STEPS pixel footprints behind (misses are inf)
    image = depth.reshape(resolution, resolution)
    pad = np.pad(image, 1, mode="edge")
    behind = np.maximum.reduce([pad[:-2, 1:-1], pad[2:, 1:-1], pad[1:-1, :-2], pad[1:-1, 2:]]).reshape(-1)
    footprint = depth * (2.0 * half_tan / resolution)
    with np.errstate(invalid="ignore"):
        edge = returns & (behind - depth > _EDGE_STEPS * footprint)
    index = np.flatnonzero(returns)
    draw_mixed, draw_where, draw_drop = gen.random(len(index)), gen.random(len(index)), gen.random(len(index))
    mixed = edge[index] & (draw_mixed < settings.mixed_pixels)
    background = np.where(np.isfinite(behind[index]), behind[index], depth[index] + radius)
    rng_out = depth[index].copy()
    rng_out[mixed] += draw_where[mixed] * (background[mixed] - rng_out[mixed])
    lab = label[index].copy()
    lab[mixed] = _MIXED
    nrm = normals[index].copy()
    nrm[mixed] = -rays[index[mixed]]
    fc = face[index].copy()
    fc[mixed] = -1
    # grazing dropout of the ordinary returns: cos(incidence) = |n . ray|
    incidence = np.degrees(np.arccos(np.clip(np.abs(facing[index]), 0.0, 1.0)))
    start, cutoff = settings.grazing_start, settings.grazing_cutoff
    if cutoff > start:
        p_drop = np.clip((incidence - start) / (cutoff - start), 0.0, 1.0)
        p_drop[incidence > cutoff] = 1.0
    else:
        p_drop = (incidence > cutoff).astype(np.float64)
    keep = mixed | (draw_drop >= p_drop)
    if table_z is not None and not settings.keep_support:
        keep &= lab != _SUPPORT
    ray = rays[index][keep]
    r = rng_out[keep]
    return {"points": camera + r[:, None] * ray, "normals": nrm[keep], "labels": lab[keep],
            "faces": fc[keep], "ranges": r, "rays": ray, "cast": len(cone)}


def _visible_share(mesh, cameras, settings, geometry, gen) -> float:
    """Share of the area some camera can measure, on points drawn uniformly over the area."""
    if settings.visibility_samples == 0:
        return float("nan")
    _, radius, watertight, _ = geometry
    points, normals = sample_surface(mesh, settings.visibility_samples, seed=gen)
    seen = np.zeros(len(points), dtype=bool)
    least = max(math.cos(math.radians(settings.grazing_cutoff)), 0.0)
    for camera in cameras:
        towards = camera - points
        far = np.linalg.norm(towards, axis=1)
        cos = np.einsum("ij,ij->i", normals, towards) / far
        if not watertight:
            cos = np.abs(cos)
        ask = np.flatnonzero(~seen & (cos > least))
        if len(ask) == 0:
            continue
        _, ranges = _first_hits(mesh, camera, -towards[ask] / far[ask, None])
        # the first hit is the point itself (a miss: the ray slipped past an edge at the point)
        seen[ask] = ranges >= far[ask] - 1e-5 * radius * settings.distance
    return float(seen.mean())
