"""check_twins: the mirror-twin map of a set of classes from geometry alone, checked against a
declared map. Shapes with a known hand are built by twisted extrusion (coil and twisted_bar in conftest.py)."""

from __future__ import annotations

import json

import pytest
import trimesh

from conftest import DEMO, coil, posed_mesh as posed, twisted_bar
from shapes.errors import DataError, InputError
from shapes.parts import TwinReport, check_twins, mirror_mesh


@pytest.mark.slow
def test_sphere_and_cube_are_achiral_and_a_coil_is_handed():
    sphere = posed(trimesh.creation.icosphere(subdivisions=3, radius=5.0), 1)
    cube = posed(trimesh.creation.box([8.0, 8.0, 8.0]), 2)
    report = check_twins({"sphere": sphere, "cube": cube})
    # common practice: a body with a mirror plane is its own mirror image up to a rotation
    # (sphere and cube have mirror planes through the centre), so it is achiral
    assert isinstance(report, TwinReport)
    assert report.achiral == ("sphere", "cube") and report.pairs == () and report.unpaired == ()
    assert report.twins == {"sphere": "sphere", "cube": "cube"} and report.declared is None and not report.agrees
    # both ways: a coil on its own is handed, and with no twin in the set it is reported unpaired
    alone = check_twins({"sphere": sphere, "coil_rh": posed(coil("right"), 3)})
    assert alone.achiral == ("sphere",) and alone.unpaired == ("coil_rh",)


@pytest.mark.slow
def test_right_hand_coil_and_twisted_bar_pair_with_their_left_hand_builds():
    # the left-hand shapes are built independently (the twist reversed), not mirrored from the right
    meshes = {
        "coil_rh": posed(coil("right"), 4),
        "bar_lh": posed(twisted_bar("left"), 5),
        "cube": posed(trimesh.creation.box([8.0, 8.0, 8.0]), 6),
        "coil_lh": posed(coil("left"), 7),
        "bar_rh": posed(twisted_bar("right"), 8),
    }
    report = check_twins(meshes, declared={"coil_rh": "coil_lh", "bar_rh": "bar_lh"})
    assert report.pairs == (("coil_rh", "coil_lh"), ("bar_lh", "bar_rh"))
    assert report.achiral == ("cube",) and report.unpaired == ()
    assert report.warnings == () and report.agrees
    # the left-hand build is the mirror image of the right-hand one, checked the other way round
    mirrored = check_twins({"coil_rh": meshes["coil_rh"], "mirror": posed(mirror_mesh(coil("right")), 9)})
    assert mirrored.pairs == (("coil_rh", "mirror"),)
    # both ways: two right-hand coils of different pitch, or of the same hand, are not twins
    other = check_twins({"coil_rh": meshes["coil_rh"], "coil_rh_p9": posed(coil("right", pitch=9.0), 10),
                         "coil_rh_copy": posed(coil("right"), 11)})
    assert other.pairs == () and other.unpaired == ("coil_rh", "coil_rh_p9", "coil_rh_copy")


@pytest.mark.slow
def test_wrong_declared_map_is_flagged(tmp_path):
    sphere = trimesh.creation.icosphere(subdivisions=3, radius=5.0)
    cube = trimesh.creation.box([8.0, 8.0, 8.0])
    meshes = {"coil_rh": posed(coil("right"), 12), "coil_lh": posed(coil("left"), 13), "sphere": sphere, "cube": cube}
    # coil_rh declared the twin of the sphere: four classes disagree, each in one line
    report = check_twins(meshes, declared={"coil_rh": "sphere"})
    assert report.pairs == (("coil_rh", "coil_lh"),) and not report.agrees
    assert report.declared == {"coil_rh": "sphere", "coil_lh": "coil_lh", "sphere": "coil_rh", "cube": "cube"}
    assert report.warnings == (
        "coil_rh: declared the twin of sphere, but the geometry finds it the mirror twin of coil_lh.",
        "coil_lh: declared its own twin (achiral), but the geometry finds it the mirror twin of coil_rh.",
        "sphere: declared the twin of coil_rh, but the geometry finds it achiral (its mirror image is a rotation of it).",
    )
    assert all("\n" not in w for w in report.warnings)
    # an achiral pair declared twins is flagged too
    assert len(check_twins({"sphere": sphere, "cube": cube}, declared={"sphere": "cube"}).warnings) == 2
    # a folder of sub-folders with a wrong twins.json is read and checked against it
    for name, mesh in (("coil_rh", coil("right")), ("coil_lh", coil("left")), ("cube", cube)):
        (tmp_path / name).mkdir()
        mesh.export(tmp_path / name / f"{name}.stl")
    (tmp_path / "twins.json").write_text(json.dumps({"coil_rh": "cube"}))
    folder = check_twins(tmp_path)
    assert folder.pairs == (("coil_lh", "coil_rh"),) and len(folder.warnings) == 3
    assert "warning: cube: declared the twin of coil_rh" in folder.summary()
    # and a handed class declared without a twin, with none in the set, is flagged
    alone = check_twins({"coil_rh": meshes["coil_rh"], "cube": cube}, declared={})
    assert alone.warnings == ("coil_rh: declared without a twin, but it is handed (its mirror image is not a rotation "
                              "of it) and no class of the set is its mirror image.",)


@pytest.mark.slow
def test_detector_recovers_the_demo_catalog_map():
    # common practice: left-hand studs, springs and helical gears and a left bracket are the mirror
    # images of the right-hand ones and the turned parts are achiral; catalog.json declares so
    declared = {c["name"]: c["twin"] for c in json.loads((DEMO / "catalog.json").read_text())["classes"]}
    report = check_twins(DEMO, instances=1)  # one instance per class; compared with catalog.json's twins
    assert report.twins == declared
    assert report.warnings == () and report.agrees and report.declared == declared
    assert len(report.pairs) == 4 and len(report.achiral) == 8 and report.unpaired == ()
    print("\n" + report.summary())


def test_check_twins_rejects_bad_input(tmp_path):
    cube = trimesh.creation.box([8.0, 8.0, 8.0])
    with pytest.raises(InputError, match="should name classes of the set .* got 'ghost'"):
        check_twins({"a": cube, "b": cube}, declared={"a": "ghost"})
    with pytest.raises(InputError, match="paired with both"):
        check_twins({"a": cube, "b": cube, "c": cube}, declared={"a": "b", "c": "a"})
    with pytest.raises(DataError, match="should exist, got no such folder"):
        check_twins(tmp_path / "missing")
    with pytest.raises(DataError, match="catalog.json or sub-folders"):
        check_twins(tmp_path)
    with pytest.raises(InputError, match="instances should be a positive int or None, got 0"):
        check_twins(tmp_path, instances=0)
    with pytest.raises(InputError, match="non-empty mapping"):
        check_twins({})
