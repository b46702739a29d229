"""Clean-up of scans: statistical outlier removal, RANSAC support-plane removal, the largest DBSCAN cluster."""


import numpy as np
import pytest
import trimesh
from scipy.spatial.distance import cdist
from sklearn.cluster import DBSCAN

from conftest import demo_file, surface_points
from shapes.data import CleanSettings, clean_points, neighbour_spacing
from shapes.errors import ConfigError


def part_on_table(seed=0):
    """A 20 mm cylinder standing on a 120 mm square table (z = 0), a small box beside it, stray points above."""
    gen = np.random.default_rng(seed)
    part = surface_points(trimesh.creation.cylinder(radius=10, height=20).apply_translation([0, 0, 10]), 3000, 1)
    table = np.c_[gen.uniform(-60, 60, (6000, 2)), gen.normal(0, 0.02, 6000)]
    other = surface_points(trimesh.creation.box(extents=(8, 8, 8)).apply_translation([40, 40, 4]), 500, 2)
    strays = gen.uniform(-60, 60, (40, 3)) + [0, 0, 70]
    return part, table, other, strays


def only(**on):
    return CleanSettings(**{"stray_points": False, "support_plane": False, "cluster": False, **on})


def test_statistical_outlier_removal_matches_its_definition_and_removes_injected_outliers():
    gen = np.random.default_rng(0)
    body = surface_points(trimesh.creation.icosphere(subdivisions=3, radius=10), 2000, 0)
    outliers = gen.uniform(-40, 40, (30, 3))
    outliers = outliers[np.linalg.norm(outliers, axis=1) > 20]  # clearly off the surface
    points = np.vstack([body, outliers])
    result = clean_points(points, only(stray_points=True, stray_std=2.0))
    # reference: scipy.spatial.distance.cdist brute force, mean distance to k = 16 neighbours
    d = np.sort(cdist(points, points), axis=1)[:, 1:17].mean(axis=1)
    expected = np.flatnonzero(d <= d.mean() + 2.0 * d.std())
    np.testing.assert_array_equal(result.keep, expected)
    assert not np.isin(np.arange(len(body), len(points)), result.keep).any()  # every injected outlier is gone
    assert len(result.keep) > 0.95 * len(body)  # common practice: SOR at 2 std drops a few percent of a clean surface
    assert result.steps == [{"step": "stray points", "removed": len(points) - len(expected), "why": result.steps[0]["why"]}]


def test_ransac_removes_the_table_under_a_part_and_keeps_the_part():
    part, table, _, _ = part_on_table()
    points = np.vstack([part, table])
    result = clean_points(points, only(support_plane=True), seed=0)
    kept = np.zeros(len(points), bool)
    kept[result.keep] = True
    # closed form: the table is z = 0 (noise 0.02 mm); the part's bottom cap lies in it and goes with it, and so
    # does the foot of its wall within the plane tolerance (1.5 median spacings); the rest of the part stays
    assert not kept[len(part):].any()
    tolerance = 1.5 * neighbour_spacing(points)
    above = part[:, 2] > tolerance + 0.1
    assert kept[:len(part)][above].all()
    assert result.steps[0]["removed"] == len(points) - kept.sum() and "support plane" in result.steps[0]["why"]
    # seeded: the same seed, the same draws
    np.testing.assert_array_equal(clean_points(points, only(support_plane=True), seed=0).keep, result.keep)


def test_a_large_face_of_the_part_itself_is_kept():
    # a washer: its faces carry most points but lie within its own outline; nothing to remove
    washer = surface_points(trimesh.creation.annulus(r_min=5, r_max=12, height=2), 3000, 1)
    result = clean_points(washer, only(support_plane=True), seed=0)
    assert len(result.keep) == len(washer) and "kept" in result.steps[0]["why"]


def test_dbscan_keeps_the_largest_cluster():
    big = surface_points(trimesh.creation.icosphere(subdivisions=3, radius=10), 2000, 0)
    small = surface_points(trimesh.creation.icosphere(subdivisions=3, radius=4), 400, 1) + [40, 0, 0]
    points = np.vstack([small, big])
    s = only(cluster=True)
    result = clean_points(points, s)
    # reference: scikit-learn's DBSCAN with the documented eps, largest label kept
    eps = s.cluster_eps * neighbour_spacing(points, s.cluster_min_points)
    labels = DBSCAN(eps=eps, min_samples=s.cluster_min_points).fit(points).labels_
    largest = np.argmax(np.bincount(labels[labels >= 0]))
    np.testing.assert_array_equal(result.keep, np.flatnonzero(labels == largest))
    assert set(result.keep) >= set(range(len(small), len(points))) - set(np.flatnonzero(labels < 0))
    assert not np.isin(np.arange(len(small)), result.keep).any()


def test_all_three_steps_leave_only_the_part():
    part, table, other, strays = part_on_table()
    points = np.vstack([part, table, other, strays])
    result = clean_points(points, CleanSettings(support_plane=True, cluster=True), seed=0)
    assert [s["step"] for s in result.steps] == ["stray points", "support plane", "largest cluster"]
    assert sum(s["removed"] for s in result.steps) == len(points) - len(result.keep)
    assert (result.keep < len(part)).all()  # nothing but the part survives
    assert len(result.keep) > 0.9 * (part[:, 2] > 1.0).sum()


def test_defaults_leave_a_clean_single_view_scan_nearly_whole():
    # measured on the demo parts: a part's own big flat face passed for a table and a spring's
    # coils for separate objects, so only the stray-point step is on by default
    assert CleanSettings().stray_points and not CleanSettings().support_plane and not CleanSettings().cluster
    from shapes.data import read_mesh, scan_view

    mesh = read_mesh(demo_file("bolted_flange"))
    points, _ = scan_view(mesh, 3000, seed=1)
    assert len(clean_points(points, seed=0).keep) > 0.97 * len(points)


def test_steps_can_be_switched_off_and_scale_does_not_matter():
    part, table, _, _ = part_on_table()
    points = np.vstack([part, table])
    assert len(clean_points(points, CleanSettings.off()).keep) == len(points)
    assert clean_points(points, CleanSettings.off()).steps == []
    # the spacings are measured on the cloud: metres or millimetres, the same points go
    every = CleanSettings(support_plane=True, cluster=True)
    np.testing.assert_array_equal(clean_points(points, every, seed=1).keep, clean_points(points / 1000.0, every, seed=1).keep)


@pytest.mark.parametrize("option, value, needle", [
    ("stray_k", 1, "clean.stray_k should be an integer >= 2"),
    ("stray_std", 0, "clean.stray_std should be a positive number"),
    ("plane_share", 1.5, "clean.plane_share should be a share in (0, 1)"),
    ("cluster", "yes", "clean.cluster should be true or false"),
])
def test_bad_settings_give_one_line(option, value, needle):
    with pytest.raises(ConfigError) as info:
        CleanSettings(**{option: value})
    assert needle in str(info.value)
    with pytest.raises(ConfigError, match="clean has no option 'colour'"):
        CleanSettings.from_dict({"colour": 1})
