"""The D2 shape distribution and the classifier over it: the sphere's closed form, invariance
under rotations, translations and mirror images (and what must change does), and a toy
classification with a save/load round trip."""

from __future__ import annotations

import json

import numpy as np
import pytest
import trimesh
from scipy.spatial.transform import Rotation
from scipy.stats import kstest
from sklearn.ensemble import RandomForestClassifier

from conftest import sphere_points, surface_points
from shapes.classic import D2_RANGE, D2Classifier, d2_distances, d2_features, d2_histogram, rms_radius
from shapes.errors import DataError, InputError, ShapesError


def posed(points: np.ndarray, seed: int) -> np.ndarray:
    """A Haar-random rotation (scipy) and a shift."""
    rot = Rotation.random(random_state=seed).as_matrix()  # reference: scipy Rotation.random
    return points @ rot.T + np.array([3.0, -1.5, 7.25])


def chiral_cloud(seed: int = 0) -> np.ndarray:
    """An irregular cloud with no symmetry at all (a random point set is chiral almost surely)."""
    return np.random.default_rng(seed).normal(size=(300, 3)) * np.array([3.0, 2.0, 1.0])


# -- the closed form ---------------------------------------------------------------------------


def test_sphere_distances_follow_sphere_line_picking():
    r = 2.5
    pts = sphere_points(4000, r, seed=1) + np.array([1.0, -2.0, 0.5])
    d = d2_distances(pts, pairs=20000, seed=3) * rms_radius(pts)  # back to millimetres
    # source: sphere line picking (Weisstein, MathWorld "Sphere Line Picking"): for two points
    # uniform on a sphere of radius r, p(d) = d / (2 r^2) on [0, 2r], so F(d) = d^2 / (4 r^2)
    cdf = lambda x: np.clip(x**2 / (4 * r * r), 0.0, 1.0)  # noqa: E731
    assert kstest(d, cdf).pvalue > 0.01  # reference: scipy.stats.kstest
    # both ways: the same test rejects points uniform in the solid ball and on a cube
    ball = sphere_points(4000, r, seed=2) * np.random.default_rng(5).uniform(size=(4000, 1)) ** (1 / 3)
    assert kstest(d2_distances(ball, pairs=20000, seed=3) * rms_radius(ball), cdf).pvalue < 1e-6
    cube = surface_points(trimesh.creation.box([2 * r] * 3), 4000, seed=4)
    assert kstest(d2_distances(cube, pairs=20000, seed=3) * rms_radius(cube), cdf).pvalue < 1e-6


def test_sphere_histogram_matches_closed_form_bins():
    pts = sphere_points(2000, 3.0, seed=7)
    hist = d2_histogram(pts, bins=64, pairs=None)  # every pair once
    edges = np.linspace(0.0, D2_RANGE, 65)
    # the RMS radius of a sphere about its centre is its radius, so in RMS radii F(d) = d^2 / 4
    # source: sphere line picking (Weisstein, MathWorld), as above
    expected = np.diff(np.clip(edges**2 / 4.0, 0.0, 1.0))
    assert hist.sum() == pytest.approx(1.0, abs=1e-12)
    np.testing.assert_allclose(hist, expected, atol=4e-3)
    assert hist[33:].sum() == 0.0  # nothing beyond a diameter (bin 32 may catch round-off at 2r)


# -- invariance, both ways ---------------------------------------------------------------------


def test_mirror_image_gives_bit_identical_histogram():
    pts = chiral_cloud(0)
    mirror = pts * np.array([-1.0, 1.0, 1.0])  # x -> -x: every coordinate difference only changes sign
    for pairs in (None, 5000):
        np.testing.assert_array_equal(d2_histogram(pts, pairs=pairs, seed=11), d2_histogram(mirror, pairs=pairs, seed=11))
    # a mirror image in a random pose (reflection, rotation, shift): equal bin for bin
    improper = posed(mirror, 12)
    np.testing.assert_array_equal(d2_histogram(pts, pairs=5000, seed=11), d2_histogram(improper, pairs=5000, seed=11))
    # what must change does: the mirror image is not a rotation of the cloud (the cloud is chiral),
    # checked with scipy's optimal rotation over the known correspondence (Kabsch)
    _, rssd = Rotation.align_vectors(mirror - mirror.mean(0), pts - pts.mean(0))  # reference: scipy Rotation.align_vectors
    assert rssd > 1.0
    # and another pair draw, or another shape, does change the histogram
    assert not np.array_equal(d2_histogram(pts, pairs=5000, seed=11), d2_histogram(pts, pairs=5000, seed=12))


def test_rotated_translated_copy_gives_identical_histogram():
    pts = chiral_cloud(1)
    moved = posed(pts, 3)
    np.testing.assert_allclose(d2_distances(moved, pairs=5000, seed=2), d2_distances(pts, pairs=5000, seed=2), rtol=1e-12)
    np.testing.assert_array_equal(d2_histogram(moved, pairs=5000, seed=2), d2_histogram(pts, pairs=5000, seed=2))
    # a uniform scale by 2 is exact in floating point, so the RMS normalisation cancels it exactly
    np.testing.assert_array_equal(d2_histogram(2.0 * pts, pairs=None), d2_histogram(pts, pairs=None))
    # what must change does: a non-uniform stretch is not a rigid motion and moves the histogram
    stretched = pts * np.array([3.0, 1.0, 1.0])  # axes 3:2:1 become 9:2:1
    assert np.abs(d2_histogram(stretched, pairs=None) - d2_histogram(pts, pairs=None)).sum() > 0.2


def test_same_seed_same_pairs_other_seed_other_pairs():
    pts = chiral_cloud(2)  # 300 points: 44850 distinct pairs
    np.testing.assert_array_equal(d2_distances(pts, pairs=1000, seed=4), d2_distances(pts, pairs=1000, seed=4))
    assert not np.array_equal(d2_distances(pts, pairs=1000, seed=4), d2_distances(pts, pairs=1000, seed=5))
    # no more distinct pairs than asked: every pair once, whatever the seed
    every = d2_distances(pts, pairs=44850, seed=4)
    assert len(every) == 44850
    np.testing.assert_array_equal(every, d2_distances(pts, pairs=None, seed=9))
    # reference: scipy.spatial.distance.pdist lists the pairs i < j in the same row-major order
    from scipy.spatial.distance import pdist
    np.testing.assert_allclose(every * rms_radius(pts), pdist(pts), rtol=1e-12)
    # per-cloud streams: a cloud's histogram does not depend on the clouds before it
    feats = d2_features([chiral_cloud(3), pts], pairs=1000, seed=8)
    alone = d2_features([chiral_cloud(4), pts], pairs=1000, seed=8)
    np.testing.assert_array_equal(feats[1], alone[1])


def test_cube_and_sphere_histograms_differ_clearly():
    cube = surface_points(trimesh.creation.box([1.0, 1.0, 1.0]), 2000, seed=1)
    ball = sphere_points(2000, seed=2)
    h_cube, h_ball = d2_histogram(cube, pairs=None), d2_histogram(ball, pairs=None)
    h_ball2 = d2_histogram(sphere_points(2000, seed=3), pairs=None)
    h_cube2 = d2_histogram(posed(surface_points(trimesh.creation.box([1.0, 1.0, 1.0]), 2000, seed=4), 5), pairs=None)
    between = np.abs(h_cube - h_ball).sum()
    within = max(np.abs(h_ball - h_ball2).sum(), np.abs(h_cube - h_cube2).sum())
    # from memory: Osada et al. 2002 plot D2 of simple solids; a sphere's rises linearly to its
    # diameter, a cube's turns down before its long diagonal. Measured here: L1 gap 0.20 between
    # the two, 0.005-0.011 between two samples of one shape.
    assert between > 0.15 and within < 0.02 and between > 10 * within
    # a cube's long diagonal is sqrt(3) / sqrt(5 / 12) = 2.68 RMS radii (surface RMS radius of a
    # unit cube, sqrt(5/12), by integration): it has pairs beyond the sphere's 2 RMS radii
    assert h_cube[33:].sum() > 0.03 and h_ball[33:].sum() == 0.0


def test_d2_rejects_bad_input():
    with pytest.raises(InputError, match=r"points should have shape \(N, 3\), got \(10, 2\)"):
        d2_histogram(np.zeros((10, 2)))
    with pytest.raises(InputError, match="at least 2 points, got 1"):
        d2_histogram(np.zeros((1, 3)))
    with pytest.raises(InputError, match="all at one location"):
        d2_histogram(np.ones((5, 3)))
    with pytest.raises(InputError, match="finite"):
        d2_histogram(np.array([[0.0, 0.0, np.nan], [1.0, 0.0, 0.0]]))
    with pytest.raises(InputError, match="bins should be a positive int, got 0"):
        d2_histogram(sphere_points(10), bins=0)
    with pytest.raises(InputError, match="pairs should be a positive int or None, got -3"):
        d2_histogram(sphere_points(10), pairs=-3)
    with pytest.raises(InputError, match=r"clouds should have shape \(M, N, 3\)"):
        d2_features(np.zeros((4, 3)))
    with pytest.raises(ShapesError, match=r"clouds\[1\] should have shape"):
        d2_features([sphere_points(10), np.zeros((5, 4))])


# -- the classifier ----------------------------------------------------------------------------


def toy_set(per_class: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Spheres, cubes and cylinders of random size and proportions, 256 surface points each, in
    random poses."""
    gen = np.random.default_rng(seed)
    clouds, labels = [], []
    for k in range(per_class):
        size = gen.uniform(0.5, 20.0)
        s = int(gen.integers(1 << 30))
        shapes = [
            sphere_points(256, size, seed=s),
            surface_points(trimesh.creation.box(size * gen.uniform(0.8, 1.25, 3)), 256, s),
            surface_points(trimesh.creation.cylinder(radius=size / 2, height=size * gen.uniform(1.8, 2.4), sections=48),
                           256, s),
        ]
        for label, pts in enumerate(shapes):
            clouds.append(posed(pts, s + label))
            labels.append(label)
    return np.stack(clouds), np.array(labels)


@pytest.fixture(scope="module")
def toy():
    x, y = toy_set(30, seed=0)
    xt, yt = toy_set(15, seed=1)
    return D2Classifier(trees=100, seed=0).fit(x, y), x, y, xt, yt


def test_classifier_learns_spheres_cubes_cylinders(toy):
    model, _, _, xt, yt = toy
    accuracy = float(np.mean(model.predict(xt) == yt))
    assert accuracy >= 0.95, f"toy accuracy {accuracy:.3f}"  # common practice: three distinct solids are an easy task
    proba = model.predict_proba(xt)
    assert proba.shape == (len(xt), 3)
    np.testing.assert_allclose(proba.sum(1), 1.0, atol=1e-12)
    np.testing.assert_array_equal(model.classes_, [0, 1, 2])


def test_classifier_matches_scikit_learn_forest(toy):
    model, x, y, xt, _ = toy
    p = model.params
    reference = RandomForestClassifier(n_estimators=p.trees, min_samples_leaf=p.min_samples_leaf, random_state=p.seed, n_jobs=1)
    reference.fit(model.features(x), y)
    # reference: sklearn.ensemble.RandomForestClassifier.predict_proba (mean of the trees' leaf shares)
    np.testing.assert_allclose(model.predict_proba(xt), reference.predict_proba(model.features(xt)), atol=1e-12)


def test_classifier_is_blind_to_mirror_images_and_poses(toy):
    model, _, _, xt, _ = toy
    proba = model.predict_proba(xt)
    mirrored = xt * np.array([-1.0, 1.0, 1.0])
    np.testing.assert_array_equal(model.predict_proba(mirrored), proba)
    moved = np.stack([posed(c, 40 + k) for k, c in enumerate(xt)])
    np.testing.assert_allclose(model.predict_proba(moved), proba, atol=0.02)  # bin boundaries may flip at round-off
    # both ways: other shapes do change the answer
    assert np.abs(model.predict_proba(xt[::-1]) - proba).max() > 0.5


def test_classifier_save_load_round_trip(toy, tmp_path):
    model, _, _, xt, _ = toy
    path = tmp_path / "d2.npz"
    model.save(path)
    with np.load(path, allow_pickle=False) as data:  # plain arrays: loads without pickle
        assert all(data[k].dtype != object for k in data.files)
        params = json.loads(str(data["params"]))
    assert params == {"format": 1, "bins": 64, "pairs": 2**17, "trees": 100, "min_samples_leaf": 1, "seed": 0}
    again = D2Classifier.load(path)
    np.testing.assert_array_equal(again.predict_proba(xt), model.predict_proba(xt))
    np.testing.assert_array_equal(again.classes_, model.classes_)
    arrays, params = model.state()
    np.testing.assert_array_equal(D2Classifier.from_state(arrays, params).predict(xt), model.predict(xt))
    assert [f.name for f in tmp_path.iterdir()] == ["d2.npz"]  # written atomically: no temporary left


def test_classifier_rejects_bad_input(toy, tmp_path):
    model, x, y, _, _ = toy
    with pytest.raises(InputError, match="should be fitted"):
        D2Classifier().predict(x[:2])
    with pytest.raises(InputError, match=r"labels should be 90 integers, got shape \(89,\)"):
        D2Classifier(trees=5).fit(x, y[:-1])
    with pytest.raises(InputError, match="at least 2 classes, got 1"):
        D2Classifier(trees=5).fit(x[:3], np.zeros(3, dtype=int))
    with pytest.raises(InputError, match="trees should be a positive int, got 0"):
        D2Classifier(trees=0)
    with pytest.raises(InputError, match=r"features should have shape \(M, 64\)"):
        model.predict_proba_features(np.zeros((2, 10)))
    bad = tmp_path / "bad.npz"
    bad.write_bytes(b"not a zip")
    with pytest.raises(DataError, match="unreadable"):
        D2Classifier.load(bad)
    arrays, params = model.state()
    with pytest.raises(DataError, match="format"):
        D2Classifier.from_state(arrays, {**params, "format": 2})
    arrays["value"] = arrays["value"][:, :2]
    with pytest.raises(DataError, match="consistent tree arrays for 3 classes"):
        D2Classifier.from_state(arrays, params)
