"""Surface sampling, farthest-point subsampling, normalisation and the virtual scanner."""

import numpy as np
import pytest
import scipy.stats
import trimesh
from scipy.spatial.distance import pdist

from conftest import surface_distance
from shapes.data import (
    farthest_point_subsample,
    normalise,
    ray_backend,
    sample_surface,
    scan_view,
)
from shapes.errors import InputError, MeshError


@pytest.fixture
def slab():
    # a box with two faces much larger than the others: area-weighting matters
    return trimesh.creation.box(extents=(8.0, 4.0, 0.5))


# ---------------------------------------------------------------- sample_surface


def test_samples_lie_on_the_surface_with_face_normals(slab):
    points, normals = sample_surface(slab, 600, seed=1)
    assert points.shape == (600, 3) and normals.shape == (600, 3)
    dist, face = surface_distance(slab, points)
    scale = float(np.linalg.norm(slab.extents))
    assert dist.max() <= 1e-6 * scale  # reference: trimesh.triangles.closest_point
    np.testing.assert_allclose(np.linalg.norm(normals, axis=1), 1.0, atol=1e-12)
    np.testing.assert_allclose(normals, slab.face_normals[face], atol=1e-12)


def test_face_counts_follow_area(slab):
    points, _ = sample_surface(slab, 6000, seed=2)
    _, face = surface_distance(slab, points)
    counts = np.bincount(face, minlength=len(slab.faces))
    expected = slab.area_faces / slab.area * len(points)
    # reference: scipy.stats.chisquare, expected counts proportional to face area
    assert scipy.stats.chisquare(counts, expected).pvalue > 0.001
    # the same test rejects equal counts per face, so it has the power to see a wrong weighting
    flat = np.full(len(slab.faces), len(points) / len(slab.faces))
    assert scipy.stats.chisquare(counts, flat).pvalue < 1e-9


def test_uniform_inside_a_triangle():
    tri = np.array([[0.0, 0.0, 0.0], [3.0, 0.0, 0.0], [0.5, 2.0, 1.0]])
    mesh = trimesh.Trimesh(tri, [[0, 1, 2]], process=False)
    points, _ = sample_surface(mesh, 4000, seed=3)
    bary = trimesh.triangles.points_to_barycentric(np.repeat(tri[None], len(points), axis=0), points)
    assert bary.min() >= -1e-9
    # closed form: the points of a triangle whose k-th barycentric exceeds x fill a similar triangle scaled by
    # 1 - x, so for a uniform point P(b_k <= x) = 1 - (1 - x)^2, the Beta(1, 2) CDF (reference: scipy.stats.beta)
    for k in range(3):
        assert scipy.stats.kstest(bary[:, k], scipy.stats.beta(1, 2).cdf).pvalue > 0.001


def test_sphere_height_is_uniform():
    # source: Archimedes' hat-box theorem: on a sphere, z is uniform on [-r, r]
    sphere = trimesh.creation.icosphere(subdivisions=4, radius=2.0)
    points, _ = sample_surface(sphere, 4000, seed=4)
    z = points[:, 2] / np.linalg.norm(points, axis=1)
    assert scipy.stats.kstest(z, scipy.stats.uniform(-1, 2).cdf).pvalue > 0.001


def test_matches_trimesh_sampler_in_distribution():
    mesh = trimesh.creation.cylinder(radius=1.0, height=5.0, sections=32)
    ours, _ = sample_surface(mesh, 3000, seed=5)
    theirs, _ = trimesh.sample.sample_surface(mesh, 3000, seed=6)  # reference: trimesh.sample
    for axis in range(3):
        assert scipy.stats.ks_2samp(ours[:, axis], theirs[:, axis]).pvalue > 0.001


def test_sampling_seed_convention(slab):
    a, na = sample_surface(slab, 100, seed=7)
    b, nb = sample_surface(slab, 100, seed=7)
    c, _ = sample_surface(slab, 100, seed=8)
    np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(na, nb)
    assert not np.allclose(a, c)
    gen = np.random.default_rng(7)  # a Generator is used as given
    np.testing.assert_array_equal(sample_surface(slab, 100, seed=gen)[0], a)


@pytest.mark.parametrize("count", [0, -3, 2.5, True])
def test_sampling_rejects_bad_count(slab, count):
    with pytest.raises(InputError, match="count should be a positive integer"):
        sample_surface(slab, count)


# ---------------------------------------------------------------- farthest_point_subsample


def fps_reference(points, count, start):
    """Slow, obviously correct greedy farthest-point selection (ties: lowest index)."""
    chosen = [start]
    while len(chosen) < count:
        best, best_d = None, -1.0
        for i in range(len(points)):
            if i in chosen:
                continue
            d = min(float(np.sum((points[i] - points[j]) ** 2)) for j in chosen)
            if d > best_d:
                best, best_d = i, d
        chosen.append(best)
    return np.array(chosen)


def test_fps_matches_loop_reference():
    points = np.random.default_rng(0).normal(size=(60, 3))
    for start in (0, 17):
        np.testing.assert_array_equal(
            farthest_point_subsample(points, 20, start=start), fps_reference(points, 20, start)
        )


def test_fps_spreads_points_better_than_random():
    gen = np.random.default_rng(1)
    points = gen.random((2000, 3))
    picked = farthest_point_subsample(points, 100, seed=2)
    assert len(np.unique(picked)) == 100
    random_subset = gen.choice(2000, 100, replace=False)
    # reference: scipy.spatial.distance.pdist
    assert pdist(points[picked]).min() >= pdist(points[random_subset]).min()


def test_fps_unique_even_with_duplicate_points():
    points = np.repeat(np.eye(3), 4, axis=0)  # three distinct spots, four copies each
    picked = farthest_point_subsample(points, 12, start=0)
    assert sorted(picked.tolist()) == list(range(12))
    # the first three picks are the three distinct spots
    assert len({tuple(points[i]) for i in picked[:3]}) == 3


def test_fps_seed_and_bounds():
    points = np.random.default_rng(3).random((50, 3))
    np.testing.assert_array_equal(
        farthest_point_subsample(points, 10, seed=4), farthest_point_subsample(points, 10, seed=4)
    )
    with pytest.raises(InputError, match="at most the number of points"):
        farthest_point_subsample(points, 51)
    with pytest.raises(InputError, match=r"shape \(N, 3\)"):
        farthest_point_subsample(points[:, :2], 5)


# ---------------------------------------------------------------- normalise


def test_normalise_closed_form():
    # cube corners of side 2 centred at c: centroid c, RMS radius sqrt(3) (closed form)
    c = np.array([5.0, -2.0, 7.0])
    corners = np.array(np.meshgrid([-1, 1], [-1, 1], [-1, 1])).reshape(3, -1).T + c
    out, centroid, scale = normalise(corners)
    np.testing.assert_allclose(centroid, c)
    assert scale == pytest.approx(np.sqrt(3.0))
    np.testing.assert_allclose(out.mean(axis=0), 0.0, atol=1e-12)
    assert np.mean(np.sum(out**2, axis=1)) == pytest.approx(1.0)
    np.testing.assert_allclose(out * scale + centroid, corners)


def test_normalise_random_cloud():
    points = np.random.default_rng(5).normal(loc=3.0, scale=40.0, size=(500, 3))
    out, _, _ = normalise(points)
    np.testing.assert_allclose(out.mean(axis=0), 0.0, atol=1e-12)
    assert np.sqrt(np.mean(np.sum(out**2, axis=1))) == pytest.approx(1.0)


@pytest.mark.parametrize(
    "points, message",
    [
        (np.ones((10, 3)), "spread out"),
        (np.zeros((1, 3)), "at least 2 points"),
        (np.array([[0.0, 0.0, np.nan], [1.0, 0.0, 0.0]]), "finite"),
        (np.zeros((10, 2)), r"shape \(N, 3\)"),
    ],
)
def test_normalise_rejects_degenerate(points, message):
    with pytest.raises(InputError, match=message):
        normalise(points)


# ---------------------------------------------------------------- scan_view


def test_scanner_uses_embree():
    # from memory: embreex makes ray casting about 100x faster than trimesh's pure-Python fallback
    # (bench/bench_scanner.py measures the Embree path's rays per second, not the fallback)
    assert ray_backend(trimesh.creation.box()) == "embree"


def test_scan_points_on_surface_facing_the_camera():
    mesh = trimesh.creation.icosphere(subdivisions=2, radius=3.0)
    view = np.array([1.0, -2.0, 0.5])
    points, normals = scan_view(mesh, 300, view_dir=view, seed=0)
    assert points.shape == (300, 3) and normals.shape == (300, 3)
    dist, face = surface_distance(mesh, points)
    assert dist.max() <= 1e-5 * 3.0  # reference: trimesh.triangles.closest_point; float32 rays
    np.testing.assert_allclose(normals, mesh.face_normals[face], atol=1e-9)
    # convex mesh: every visible face points towards the camera
    assert (normals @ (view / np.linalg.norm(view)) <= 1e-9).all()


def test_scan_of_sphere_is_one_hemisphere():
    sphere = trimesh.creation.icosphere(subdivisions=4, radius=1.0)
    points, _ = scan_view(sphere, 1500, view_dir=[0, 0, -1], seed=1)  # camera above, looking down
    assert points[:, 2].min() > -0.01  # only the upper half is seen (facet sag < 0.01)
    # closed form: an orthographic grid is uniform over the projected disc, so r^2 = x^2 + y^2 is
    # uniform on [0, 1] (closed form: the area of a disc of radius r is proportional to r^2)
    r2 = np.sum(points[:, :2] ** 2, axis=1) / np.max(np.sum(sphere.vertices[:, :2] ** 2, axis=1))
    assert scipy.stats.kstest(r2, scipy.stats.uniform(0, 1).cdf).pvalue > 0.001
    # and the other side is what a camera below sees
    below, _ = scan_view(sphere, 500, view_dir=[0, 0, 1], seed=1)
    assert below[:, 2].max() < 0.01


def test_scan_is_partial_while_surface_sampling_is_not():
    sphere = trimesh.creation.icosphere(subdivisions=3)
    _, scan_n = scan_view(sphere, 500, seed=2)
    _, full_n = sample_surface(sphere, 500, seed=2)
    for normals, partial in ((scan_n, True), (full_n, False)):
        mean = normals.mean(axis=0)
        mean /= np.linalg.norm(mean) + 1e-12
        # a one-sided view keeps all normals within a hemisphere; a full sample does not
        assert bool((normals @ mean).min() > -0.05) is partial


def test_scan_seed_convention():
    mesh = trimesh.creation.cylinder(radius=1.0, height=3.0)
    a = scan_view(mesh, 200, seed=3)
    b = scan_view(mesh, 200, seed=3)
    c = scan_view(mesh, 200, seed=4)
    np.testing.assert_array_equal(a[0], b[0])
    np.testing.assert_array_equal(a[1], b[1])
    assert not np.allclose(a[0], c[0])
    # a fixed view with different seeds still samples different surface points
    d = scan_view(mesh, 200, view_dir=[0, 1, 0], seed=5)
    e = scan_view(mesh, 200, view_dir=[0, 1, 0], seed=6)
    assert not np.allclose(d[0], e[0])


def test_scan_depth_noise_along_ray():
    plate = trimesh.creation.box(extents=(10.0, 10.0, 0.2))
    view = np.array([0.0, 0.0, -1.0])
    clean, _ = scan_view(plate, 3000, view_dir=view, seed=7)
    noisy, _ = scan_view(plate, 3000, view_dir=view, seed=7, noise=0.02)
    shift = noisy - clean
    np.testing.assert_allclose(shift[:, :2], 0.0, atol=1e-12)  # only along the ray
    rms = np.sqrt(np.mean(np.sum((clean - clean.mean(axis=0)) ** 2, axis=1)))
    assert shift[:, 2].std() == pytest.approx(0.02 * rms, rel=0.1)


def test_scan_refines_grid_for_thin_parts():
    wire = trimesh.creation.cylinder(radius=0.05, height=10.0, sections=16)
    points, _ = scan_view(wire, 500, view_dir=[1, 0, 0], seed=8, resolution=16)
    assert points.shape == (500, 3)
    dist, _ = surface_distance(wire, points)
    assert dist.max() <= 1e-5 * 10.0


def test_scan_edge_on_sheet_hits_nothing():
    sheet = trimesh.Trimesh([[0, 0, 0], [1, 0, 0], [0, 1, 0]], [[0, 1, 2]], process=False)
    with pytest.raises(MeshError, match="hit nothing"):
        scan_view(sheet, 10, view_dir=[1, 0, 0], seed=9)


@pytest.mark.parametrize("kwargs, message", [
    ({"view_dir": [0, 0, 0]}, "view_dir"),
    ({"view_dir": [1, 0]}, "view_dir"),
    ({"noise": -0.1}, "noise"),
    ({"resolution": 0}, "resolution"),
])
def test_scan_rejects_bad_arguments(kwargs, message):
    with pytest.raises(InputError, match=message):
        scan_view(trimesh.creation.box(), 10, **kwargs)
