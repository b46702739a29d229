"""The committed demo catalog: schema, files on disk, groups and twins, size, and that
regenerating it from the same seed gives byte-identical files."""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pytest
import trimesh

from shapes.errors import DataError
from shapes.parts import CATALOG_TITLE, FAMILIES, demo_catalog_spec, summarize_catalog, write_demo_catalog

DEMO = Path(__file__).resolve().parents[1] / "demo_meshes"


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
        assert len(c["instances"]) >= 3 and len({i["group"] for i in c["instances"]}) >= 3
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
    assert total < 8 * 2**20


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
    assert all(r["instances"] >= 3 and 0 < r["faces_min"] <= r["faces_max"] for r in rows)


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
