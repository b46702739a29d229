"""Mirror-twin detection: a handed part's mirror image is not a rotation of it, an achiral part's
is, and the twin map of a folder of classes is recovered. Residuals are printed (pytest -s)."""

from __future__ import annotations

import functools

import numpy as np
import pytest
import trimesh

from conftest import posed_mesh as posed
from shapes.errors import InputError
from shapes.parts import (
    DEFAULT_TOL,
    align_rigid,
    build_part,
    demo_catalog_spec,
    find_mirror_twins,
    is_chiral,
    is_rotation_of,
    mirror_mesh,
)
from shapes.parts._standards import COARSE_PITCH_ISO261

SPEC = {c["name"]: c for c in demo_catalog_spec(0)}
HANDED = [c["name"] for c in SPEC.values() if c["handed"] and c["instances"][0]["params"]["hand"] == "right"]
ACHIRAL = [c["name"] for c in SPEC.values() if not c["handed"]]
# The subtlest handed instance is a stud: only its threads tell it from its mirror image, so the
# mirror residual (relative to the part's size) goes with threaded share x pitch / length. Use the
# stud where that is smallest (ISO 261 pitches from the generator's own table).
_STUDS = [i["params"] for i in SPEC["stud_rh"]["instances"]]
PICK = {"stud_rh": min(
    range(len(_STUDS)),
    key=lambda k: 2.0 * _STUDS[k]["thread_length"] * COARSE_PITCH_ISO261[_STUDS[k]["size"]]["P"] / _STUDS[k]["length"] ** 2,
)}


@functools.lru_cache(maxsize=None)
def instance(name: str, k: int = 0) -> trimesh.Trimesh:
    c = SPEC[name]
    return build_part(c["family"], **c["instances"][k]["params"])


def test_catalog_has_four_handed_pairs_and_eight_achiral_classes():
    assert len(HANDED) >= 3 and len(ACHIRAL) >= 6
    assert set(HANDED) == {"stud_rh", "spring_rh", "helical_gear_rh", "bracket_right"}


@pytest.mark.parametrize("name", HANDED)
def test_handed_part_mirror_is_not_a_rotation(name):
    k = PICK.get(name, 0)
    right = instance(name, k)
    twin = SPEC[name]["twin"]
    left = build_part(SPEC[twin]["family"], **SPEC[twin]["instances"][k]["params"])
    # the twin instance is exactly the mirror image x -> -x of the original
    np.testing.assert_array_equal(left.vertices, right.vertices * np.array([-1.0, 1.0, 1.0]))
    mirrored = posed(left, 1)
    fit = align_rigid(right, mirrored)
    rotated = align_rigid(right, posed(right, 2))
    print(
        f"\n{name}: mirror residual {fit.residual:.2e} ({fit.distance:.4f} mm), "
        f"rotated copy {rotated.residual:.2e}, tol {DEFAULT_TOL:.1e}"
    )
    assert fit.residual > 2.0 * DEFAULT_TOL, f"{name}: mirror aligned to {fit.residual:.2e}, tol {DEFAULT_TOL:.1e}"
    assert not is_rotation_of(right, mirrored)
    # the same detector says yes to a genuinely rotated copy: both directions are tested
    assert rotated.residual < DEFAULT_TOL / 3.0
    assert abs(np.linalg.det(fit.matrix[:3, :3]) - 1.0) < 1e-9  # never a reflection


@pytest.mark.parametrize("name", ACHIRAL)
def test_achiral_part_mirror_is_a_rotation(name):
    mesh = instance(name)
    fit = align_rigid(mesh, posed(mirror_mesh(mesh), 4))
    print(f"\n{name}: mirror residual {fit.residual:.2e} ({fit.distance:.5f} mm), tol {DEFAULT_TOL:.1e}")
    assert fit.residual < DEFAULT_TOL / 2.0, f"{name}: mirror aligned only to {fit.residual:.2e}"
    assert not is_chiral(mesh)


def _index(name: str, **params) -> int:
    return next(k for k, i in enumerate(SPEC[name]["instances"]) if params.items() <= i["params"].items())


def test_different_parts_are_not_rotations_of_each_other():
    m5, m6 = _index("hex_nut", size="M5", chamfer="both"), _index("hex_nut", size="M6", chamfer="both")
    assert not is_rotation_of(instance("hex_nut", m5), instance("hex_nut", m6))  # sizes differ
    teeth = [i["params"]["teeth"] for i in SPEC["spur_gear"]["instances"]]
    few, many = teeth.index(min(teeth)), teeth.index(max(teeth))
    assert not is_rotation_of(instance("spur_gear", few), instance("spur_gear", many))  # tooth counts differ
    assert is_rotation_of(instance("spur_gear", few), posed(instance("spur_gear", few), 5))  # and the same gear is


def test_find_mirror_twins_recovers_catalog_map_on_subset():
    names = ["spring_rh", "spring_lh", "bracket_right", "bracket_left", "hex_nut", "spur_gear", "helical_gear_rh"]
    meshes = {n: posed(build_part(SPEC[n]["family"], **SPEC[n]["instances"][0]["params"]), i) for i, n in enumerate(names)}
    expected = {n: (SPEC[n]["twin"] if SPEC[n]["twin"] in names else n) for n in names}
    assert expected["spring_rh"] == "spring_lh" and expected["helical_gear_rh"] == "helical_gear_rh"
    assert find_mirror_twins(meshes) == expected
    # a class given twice (same shape, achiral) is not a mirror twin of its copy
    nut = instance("hex_nut")
    assert find_mirror_twins({"a": nut, "b": posed(nut, 9)}) == {"a": "a", "b": "b"}
    # a handed class without its twin maps to itself
    alone = {"spring_rh": meshes["spring_rh"], "hex_nut": nut}
    assert find_mirror_twins(alone) == {"spring_rh": "spring_rh", "hex_nut": "hex_nut"}


def test_twin_functions_reject_bad_input():
    with pytest.raises(InputError, match="trimesh.Trimesh"):
        is_rotation_of(np.zeros((10, 3)), instance("hex_nut"))
    with pytest.raises(InputError, match="samples should be >= 200, got 10"):
        align_rigid(instance("hex_nut"), instance("hex_nut"), samples=10)
    with pytest.raises(InputError, match="non-empty mapping"):
        find_mirror_twins({})
    with pytest.raises(InputError, match="tol should be > 0"):
        is_rotation_of(instance("hex_nut"), instance("hex_nut"), tol=0.0)
