"""Reading catalogs: the demo's catalog.json and a user's folder of meshes."""

import json

import pytest
import trimesh

from shapes.data import Catalog, Instance, read_catalog
from shapes.errors import DataError


def write_mesh(path, size=1.0):
    path.parent.mkdir(parents=True, exist_ok=True)
    trimesh.creation.box(extents=(size, 2 * size, 3 * size)).export(path)
    return path


def demo_catalog(root):
    """A tiny catalog in the demo generator's format: a handed pair and an achiral class."""
    classes = []
    for name, twin, handed in (("spring_rh", "spring_lh", True), ("spring_lh", "spring_rh", True),
                               ("washer_m8", "washer_m8", False)):
        instances = []
        for d in (10, 12):
            rel = f"{name}/{name}_d{d}.ply"
            write_mesh(root / rel, d / 10)
            instances.append({"file": rel, "group": f"g_d{d}", "params": {"d": d}})
        classes.append({"name": name, "family": name.split("_")[0], "standard": "none (common practice)",
                        "twin": twin, "handed": handed, "description": f"a {name}", "instances": instances})
    doc = {"format": 1, "title": "tiny", "units": "mm", "classes": classes}
    (root / "catalog.json").write_text(json.dumps(doc))
    return doc


def edit_catalog(root, change):
    doc = json.loads((root / "catalog.json").read_text())
    change(doc)
    (root / "catalog.json").write_text(json.dumps(doc))


def test_demo_catalog(tmp_path):
    demo_catalog(tmp_path)
    cat = read_catalog(tmp_path)
    assert isinstance(cat, Catalog)
    assert cat.root == tmp_path.resolve()
    assert cat.classes == ("spring_rh", "spring_lh", "washer_m8")
    assert cat.twins == {"spring_rh": "spring_lh", "spring_lh": "spring_rh", "washer_m8": "washer_m8"}
    assert cat.handed == {"spring_rh": True, "spring_lh": True, "washer_m8": False}
    assert cat.families["washer_m8"] == "washer" and cat.standards["spring_rh"] == "none (common practice)"
    assert cat.title == "tiny" and cat.units == "mm"
    assert len(cat.instances) == 6
    first = cat.instances[0]
    assert first == Instance("spring_rh", (tmp_path / "spring_rh/spring_rh_d10.ply").resolve(), "g_d10", {"d": 10})
    assert first.file.is_absolute() and first.file.is_file()
    assert [i.group for i in cat.of_class("washer_m8")] == ["g_d10", "g_d12"]


def test_demo_catalog_defaults_and_one_sided_twins(tmp_path):
    demo_catalog(tmp_path)

    def strip(doc):
        for entry in doc["classes"]:
            entry.pop("handed")
            for item in entry["instances"]:
                item.pop("group")
                item.pop("params")
        doc["classes"][1].pop("twin")  # spring_lh's twin is implied by spring_rh's
        doc["classes"][2].pop("twin")  # washer: its own twin by default

    edit_catalog(tmp_path, strip)
    cat = read_catalog(tmp_path)
    assert cat.twins["spring_lh"] == "spring_rh" and cat.twins["washer_m8"] == "washer_m8"
    assert cat.handed == {"spring_rh": True, "spring_lh": True, "washer_m8": False}
    assert cat.instances[0].group == "spring_rh_d10" and cat.instances[0].params == {}


@pytest.mark.parametrize("change, message", [
    (lambda d: d["classes"][0]["instances"].append({"file": "spring_rh/gone.ply"}), "missing mesh file .*gone.ply"),
    (lambda d: d["classes"][2].update(twin="spring_9"), "unknown class 'spring_9'"),
    (lambda d: d["classes"][2].update(twin="spring_rh"), "asymmetric twins"),
    (lambda d: d["classes"][2].update(handed=True), "handed.*its twin is itself"),
    (lambda d: d["classes"][0].update(handed=False), "achiral class is its own twin"),
    (lambda d: d["classes"][2].update(instances=[]), "class 'washer_m8' has no instances"),
    (lambda d: d["classes"].append(dict(d["classes"][2])), "listed twice"),
    (lambda d: d.update(format=2), '"format": 1'),
    (lambda d: d.update(classes=d["classes"][:1]), "found 1 class 'spring_rh' in .*; need at least 2"),
])
def test_demo_catalog_errors(tmp_path, change, message):
    demo_catalog(tmp_path)
    edit_catalog(tmp_path, change)
    with pytest.raises(DataError, match=message) as info:
        read_catalog(tmp_path)
    assert str(tmp_path) in str(info.value) and "\n" not in str(info.value)


def test_bad_json(tmp_path):
    demo_catalog(tmp_path)
    (tmp_path / "catalog.json").write_text('{"format": 1, "classes": [')
    with pytest.raises(DataError, match="not valid JSON"):
        read_catalog(tmp_path)


def user_folder(root):
    for cls in ("bracket_left", "bracket_right", "flange"):
        for k in range(3):
            write_mesh(root / cls / f"b{k}.stl", 1 + k)
    write_mesh(root / "flange" / "old" / "legacy.obj")  # found at any depth
    (root / "flange" / "notes.txt").write_text("not a mesh")
    (root / ".cache").mkdir()  # hidden folders are not classes
    (root / "readme.md").write_text("files at the top are ignored")


def test_user_folder(tmp_path):
    user_folder(tmp_path)
    cat = read_catalog(tmp_path)
    assert cat.classes == ("bracket_left", "bracket_right", "flange")
    assert cat.twins == {c: c for c in cat.classes}
    assert not any(cat.handed.values())
    flange = cat.of_class("flange")
    assert [i.group for i in flange] == ["b0", "b1", "b2", "legacy"]
    assert all(i.file.is_absolute() and i.params == {} for i in cat.instances)


def test_user_folder_twins(tmp_path):
    user_folder(tmp_path)
    (tmp_path / "twins.json").write_text('{"bracket_left": "bracket_right"}')
    cat = read_catalog(tmp_path)
    assert cat.twins == {"bracket_left": "bracket_right", "bracket_right": "bracket_left", "flange": "flange"}
    assert cat.handed == {"bracket_left": True, "bracket_right": True, "flange": False}


@pytest.mark.parametrize("twins, message", [
    ({"bracket_left": "bracket_right", "bracket_right": "flange"}, "asymmetric twins"),
    ({"bracket_left": "flange", "bracket_right": "flange"}, "asymmetric twins"),
    ({"bracket_left": "bracket_middle"}, "unknown class 'bracket_middle'"),
    (["bracket_left"], "should hold an object"),
])
def test_user_folder_twin_errors(tmp_path, twins, message):
    user_folder(tmp_path)
    (tmp_path / "twins.json").write_text(json.dumps(twins))
    with pytest.raises(DataError, match=message):
        read_catalog(tmp_path)


def test_folder_errors(tmp_path):
    with pytest.raises(DataError, match="not found"):
        read_catalog(tmp_path / "missing")
    with pytest.raises(DataError, match="found no classes"):
        read_catalog(tmp_path)
    write_mesh(tmp_path / "only" / "a.stl")
    with pytest.raises(DataError, match=f"found 1 class 'only' in {tmp_path}; need at least 2"):
        read_catalog(tmp_path)
    (tmp_path / "empty").mkdir()
    (tmp_path / "empty" / "notes.txt").write_text("x")
    with pytest.raises(DataError, match="class 'empty' in .* has no mesh files"):
        read_catalog(tmp_path)
