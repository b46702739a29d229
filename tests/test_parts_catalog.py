"""The committed demo catalog: schema, files on disk, groups and twins, size, even coverage of
each class's range, and that regenerating it from the same seed gives byte-identical files."""

from __future__ import annotations

import json
import re

import numpy as np
import pytest
import trimesh

from conftest import DEMO
from shapes.data import read_catalog, split_groups
from shapes.errors import ConfigError, DataError
from shapes.parts import (
    CATALOG_TITLE, FAMILIES, MAX_PER_CLASS, demo_catalog_spec, describe_instances, summarize_catalog, write_demo_catalog,
)

PER_CLASS = 12  # the committed catalog: 16 classes x 12 instances


def _size_band(size: str) -> str:
    d = int(size[1:])
    return "small" if d <= 6 else "medium" if d <= 10 else "large"


def _band(x: float, edges: tuple) -> int:
    return sum(x >= e for e in edges)


# Discrete traits of each class (a right-hand class stands for its pair). Every value of every
# trait must be shared by >= 3 instances, and each trait must take all the listed number of
# values, so a held-out instance always has training instances with the same trait value.
TRAITS = {
    "hex_nut": {"size band": (3, lambda p: _size_band(p["size"])), "chamfer": (2, lambda p: p["chamfer"])},
    "plain_washer": {"size band": (3, lambda p: _size_band(p["size"])), "chamfered": (2, lambda p: p["chamfered"])},
    "ball_bearing": {
        "series": (2, lambda p: p["designation"][:2]),
        # bores 10-12, 15-17, 20-25 mm (from memory: ISO 15 bore codes 00, 01, 02, 03 are 10, 12, 15, 17 mm,
        # from 04 on five times the code)
        "bore band": (3, lambda p: int(p["designation"][2:]) // 2),
        "sealed": (2, lambda p: p["sealed"]),
    },
    "spur_gear": {
        "tooth band": (3, lambda p: _band(p["teeth"], (25, 35))),
        "module band": (3, lambda p: _band(p["module"], (1.5, 2.5))),
    },
    "bolted_flange": {"holes": (3, lambda p: p["holes"]), "bolt hole": (4, lambda p: p["hole_d"])},
    "stepped_shaft": {"steps": (3, lambda p: len(p["diameters"]))},
    "v_pulley": {
        "grooves": (3, lambda p: p["grooves"]),
        "belt section": (2, lambda p: p["groove_top_w"]),
        "groove angle": (2, lambda p: p["groove_deg"]),
    },
    "bushing": {"flanged": (2, lambda p: p["flange_d"] > 0)},
    "stud_rh": {
        "size band": (3, lambda p: _size_band(p["size"])),
        "length band": (2, lambda p: p["length"] / int(p["size"][1:]) > 6.5),
    },
    "spring_rh": {"coil band": (3, lambda p: _band(p["coils"], (7, 9.5))), "ground": (2, lambda p: p["ground"])},
    "helical_gear_rh": {
        "tooth band": (3, lambda p: _band(p["teeth"], (22, 32))),
        "module band": (3, lambda p: _band(p["module"], (1.5, 2.5))),
        "helix band": (3, lambda p: _band(p["helix_deg"], (18.0, 24.0))),
    },
    "bracket_right": {"base holes": (3, lambda p: p["base_holes"])},
}


@pytest.fixture(scope="module")
def catalog() -> dict:
    return json.loads((DEMO / "catalog.json").read_text(encoding="utf-8"))


def test_catalog_schema(catalog):
    assert list(catalog) == ["format", "title", "units", "classes"]
    assert catalog["format"] == 1 and catalog["units"] == "mm" and catalog["title"] == CATALOG_TITLE
    names = [c["name"] for c in catalog["classes"]]
    assert len(names) == len(set(names)) >= 12
    for c in catalog["classes"]:
        assert list(c) == ["name", "family", "standard", "twin", "handed", "description", "instances"]
        assert re.fullmatch(r"[a-z][a-z0-9_]*", c["name"])
        assert c["family"] in FAMILIES
        for inst in c["instances"]:
            assert list(inst) == ["file", "group", "params"]


def test_catalog_matches_files_and_groups(catalog):
    by_name = {c["name"]: c for c in catalog["classes"]}
    for c in catalog["classes"]:
        files = [DEMO / i["file"] for i in c["instances"]]
        assert all(f.is_file() for f in files), c["name"]
        assert len(c["instances"]) == PER_CLASS and len({i["group"] for i in c["instances"]}) == PER_CLASS
        assert len({i["file"] for i in c["instances"]}) == PER_CLASS
        twin = by_name[c["twin"]]  # twin exists, and the map is symmetric
        assert twin["twin"] == c["name"]
        assert c["handed"] == (c["twin"] != c["name"]) == twin["handed"]
        if c["handed"]:  # mirror instances share their original's group
            assert [i["group"] for i in c["instances"]] == [i["group"] for i in twin["instances"]]
    groups = {}
    for c in catalog["classes"]:
        for i in c["instances"]:
            groups.setdefault(i["group"], set()).add(c["name"])
    for g, owners in groups.items():  # a group belongs to one class, or to one twin pair
        assert len(owners) == 1 or (len(owners) == 2 and {by_name[n]["twin"] for n in owners} == owners), g
    handed = [c for c in catalog["classes"] if c["handed"]]
    assert len(handed) >= 6 and len(catalog["classes"]) - len(handed) >= 6


def test_twin_files_are_exact_mirror_images(catalog):
    by_name = {c["name"]: c for c in catalog["classes"]}
    for c in catalog["classes"]:
        if not c["handed"] or c["instances"][0]["params"]["hand"] != "right":
            continue
        for a, b in zip(c["instances"], by_name[c["twin"]]["instances"]):
            ra = trimesh.load(DEMO / a["file"], process=False)
            rb = trimesh.load(DEMO / b["file"], process=False)
            np.testing.assert_array_equal(rb.vertices, ra.vertices * np.array([-1.0, 1.0, 1.0]))
            assert rb.volume > 0 and rb.is_winding_consistent


def test_every_file_is_a_closed_solid_within_the_size_budget(catalog):
    total = 0
    for c in catalog["classes"]:
        for i in c["instances"]:
            path = DEMO / i["file"]
            total += path.stat().st_size
            mesh = trimesh.load(path, process=True)  # reference: trimesh's PLY reader with vertex merging
            assert mesh.is_watertight and mesh.is_winding_consistent and mesh.volume > 0, i["file"]
            assert 300 <= len(mesh.faces) <= 8000, (i["file"], len(mesh.faces))
    assert total <= 10_000_000  # the repository keeps demo_meshes/ under 10 MB


def test_regenerating_gives_byte_identical_folder(tmp_path, catalog):
    out = write_demo_catalog(tmp_path / "again", seed=0)
    assert out == tmp_path / "again"
    written = sorted(p.relative_to(out) for p in out.rglob("*") if p.is_file())
    committed = sorted(p.relative_to(DEMO) for p in DEMO.rglob("*") if p.is_file())
    assert written == committed
    for rel in written:
        new, old = (out / rel).read_bytes(), (DEMO / rel).read_bytes()
        if new == old or rel.suffix != ".ply":
            assert new == old, rel
            continue
        # Another manifold3d/trimesh release may order faces differently: then the same solid
        # must still come out (same volume and bounds to float32 precision).
        a, b = trimesh.load(out / rel, process=True), trimesh.load(DEMO / rel, process=True)
        assert abs(a.volume - b.volume) <= 1e-4 * b.volume, rel
        assert np.allclose(a.bounds, b.bounds, atol=1e-4), rel
    assert demo_catalog_spec(0) == catalog["classes"]
    rows = summarize_catalog(out)
    assert [r["name"] for r in rows] == [c["name"] for c in catalog["classes"]]
    assert all(r["instances"] == PER_CLASS and 0 < r["faces_min"] <= r["faces_max"] for r in rows)
    readme = (out / "README.md").read_text(encoding="utf-8")
    assert "per_class=12" in readme and "| hex_nut | size M5..M16 (7 values); chamfer both x6 / one x6 |" in readme


@pytest.mark.parametrize("name", sorted(TRAITS))
def test_every_trait_value_is_shared_by_three_instances(catalog, name):
    params = [i["params"] for i in next(c for c in catalog["classes"] if c["name"] == name)["instances"]]
    for trait, (values, of) in TRAITS[name].items():
        counts = {}
        for p in params:
            counts[of(p)] = counts.get(of(p), 0) + 1
        assert len(counts) == values, (name, trait, counts)
        assert min(counts.values()) >= 3, (name, trait, counts)


# The continuous shape parameters of each class: proportions (what is left after a cloud is
# scaled to unit size) and the primary dimension. Each is drawn one per stratum of its range.
RATIOS = {
    "spur_gear": {"face / m": lambda p: p["face_width"] / p["module"], "bore / d": lambda p: p["bore_d"] / (p["module"] * p["teeth"])},
    "bolted_flange": {"outer": lambda p: p["outer_d"], "thickness / outer": lambda p: p["thickness"] / p["outer_d"],
                      "hub height / thickness": lambda p: p["hub_h"] / p["thickness"], "bore / hub": lambda p: p["bore_d"] / p["hub_d"]},
    "stepped_shaft": {"seat": lambda p: p["diameters"][1 if len(p["diameters"]) > 3 else 0],
                      "shoulder / seat": lambda p: max(p["diameters"]) / p["diameters"][1 if len(p["diameters"]) > 3 else 0]},
    "v_pulley": {"bore / outer": lambda p: p["bore_d"] / p["outer_d"], "hub / bore": lambda p: p["hub_d"] / p["bore_d"],
                 "hub height": lambda p: p["hub_h"]},
    "bushing": {"outer": lambda p: p["outer_d"], "inner / outer": lambda p: p["inner_d"] / p["outer_d"],
                "length / outer": lambda p: p["length"] / p["outer_d"]},
    "spring_rh": {"mean": lambda p: p["mean_d"], "index": lambda p: p["mean_d"] / p["wire_d"], "coils": lambda p: p["coils"]},
    "helical_gear_rh": {"helix": lambda p: p["helix_deg"], "face / m": lambda p: p["face_width"] / p["module"]},
    "bracket_right": {"base": lambda p: p["leg_base"], "upright / base": lambda p: p["leg_upright"] / p["leg_base"],
                      "width / base": lambda p: p["width"] / p["leg_base"]},
}


@pytest.mark.parametrize("name", sorted(RATIOS))
def test_continuous_parameters_cover_their_range_evenly(catalog, name):
    # One draw per stratum leaves no gap between neighbouring values wider than two strata (1/6
    # of the range with 12 instances) plus rounding; independent uniform draws would often leave
    # gaps over a quarter of the range.
    params = [i["params"] for i in next(c for c in catalog["classes"] if c["name"] == name)["instances"]]
    for key, of in RATIOS[name].items():
        v = np.sort([of(p) for p in params])
        assert np.diff(v).max() <= 0.3 * np.ptp(v), (name, key, np.round(v, 3).tolist())


def test_helix_angles_span_12_to_30_degrees(catalog):
    helix = [i["params"]["helix_deg"] for c in catalog["classes"] if c["name"] == "helical_gear_rh" for i in c["instances"]]
    assert 12.0 <= min(helix) < 13.5 and 28.5 < max(helix) <= 30.0  # one draw in each 1.5 degree stratum


def test_split_by_group_gives_every_class_all_three_splits():
    catalog = read_catalog(DEMO)
    split = split_groups(catalog, (0.6, 0.2, 0.2), seed=0)
    for name in catalog.classes:
        seen = [split[i.group] for i in catalog.of_class(name)]
        assert {s: seen.count(s) for s in ("train", "val", "test")} == {"train": 8, "val": 2, "test": 2}, name


@pytest.mark.parametrize("per_class", range(3, MAX_PER_CLASS + 1))
def test_spec_has_per_class_distinct_instances(per_class):
    spec = demo_catalog_spec(0, per_class)
    by_name = {c["name"]: c for c in spec}
    for c in spec:
        insts = c["instances"]
        assert len(insts) == per_class
        assert len({i["file"] for i in insts}) == len({i["group"] for i in insts}) == per_class
        assert len({json.dumps(i["params"], sort_keys=True) for i in insts}) == per_class  # no repeated part
        if c["handed"]:
            assert [i["group"] for i in insts] == [i["group"] for i in by_name[c["twin"]]["instances"]]
    assert describe_instances(by_name["stud_rh"]["instances"]).startswith("size M5")


@pytest.mark.parametrize("bad", [2, 0, -12, MAX_PER_CLASS + 1, 12.0, "12", True, None])
def test_per_class_is_validated(bad):
    with pytest.raises(ConfigError) as info:
        demo_catalog_spec(0, bad)
    message = str(info.value)
    assert f"per_class should be an integer in [3, {MAX_PER_CLASS}]" in message and f"got {bad!r} instead" in message
    assert "\n" not in message
    with pytest.raises(ConfigError, match="per_class"):
        write_demo_catalog("never_written", per_class=bad)


def test_seed_changes_free_parameters_only():
    a, b = demo_catalog_spec(0), demo_catalog_spec(1)
    assert demo_catalog_spec(0) == a
    assert [c["name"] for c in a] == [c["name"] for c in b]
    assert a != b
    nuts_a = [i["params"] for i in a[0]["instances"]]
    nuts_b = [i["params"] for i in b[0]["instances"]]
    assert nuts_a == nuts_b  # hex nut sizes come from ISO 4032, not from the seed


def test_summarize_missing_folder_raises(tmp_path):
    with pytest.raises(DataError, match="catalog file should exist"):
        summarize_catalog(tmp_path / "nothing")


def test_design_helpers_spread_levels_and_strata():
    from shapes.parts._design import grid_strata, level_counts, levels, pick_spread, strata

    # hand-worked: 12 over 7 sizes gives 1 each plus 5 spare, to the ends first (0, 6, 1, 5, 2)
    assert level_counts(7, 12) == [2, 2, 2, 1, 1, 2, 2]
    assert level_counts(3, 12) == [4, 4, 4] and level_counts(4, 3) == [1, 1, 0, 1]  # order 0, 3, 1
    assert levels("ab", 3) == ["a", "a", "b"]
    assert pick_spread(list(range(12)), 4) == [0, 4, 7, 11]  # round(linspace(0, 11, 4)) = 0, 3.67, 7.33, 11
    gen = np.random.default_rng(0)
    v = strata(gen, 12, 6.0, 30.0)
    assert sorted(np.floor((v - 6.0) / 2.0).astype(int).tolist()) == list(range(12))  # one per 2-wide stratum
    g = grid_strata(gen, 12, 8.0, 40.0, 1.0)
    assert len(set(g)) == 12 and g == sorted(g) and all(float(x).is_integer() and 8 <= x <= 40 for x in g)
    assert grid_strata(gen, 0, 0.0, 1.0, 1.0) == []
