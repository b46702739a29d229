"""Building point-cloud shards from a catalog: splits by group, formats, determinism, atomicity."""

import json

import numpy as np
import pytest
import trimesh

from shapes.data import build_dataset, load_split, read_catalog, read_meta, split_groups
from shapes.errors import ConfigError, DataError, MeshError

SMALL = dict(points=48, copies={"train": 2, "val": 1, "test": 1}, oversample=2)
KEYS = ("points", "normals", "labels", "instance", "scale", "kind", "visible")


def shard(out, split) -> dict:
    """A split's arrays as plain numpy reads them from its folder (no memory map)."""
    return {key: np.load(out / split / f"{key}.npy") for key in KEYS}


def chiral_mesh(size):
    # a tetrahedron with three different edge lengths at one corner has no mirror symmetry
    v = np.array([[0, 0, 0], [1, 0, 0], [0, 2, 0], [0, 0, 3]], dtype=float) * size
    return trimesh.Trimesh(v, [[0, 2, 1], [0, 1, 3], [0, 3, 2], [1, 2, 3]], process=False)


def make_catalog(root, groups=("g1", "g2", "g3", "g4")):
    """Four classes; 'hand_r'/'hand_l' are mirror twins and share group names."""
    classes = []
    for name, twin in (("hand_r", "hand_l"), ("hand_l", "hand_r"), ("block", "block"), ("rod", "rod")):
        instances = []
        for k, g in enumerate(groups):
            size = 1.0 + k
            if name.startswith("hand"):
                mesh = chiral_mesh(size)
                if name == "hand_l":
                    mesh.apply_transform(np.diag([-1.0, 1, 1, 1]))
            elif name == "block":
                mesh = trimesh.creation.box(extents=(size, 2 * size, 0.5 * size))
            else:
                mesh = trimesh.creation.cylinder(radius=0.3 * size, height=4 * size, sections=12)
            rel = f"{name}/{name}_{g}.stl"
            (root / name).mkdir(parents=True, exist_ok=True)
            mesh.export(root / rel)
            instances.append({"file": rel, "group": g, "params": {"size": size}})
        classes.append({"name": name, "twin": twin, "handed": twin != name, "instances": instances})
    (root / "catalog.json").write_text(json.dumps({"format": 1, "title": "t", "units": "mm", "classes": classes}))
    return root


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    base = tmp_path_factory.mktemp("build")
    make_catalog(base / "cat")
    out = build_dataset(base / "cat", base / "ds", seed=3, **SMALL)
    return base, out


def test_shards_shapes_and_dtypes(built):
    _, out = built
    meta = read_meta(out)
    for split, copies in SMALL["copies"].items():
        arrays = shard(out, split)
        m = arrays["labels"].shape[0]
        assert m == meta["counts"][split]
        assert arrays["points"].shape == (m, 48, 3) and arrays["points"].dtype == np.float32
        assert arrays["normals"].shape == (m, 48, 3) and arrays["normals"].dtype == np.float32
        assert arrays["labels"].dtype == np.int64 and arrays["instance"].dtype == np.int32
        assert arrays["scale"].shape == (m,) and arrays["scale"].dtype == np.float32
        assert arrays["kind"].dtype == np.int8 and arrays["visible"].dtype == np.float32
        n_inst = sum(i["split"] == split for i in meta["instances"])
        assert m == n_inst * copies
        # each cloud is normalised: centroid 0, unit RMS radius (float32 storage)
        pts = arrays["points"].astype(np.float64)
        np.testing.assert_allclose(pts.mean(axis=1), 0.0, atol=1e-5)
        np.testing.assert_allclose(np.sqrt((pts**2).sum(-1).mean(-1)), 1.0, atol=1e-5)
        np.testing.assert_allclose(np.linalg.norm(arrays["normals"], axis=-1), 1.0, atol=1e-5)
    # the layout: meta.json and one folder of plain .npy arrays per split, nothing else
    assert sorted(p.name for p in out.iterdir()) == ["meta.json", "test", "train", "val"]
    assert sorted(p.name for p in (out / "train").iterdir()) == sorted(f"{k}.npy" for k in KEYS)


def test_splits_by_group_with_twins_together(built):
    _, out = built
    meta = read_meta(out)
    split_of_group = {}
    for inst in meta["instances"]:
        # one group is in one split only, across all classes (so twins share it)
        assert split_of_group.setdefault(inst["group"], inst["split"]) == inst["split"]
    for cls in meta["classes"]:
        assert {i["split"] for i in meta["instances"] if i["class"] == cls} == {"train", "val", "test"}
    for split in ("train", "val", "test"):
        data = load_split(out, split)
        groups = {meta["instances"][i]["group"] for i in data.instance}
        assert all(split_of_group[g] == split for g in groups)
        # labels agree with the instances they came from
        assert all(meta["classes"][lab] == meta["instances"][i]["class"] for lab, i in zip(data.labels, data.instance))


def test_meta_content(built):
    base, out = built
    meta = read_meta(out)
    assert meta["classes"] == ["hand_r", "hand_l", "block", "rod"]
    assert meta["twins"]["hand_r"] == "hand_l" and meta["twins"]["rod"] == "rod"
    assert meta["handed"] == {"hand_r": True, "hand_l": True, "block": False, "rod": False}
    assert meta["instances"][0] == {"class": "hand_r", "file": "hand_r/hand_r_g1.stl", "group": "g1",
                                    "split": meta["instances"][0]["split"]}
    assert meta["sampler"]["points"] == 48 and meta["sampler"]["copies"] == SMALL["copies"]
    assert meta["sampler"]["mode"] == "mixed" and meta["seed"] == 3
    assert meta["catalog"] == str((base / "cat").resolve())
    assert set(meta["versions"]) == {"shapes", "numpy", "trimesh", "torch"}
    assert meta["versions"]["trimesh"] == trimesh.__version__


def test_scale_is_size_in_mm(built):
    base, out = built
    meta = read_meta(out)
    data = load_split(out, "train")
    for k in range(len(data.labels)):
        inst = meta["instances"][data.instance[k]]
        mesh = trimesh.load(base / "cat" / inst["file"])
        # the stored scale is the RMS radius of the cloud before normalising: a cloud on the
        # surface cannot be farther out than the farthest vertex from the cloud's centroid,
        # and scales with the part (catalog sizes 1..4)
        assert 0 < data.scale[k] <= np.linalg.norm(mesh.vertices - mesh.vertices.mean(0), axis=1).max() * 1.5
    rods = [(meta["instances"][i]["group"], s) for i, s, lab in zip(data.instance, data.scale, data.labels)
            if meta["classes"][lab] == "rod"]
    by_size = sorted(rods)
    assert by_size[0][1] < by_size[-1][1]


def test_same_seed_same_arrays(built, tmp_path):
    base, out = built
    again = build_dataset(base / "cat", tmp_path / "again", seed=3, **SMALL)
    other = build_dataset(base / "cat", tmp_path / "other", seed=4, **SMALL)
    for split in ("train", "val", "test"):
        a, b = shard(out, split), shard(again, split)
        for key in KEYS:
            np.testing.assert_array_equal(a[key], b[key])
    a, c = shard(out, "train"), shard(other, "train")
    assert a["points"].shape != c["points"].shape or not np.allclose(a["points"], c["points"])


def test_scan_and_mixed_modes(built, tmp_path):
    base, _ = built
    copies = {"train": 2, "val": 1, "test": 1}
    # the mesh's normals, so that the hemisphere test below reads the scan's geometry alone
    scan = build_dataset(base / "cat", tmp_path / "scan", points=48, copies=copies, mode="scan", seed=1,
                         normals="mesh")
    surface = build_dataset(base / "cat", tmp_path / "surf", points=48, copies=copies, mode="surface", seed=1,
                            normals="mesh")
    mixed = build_dataset(base / "cat", tmp_path / "mixed", points=48, copies=copies, mode="mixed",
                          scan_fraction=0.5, seed=1, normals="mesh")

    def one_sided(out, split):
        # a single view of a convex block shows its normals within one hemisphere of the view
        data = load_split(out, split)
        flags = []
        for k in np.flatnonzero(data.labels == data.classes.index("block")):
            n = data.normals[k].astype(np.float64)
            mean = n.mean(0) / (np.linalg.norm(n.mean(0)) + 1e-12)
            flags.append(bool((n @ mean).min() > -1e-3))
        return flags

    assert all(one_sided(scan, "train"))
    assert not any(one_sided(surface, "train"))
    # mixed: copy 0 of each instance is a scan, copy 1 a surface sample
    assert one_sided(mixed, "train") == [True, False] * (len(one_sided(mixed, "train")) // 2)
    assert read_meta(mixed)["sampler"]["scan_fraction"] == 0.5
    # every cloud says what it is: kind 1 for a virtual scan, 0 for a full surface
    assert set(load_split(scan, "train").kind.tolist()) == {1}
    assert set(load_split(surface, "train").kind.tolist()) == {0}
    assert load_split(mixed, "train").kind.tolist() == [1, 0] * (len(load_split(mixed, "train").kind) // 2)
    assert np.all(load_split(surface, "train").visible == 1.0)


def test_default_mode_is_mixed_and_estimated_normals_are_unit_and_facing(built, tmp_path):
    base, out = built
    assert read_meta(out)["sampler"]["mode"] == "mixed"  # the default: meshes and scans alike
    copies = {"train": 2, "val": 1, "test": 1}
    est = build_dataset(base / "cat", tmp_path / "est", points=64, copies=copies, mode="scan", seed=1,
                        normals="estimated", normals_k=10, normals_points=400)
    a = load_split(est, "train")
    np.testing.assert_allclose(np.linalg.norm(a.normals, axis=-1), 1.0, atol=1e-5)
    # The block is an axis-aligned box and stays so (the scanner moves, not the part). On a flat face
    # the PCA normal is the face normal (closed form: the covariance of points on a plane has no
    # spread along its normal), here one of the axes. Its sign is right when it points away from the
    # cloud's centroid across the face: for a convex solid the outward normal at p satisfies
    # n . (p - q) >= 0 for every q in the solid (supporting hyperplane theorem), and the centroid of
    # points on the surface lies in the solid.
    block = a.normals[a.labels == a.classes.index("block")].astype(np.float64)
    pts = a.points[a.labels == a.classes.index("block")].astype(np.float64)
    along_axis = np.abs(block).max(axis=-1)
    assert np.median(along_axis) > 0.99 and (along_axis > 0.95).mean() > 0.8  # edges tilt a few
    # One sensor direction turns all of a view's normals: each cloud is all outward or all inward.
    # Which, is read from the bulge of its edges; a view that shows a single flat face has none, and
    # no rule can tell its side (here 1 of the 4 views came out reversed).
    outward = (np.einsum("mni,mni->mn", block, pts) > 0).mean(axis=1)
    assert np.all(np.maximum(outward, 1 - outward) > 0.9)
    assert np.mean(outward > 0.5) >= 0.75
    normals = read_meta(est)["sampler"]["normals"]
    assert normals["source"] == "estimated" and normals["k"] == 10 and normals["points"] == 400


def test_bad_mesh_leaves_nothing(tmp_path):
    cat = make_catalog(tmp_path / "cat")
    (cat / "rod" / "rod_g3.stl").write_bytes(b"")  # an empty file among good ones
    with pytest.raises(MeshError, match="rod_g3.stl is empty"):
        build_dataset(cat, tmp_path / "ds", **SMALL)
    assert not (tmp_path / "ds").exists()
    assert not [p for p in tmp_path.iterdir() if ".part" in p.name]


def test_too_few_groups_names_the_class(tmp_path):
    cat = make_catalog(tmp_path / "cat", groups=("g1", "g2"))
    with pytest.raises(DataError, match="class 'hand_r' .* has 2 group\\(s\\); need at least 3"):
        build_dataset(cat, tmp_path / "ds", **SMALL)


def test_split_groups_fractions(tmp_path):
    cat = read_catalog(make_catalog(tmp_path / "cat", groups=tuple(f"g{k}" for k in range(10))))
    split = split_groups(cat, (0.6, 0.2, 0.2), seed=0)
    counts = {s: sum(v == s for v in split.values()) for s in ("train", "val", "test")}
    assert counts == {"train": 6, "val": 2, "test": 2}  # hand-worked: 10 groups at 60/20/20
    assert split == split_groups(cat, (0.6, 0.2, 0.2), seed=0)
    assert any(split_groups(cat, (0.6, 0.2, 0.2), seed=s) != split for s in range(1, 4))
    with pytest.raises(ConfigError, match="split_fractions"):
        split_groups(cat, (0.5, 0.2, 0.2))


def test_out_dir_guards_and_replace(built, tmp_path):
    base, _ = built
    keep = tmp_path / "mine"
    keep.mkdir()
    (keep / "thesis.tex").write_text("precious")
    with pytest.raises(DataError, match="not a shapes dataset"):
        build_dataset(base / "cat", keep, **SMALL)
    assert (keep / "thesis.tex").read_text() == "precious"
    with pytest.raises(DataError, match="holds the catalog"):
        build_dataset(base / "cat", base, **SMALL)
    out = build_dataset(base / "cat", tmp_path / "ds", seed=0, **SMALL)
    build_dataset(base / "cat", out, seed=1, **SMALL)  # a dataset is replaced whole
    assert read_meta(out)["seed"] == 1


@pytest.mark.parametrize("kwargs, message", [
    ({"mode": "lidar"}, "mode should be one of"),
    ({"points": 1}, "points should be an integer >= 2"),
    ({"copies": {"train": 1}}, "copies should have keys"),
    ({"scan_fraction": 1.5}, "scan_fraction"),
    ({"noise": -1.0}, "noise"),
    ({"seed": -1}, "seed"),
    ({"normals": "faces"}, "normals should be one of"),
    ({"normals": "estimated", "normals_k": 2}, "normals_k should be an integer >= 3"),
])
def test_bad_options(built, tmp_path, kwargs, message):
    base, _ = built
    with pytest.raises(ConfigError, match=message):
        build_dataset(base / "cat", tmp_path / "ds", **kwargs)
    assert not (tmp_path / "ds").exists()
