"""Normals estimated on single-view scans, as a bare x y z scan file gives them, against the mesh."""

import json

import numpy as np
import pytest

from conftest import DEMO, demo_file
from shapes.data import estimate_normals, farthest_point_subsample, normalise, read_mesh, scan_view


def _scan(mesh, seed, points=512):
    hits, faces_normals = scan_view(mesh, 4 * points, seed=seed)  # the normals of the faces hit
    keep = farthest_point_subsample(hits, points, seed=seed)
    cloud, _, _ = normalise(hits[keep])
    return cloud, faces_normals[keep]


def test_single_view_orientation_agrees_with_the_faces_on_demo_scans():
    # reference: the face normals of a closed mesh point outward (trimesh winding), and a face a
    # ray hits first faces the sensor; the estimate must agree on at least 95% of the points of
    # single-view scans of the demo parts (measured here: 96.6% over 16 parts x 4 views; a view
    # into a bracket's concave corner comes out reversed)
    catalog = json.loads((DEMO / "catalog.json").read_text())
    shares = []
    for c in catalog["classes"]:
        mesh = read_mesh(DEMO / c["instances"][0]["file"])
        for seed in range(4):
            cloud, truth = _scan(mesh, seed)
            est, info = estimate_normals(cloud, k=16, orientation="single-view")
            assert info["orientation"] == "single-view"
            shares.append(float((np.einsum("ij,ij->i", est, truth) > 0).mean()))
    assert np.mean(shares) >= 0.95
    assert np.median(shares) >= 0.98


def test_single_view_beats_propagation_on_a_coil_spring():
    # a spring seen from the side shows the outside of the near coils and the inside of the far
    # ones through the gaps: "outward from the centroid" is wrong for part of it, facing the
    # sensor is right for all of it. At 512 points the wire is barely resolved (a 16-point
    # neighbourhood reaches the next coil), so neither is near 100%; measured here: single-view
    # 0.74-0.82 on average per spring, propagation 0.48-0.57
    view = [], []
    for file in sorted((DEMO / "spring_rh").glob("*.ply"))[:2]:
        mesh = read_mesh(file)
        for seed in range(3):
            cloud, truth = _scan(mesh, seed)
            for out, how in zip(view, ("single-view", "propagate")):
                est, _ = estimate_normals(cloud, k=16, orientation=how)
                out.append(float((np.einsum("ij,ij->i", est, truth) > 0).mean()))
    assert np.mean(view[0]) > np.mean(view[1]) + 0.15


def test_single_view_orientation_turns_and_reflects_with_the_cloud():
    mesh = read_mesh(demo_file("bolted_flange"))
    cloud, _ = _scan(mesh, 0)
    base, _ = estimate_normals(cloud, k=16, orientation="single-view")
    gen = np.random.default_rng(3)
    q, _ = np.linalg.qr(gen.standard_normal((3, 3)))
    for pose in (q * np.sign(np.linalg.det(q)), np.diag([-1.0, 1.0, 1.0]) @ q):  # a rotation, a reflection
        turned, _ = estimate_normals(cloud @ pose.T + 5.0, k=16, orientation="single-view")
        np.testing.assert_allclose(turned, base @ pose.T, atol=1e-8)  # n(R p + t) = R n(p)


def test_unknown_orientation_is_one_line():
    from shapes.errors import InputError

    with pytest.raises(InputError, match="orientation should be one of"):
        estimate_normals(np.random.default_rng(0).standard_normal((40, 3)), orientation="outward")
