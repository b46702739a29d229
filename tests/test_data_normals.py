"""Normals of bare point clouds: local PCA direction against closed-form normals, MST orientation
(Hoppe et al. 1992), the viewpoint rule, pose and mirror equivariance, and bad input."""

import numpy as np
import pytest
import trimesh
from scipy.spatial.transform import Rotation

from conftest import sphere_points
from shapes.data import estimate_normals, sample_surface
from shapes.errors import InputError

RADIUS, HEIGHT = 1.0, 3.0


def angle_deg(normals, truth):
    """Unsigned angle in degrees between rows (the sign is the orientation's business)."""
    cos = np.abs(np.sum(normals * truth, axis=1)) / np.linalg.norm(truth, axis=1)
    return np.degrees(np.arccos(np.clip(cos, 0.0, 1.0)))


def sphere(n=4000, seed=0):
    p = sphere_points(n, RADIUS, seed)
    return p, p / RADIUS  # closed form: the outward normal of a sphere at p is p / r


def cylinder(n=6000, seed=0):
    """A closed cylinder (caps included) along z, centred at 0; also the points away from the cap edges."""
    mesh = trimesh.creation.cylinder(radius=RADIUS, height=HEIGHT, sections=256)
    p, _ = sample_surface(mesh, n, seed=seed)
    rho = np.linalg.norm(p[:, :2], axis=1)
    on_cap = np.abs(np.abs(p[:, 2]) - HEIGHT / 2) < 1e-9
    # closed form: the side's outward normal is (x, y, 0) / rho, a cap's is (0, 0, sign z)
    truth = np.where(on_cap[:, None], np.stack([0 * rho, 0 * rho, np.sign(p[:, 2])], 1),
                     np.stack([p[:, 0] / rho, p[:, 1] / rho, 0 * rho], 1))
    # the normal is undefined on the cap edges; a k = 16 neighbourhood here spans about 0.16 r
    edge = np.hypot(rho - RADIUS, np.abs(p[:, 2]) - HEIGHT / 2)
    return p, truth, edge > 0.3 * RADIUS


def plane(n=3000, seed=0):
    xy = np.random.default_rng(seed).uniform(-1, 1, size=(n, 2))
    p = np.column_stack([xy, np.zeros(n)])
    return p, np.tile([0.0, 0.0, 1.0], (n, 1))  # closed form: the plane z = 0 has normal e_z


def test_directions_on_clean_surfaces_are_within_two_degrees():
    # measured here: sphere (10k points) median 0.48 deg, 99th percentile 1.55; cylinder (12k,
    # away from the cap edges) 0.47 and 1.71; plane 0 (to round-off)
    p, truth = sphere(10000)
    err = angle_deg(estimate_normals(p, orientation="propagate")[0], truth)
    assert np.median(err) < 1.0 and np.percentile(err, 99) < 2.0
    p, truth, away = cylinder(12000)
    err = angle_deg(estimate_normals(p, orientation="propagate")[0], truth)[away]
    assert np.median(err) < 1.0 and np.percentile(err, 99) < 2.0
    p, truth = plane()
    err = angle_deg(estimate_normals(p, orientation="propagate")[0], truth)
    assert err.max() < 1e-6  # exactly planar: the smallest eigenvalue is 0


def test_directions_with_small_noise_stay_close():
    # measured here with noise 0.2% of the radius: medians 0.9-1.1 deg, 99th percentiles 2.7-3.2
    noise = 0.002 * RADIUS
    gen = np.random.default_rng(1)
    for p, truth, keep in ((*sphere(10000), slice(None)), cylinder(12000), (*plane(), slice(None))):
        err = angle_deg(estimate_normals(p + gen.normal(scale=noise, size=p.shape), orientation="propagate")[0], truth)[keep]
        assert np.median(err) < 1.5 and np.percentile(err, 99) < 4.0


def outward_share(normals, truth):
    return float(np.mean(np.sum(normals * truth, axis=1) > 0.0))


def test_mst_orientation_points_outward_on_closed_surfaces():
    # method: signs propagated over the MST of the kNN graph with weight 1 - |n_i . n_j|
    # (Hoppe et al. 1992, "Surface reconstruction from unorganized points", SIGGRAPH)
    p, truth = sphere()
    normals, info = estimate_normals(p, orientation="propagate")
    assert info == {"method": "pca", "k": 16, "orientation": "mst-propagation", "components": 1}
    assert outward_share(normals, truth) >= 0.99
    p, truth, _ = cylinder()
    assert outward_share(estimate_normals(p, orientation="propagate")[0], truth) >= 0.99
    box = trimesh.creation.box(extents=(1.0, 2.0, 3.0))
    p, truth = sample_surface(box, 6000, seed=2)  # the face normals, outward for a watertight box
    assert outward_share(estimate_normals(p, orientation="propagate")[0], truth) >= 0.99


def test_each_connected_component_is_turned_outward_on_its_own():
    a, truth_a = sphere(2000, seed=3)
    b, truth_b = sphere(2000, seed=4)
    p = np.vstack([a - [5.0, 0, 0], b + [5.0, 0, 0]])
    normals, info = estimate_normals(p, orientation="propagate")
    assert info["components"] == 2
    # far apart, each ball's outward side faces away from the pair's centroid on most points
    assert outward_share(normals, np.vstack([truth_a, truth_b])) >= 0.99


def test_a_viewpoint_turns_every_normal_toward_the_sensor():
    for p, view in ((plane()[0], [0.3, -0.2, 5.0]), (plane()[0], [0.0, 0.0, -5.0]), (sphere()[0], [4.0, 1.0, -2.0])):
        normals, info = estimate_normals(p, viewpoint=view)
        assert info["orientation"] == "viewpoint" and info["viewpoint"] == list(view)
        assert (np.sum(normals * (np.asarray(view) - p), axis=1) > 0).all()


def test_normals_turn_with_the_points_and_reflect_with_them():
    p, _, _ = cylinder(3000)
    base, _ = estimate_normals(p, orientation="propagate")
    rot = Rotation.random(random_state=7).as_matrix()
    turned, _ = estimate_normals(p @ rot.T + [3.0, -2.0, 10.0], orientation="propagate")
    np.testing.assert_allclose(turned, base @ rot.T, atol=1e-6)  # n(R p + t) = R n(p)
    flip = np.diag([-1.0, 1.0, 1.0])  # a mirror image: x -> -x
    mirrored, _ = estimate_normals(p @ flip, orientation="propagate")
    np.testing.assert_allclose(mirrored, base @ flip, atol=1e-6)
    np.testing.assert_allclose(np.linalg.norm(base, axis=1), 1.0, atol=1e-12)


@pytest.mark.parametrize("points,k,needle", [
    (np.zeros((10, 3)), 16, "more than k = 16"),
    (np.zeros((16, 3)), 16, "got 16 instead"),
    (np.vstack([np.random.default_rng(0).normal(size=(40, 3)), [[np.nan, 0, 0]]]), 16, "NaN or inf (first at row 40)"),
    (np.zeros((40, 2)), 16, "shape (N, 3)"),
    (np.random.default_rng(0).normal(size=(40, 3)), 2, "k should be an integer >= 3"),
    (np.random.default_rng(0).normal(size=(40, 3)), 4.5, "k should be an integer >= 3"),
])
def test_bad_input_raises_one_line_input_error(points, k, needle):
    with pytest.raises(InputError) as caught:
        estimate_normals(points, k=k)
    assert needle in str(caught.value) and "\n" not in str(caught.value)
