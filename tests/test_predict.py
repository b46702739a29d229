"""The predict job: pose-averaged class probabilities, the calibrated "not a known part" threshold,
the mirror-twin caution, and one-line answers to bad input."""

import json
from pathlib import Path

import numpy as np
import pytest
import torch
import trimesh
from scipy.spatial.transform import Rotation

from conftest import DEMO, demo_file, one_error_line
from shapes.backbones import Classifier, build_backbone
from shapes.cli import main
from shapes.data import CleanSettings, load_split, read_meta
from shapes.run import load_classifier
from shapes.geometry import random_poses
from shapes.predict import HAND_NOTE, UNKNOWN, format_table, normals_k, normals_orientation, predict_files, read_input
from shapes.seeding import torch_generator
from shapes.run import save_checkpoint
from shapes.train import TrainSettings, train_classifier

CATALOG = json.loads((DEMO / "catalog.json").read_text())
CLASSES = [c["name"] for c in CATALOG["classes"]]
TWIN = {c["name"]: c["twin"] for c in CATALOG["classes"]}


@pytest.fixture(scope="module", autouse=True)
def one_thread():
    saved = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(saved)


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    """A 64-point dataset of the demo catalog, a briefly trained distance run (E3), and an untrained
    vector-gate run (SE3, normals, k = 40) sharing its metadata."""
    root = tmp_path_factory.mktemp("predict")
    data = root / "data"
    assert main(["sample", f"meshes={DEMO}", f"data={data}", "sample.points=64",
                 "sample.copies={train: 1, val: 1, test: 1}", "sample.oversample=1",
                 "sample.mode=surface", "sample.normals=mesh",  # full surfaces with the mesh's normals
                 "sample.twins=declared"]) == 0
    torch.manual_seed(0)  # building the backbone draws its weights: seeded, so the run is the same every time
    e3 = train_classifier(build_backbone("distance", hidden=16, k=8, layers=2), data, root / "e3",
                          TrainSettings(epochs=15, batch_size=16, threads=1))
    meta = torch.load(e3, weights_only=True)["meta"]
    torch.manual_seed(0)
    gate = build_backbone("vector_gate", scalars=8, vectors=2, layers=1, k=40, normals=True)
    model = Classifier(gate, len(meta["classes"]), hidden=16, dropout=0.0)
    se3 = save_checkpoint(root / "se3" / "checkpoint.pt", model, {
        **meta, "backbone": {"name": gate.name, "options": gate.config_dict(), "symmetry": gate.symmetry},
        "head": {"hidden": 16, "dropout": 0.0}})
    one_each = root / "one_each"
    for name in CLASSES:
        src = sorted((DEMO / name).iterdir())[0]
        (one_each / name).mkdir(parents=True)
        (one_each / name / src.name).write_bytes(src.read_bytes())
    return {"root": root, "data": data, "e3": e3, "se3": se3, "one_each": one_each}


def test_every_row_is_a_distribution_over_the_catalog(tiny):
    result = predict_files(tiny["e3"], tiny["one_each"], poses=4, seed=0)
    assert [r["file"].split("/")[0] for r in result["results"]] == sorted(CLASSES)
    threshold = result["threshold"]["value"]
    for r in result["results"]:
        probs = np.array(list(r["probabilities"].values()))
        # reference: demo_meshes/catalog.json names the classes; closed form: a softmax sums to 1
        assert list(r["probabilities"]) == CLASSES and r["top"]["class"] in CLASSES
        assert probs.sum() == pytest.approx(1.0, abs=1e-9)
        # reference: catalog.json's twins; the E3 run's score merges each handed class with its twin
        p = r["probabilities"]
        assert r["score"] == pytest.approx(max(p[c] + (p[TWIN[c]] if TWIN[c] != c else 0.0) for c in CLASSES))
        # closed form: top and runner-up are the two largest probabilities
        first, second = np.sort(probs)[::-1][:2]
        assert r["top"]["probability"] == pytest.approx(first) and r["runner_up"]["probability"] == pytest.approx(second)
        assert r["runner_up"]["class"] != r["top"]["class"]
        # common practice: open-set rejection accepts a score at or above the threshold
        assert r["known"] == (r["score"] >= threshold)
        assert r["answer"] == (r["top"]["class"] if r["known"] else UNKNOWN)
        assert 1 <= r["poses_agreeing"] <= r["poses"] == 4
        assert r["poses_agreed"] == (r["poses_agreeing"] == 4)


def test_mesh_is_sampled_exactly_like_the_training_shards(tiny):
    # reference: the val shard written by `shapes sample` (build_dataset draws instance i, copy k
    # from SeedSequence([seed, i, k]))
    meta = read_meta(tiny["data"])
    val = load_split(tiny["data"], "val")
    i = int(val.instance[0])
    inst = meta["instances"][i]
    ckpt_meta = torch.load(tiny["e3"], weights_only=True)["meta"]
    gen = np.random.default_rng(np.random.SeedSequence([0, i, 0]))
    cloud = read_input(Path(meta["catalog"]) / inst["file"], ckpt_meta, seed=gen)
    np.testing.assert_array_equal(cloud.points, val.points[0])
    np.testing.assert_array_equal(cloud.normals, val.normals[0])


def test_threshold_is_the_numpy_quantile_of_validation_scores(tiny):
    accept, poses = 0.8, 3
    result = predict_files(tiny["e3"], demo_file("hex_nut"), poses=poses, accept=accept, seed=5)
    model, meta = load_classifier(tiny["e3"])
    val = load_split(tiny["data"], "val")
    rotations = random_poses("any", poses, generator=torch_generator(5))
    scores = []
    with torch.no_grad():
        for cloud in torch.tensor(np.asarray(val.points)):
            p = np.mean([torch.softmax(model(cloud[None] @ r.T), -1)[0].double().numpy() for r in rotations], axis=0)
            # this E3 backbone cannot see hand: a handed class's score joins its twin's probability
            scores.append(max(p[k] + (p[CLASSES.index(TWIN[c])] if TWIN[c] != c else 0.0)
                              for k, c in enumerate(CLASSES)))
    # reference: numpy.quantile (default linear rule) at 1 - accept
    expected = np.quantile(scores, 1 - accept)
    assert result["threshold"]["value"] == pytest.approx(expected, rel=1e-5)
    assert result["threshold"]["accepted"] == pytest.approx(np.mean(np.array(scores) >= result["threshold"]["value"]))
    assert result["threshold"]["validation_clouds"] == len(val) and result["threshold"]["accept"] == accept


def test_an_invariant_backbone_gives_the_same_answer_in_any_pose_and_mirror_image(tiny, tmp_path):
    mesh = trimesh.load(demo_file("spur_gear"), process=False)
    turned = mesh.copy()
    rot = Rotation.random(random_state=3).as_matrix()  # reference: scipy's uniform random rotation
    turned.vertices = mesh.vertices @ rot.T + np.array([40.0, -7.0, 3.0])
    mesh.export(tmp_path / "gear.ply")
    turned.export(tmp_path / "gear_turned.ply")
    cloud = np.random.default_rng(1).normal(size=(64, 3)) * [3.0, 1.0, 0.5]
    np.save(tmp_path / "cloud.npy", cloud)
    np.save(tmp_path / "cloud_mirror.npy", cloud * [1.0, -1.0, 1.0])
    rows = {r["file"]: r for r in predict_files(tiny["e3"], tmp_path, poses=3, seed=2)["results"]}
    # closed form: distances between points do not change under rotations, reflections and translations,
    # so a distance-only network (symmetry E3, docs/design.md "Backbone contract") gives the same answer
    for a, b in (("gear.ply", "gear_turned.ply"), ("cloud.npy", "cloud_mirror.npy")):
        pa, pb = (np.array(list(rows[f]["probabilities"].values())) for f in (a, b))
        np.testing.assert_allclose(pa, pb, atol=1e-5)


def test_a_handed_backbone_keeps_its_answer_in_any_pose_but_not_in_the_mirror(tiny, tmp_path):
    points = np.random.default_rng(4).normal(size=(64, 3)) * [3.0, 1.5, 0.7]
    normals = np.random.default_rng(5).normal(size=(64, 3))
    rot = Rotation.random(random_state=6).as_matrix()  # reference: scipy's uniform random rotation
    flip = np.diag([-1.0, 1.0, 1.0])
    np.savez(tmp_path / "a.npz", points=points, normals=normals)
    np.savez(tmp_path / "a_turned.npz", points=points @ rot.T, normals=normals @ rot.T)
    np.savez(tmp_path / "a_mirror.npz", points=points @ flip, normals=normals @ flip)
    rows = {r["file"]: np.array(list(r["probabilities"].values()))
            for r in predict_files(tiny["se3"], tmp_path, poses=2, seed=0)["results"]}
    # closed form: det[Q a, Q b, Q c] = det(Q) det[a, b, c], so triple products change sign under a reflection
    # (SE3 backbone; docs/design.md, "Parity and handedness")
    np.testing.assert_allclose(rows["a.npz"], rows["a_turned.npz"], atol=1e-5)
    assert np.abs(rows["a.npz"] - rows["a_mirror.npz"]).max() > 1e-4


def test_the_hand_caution_follows_the_backbone_symmetry(tiny):
    # reference: README cautions, a model that cannot see handedness must not be used to sort handed parts
    e3 = predict_files(tiny["e3"], tiny["one_each"], poses=2, accept=1.0, seed=0)["results"]
    for r in e3:
        handed = TWIN[r["top"]["class"]] != r["top"]["class"]
        assert any(HAND_NOTE in n for n in r["notes"]) == (handed and r["known"])
    assert any(r["notes"] for r in e3)  # 8 of the 16 classes are handed: some row carries the note
    se3 = predict_files(tiny["se3"], tiny["one_each"], poses=2, accept=1.0, seed=0)["results"]
    assert not any(r["notes"] for r in se3)


def test_a_non_part_comes_out_unknown_when_the_threshold_is_high(tiny, tmp_path):
    trimesh.creation.icosphere(subdivisions=3, radius=12.0).export(tmp_path / "ball.stl")
    result = predict_files(tiny["e3"], tmp_path / "ball.stl", poses=4, accept=0.2, seed=0)
    (row,) = result["results"]
    # common practice: max-softmax open-set rejection; a sphere is no part of the catalog
    assert row["known"] is False and row["answer"] == UNKNOWN and row["score"] < result["threshold"]["value"]
    assert f"{UNKNOWN}, nearest {row['top']['class']}" in format_table(result)
    # a lower acceptance share never lowers the threshold (quantiles are monotone)
    lenient = predict_files(tiny["e3"], tmp_path / "ball.stl", poses=4, accept=0.99, seed=0)
    assert lenient["threshold"]["value"] <= result["threshold"]["value"]


def test_point_files_are_thinned_to_the_training_count_and_keep_their_normals(tiny, tmp_path):
    mesh = trimesh.load(demo_file("bushing"), process=False)
    points, faces = trimesh.sample.sample_surface(mesh, 500, seed=0)  # reference: trimesh's sampler
    np.savetxt(tmp_path / "dense.xyz", points)
    trimesh.PointCloud(points).export(tmp_path / "bare.ply")
    np.savez(tmp_path / "with_normals.npz", points=points, normals=mesh.face_normals[faces])
    meta = torch.load(tiny["e3"], weights_only=True)["meta"]
    dense = read_input(tmp_path / "dense.xyz", meta)
    assert dense.points.shape == (64, 3) and dense.normals is None and "thinned to 64" in dense.source
    # closed form: normalised to centroid 0 and unit RMS radius, as the shards are
    np.testing.assert_allclose(dense.points.mean(0), 0.0, atol=1e-6)
    assert np.mean(np.sum(dense.points.astype(np.float64) ** 2, axis=1)) == pytest.approx(1.0, abs=1e-5)
    assert read_input(tmp_path / "bare.ply", meta).normals is None
    with_normals = read_input(tmp_path / "with_normals.npz", meta)
    np.testing.assert_allclose(np.linalg.norm(with_normals.normals, axis=1), 1.0, atol=1e-6)
    rows = predict_files(tiny["se3"], tmp_path / "with_normals.npz", poses=2, clean=CleanSettings.off())["results"]
    assert rows[0]["source"] == "points, 500 thinned to 64 with normals"
    cleaned = predict_files(tiny["se3"], tmp_path / "with_normals.npz", poses=2)["results"][0]
    removed = sum(step["removed"] for step in cleaned["cleanup"])
    assert [step["step"] for step in cleaned["cleanup"]] == ["stray points"]  # the only step on by default
    assert cleaned["source"] == (f"points, 500, {removed} removed by clean-up, thinned to 64 with normals"
                                 if removed else "points, 500 thinned to 64 with normals")
    # a PLY vertex list with nx ny nz (the PLY format's normal properties), written by hand
    normals = mesh.face_normals[faces[:64]] * 2.0  # not unit length: read_input rescales them
    header = ("ply\nformat ascii 1.0\nelement vertex 64\n" + "".join(f"property float {k}\n" for k in
              ("x", "y", "z", "nx", "ny", "nz")) + "end_header\n")
    rows = "\n".join(" ".join(f"{v:.7f}" for v in row) for row in np.hstack([points[:64], normals]))
    (tmp_path / "oriented.ply").write_text(header + rows + "\n")
    oriented = read_input(tmp_path / "oriented.ply", meta, clean=CleanSettings.off())
    np.testing.assert_allclose(oriented.normals, normals / 2.0, atol=1e-5)


def test_a_bare_xyz_file_gets_estimated_normals_for_a_backbone_that_takes_them(tiny, tmp_path):
    sphere = np.random.default_rng(3).normal(size=(300, 3))
    sphere /= np.linalg.norm(sphere, axis=1, keepdims=True)
    np.savetxt(tmp_path / "ball.xyz", sphere * 20.0 + 5.0)  # millimetres, off centre
    meta = torch.load(tiny["se3"], weights_only=True)["meta"]
    # a whole closed surface is a cloud merged from several views: predict.orientation=propagate
    cloud = read_input(tmp_path / "ball.xyz", meta, needs_normals=True, clean=CleanSettings.off(),
                       orientation="propagate")
    # this run records no sampler.normals.points (older runs): estimated on as many points as it keeps
    assert cloud.source == ("points, 300 thinned to 64, normals estimated (local PCA on 64 points, k=16, "
                            "MST orientation)")
    # closed form: the outward normal of a sphere at p (centred at 0 after normalising) is p / |p|
    radial = cloud.points / np.linalg.norm(cloud.points, axis=1, keepdims=True)
    assert np.mean(np.sum(cloud.normals * radial, axis=1) > 0.9) >= 0.95
    # a run that records it has the normals estimated on that many points, before thinning; on
    # more points the PCA plane hugs the sphere closer (its tilt from the tangent plane shrinks with
    # the neighbourhood's radius), closed form again: p / |p|
    dense_meta = {**meta, "data": {**meta["data"], "sampler": {
        **(meta["data"].get("sampler") or {}), "normals": {"source": "estimated", "k": 16, "points": 300}}}}
    dense = read_input(tmp_path / "ball.xyz", dense_meta, needs_normals=True, clean=CleanSettings.off(),
                       orientation="propagate")
    assert "local PCA on 300 points" in dense.source and dense.points.shape == (64, 3)
    dense_radial = dense.points / np.linalg.norm(dense.points, axis=1, keepdims=True)
    fine = np.abs(np.sum(dense.normals * dense_radial, axis=1))
    coarse = np.abs(np.sum(cloud.normals * radial, axis=1))
    assert np.median(fine) > np.median(coarse) and np.median(fine) > 0.99
    # the default (this run records no orientation) is the single-view rule: one side of a closed
    # sphere is turned inward, which is why a merged cloud needs the option
    single = read_input(tmp_path / "ball.xyz", meta, needs_normals=True, clean=CleanSettings.off())
    assert single.source.endswith("single-view orientation)")
    assert 0.2 < np.mean(np.sum(single.normals * radial, axis=1) > 0.9) < 0.8
    # one view of the same sphere (the half facing +z, a sensor far above): every normal faces it
    top = sphere[sphere[:, 2] > 0.1]
    np.savetxt(tmp_path / "cap.xyz", top * 20.0)
    cap = read_input(tmp_path / "cap.xyz", meta, needs_normals=True, clean=CleanSettings.off())
    assert np.mean(cap.normals[:, 2] > 0) >= 0.95  # closed form: the cap's outward normals all have z > 0
    rows = predict_files(tiny["se3"], tmp_path / "ball.xyz", poses=2)["results"]
    assert "normals estimated" in rows[0]["source"] and sum(rows[0]["probabilities"].values()) == pytest.approx(1.0)
    assert read_input(tmp_path / "ball.xyz", meta).normals is None  # a backbone without normals gets none


def test_estimated_normals_follow_the_run_k_and_orientation_when_recorded():
    # the sampler metadata may lack the normals key (older runs): k 16 and the single-view rule, which suits
    # the commonest bare file, one view of a scanner
    assert normals_k({"data": {"sampler": {}}}) == 16 and normals_orientation({"data": {}}) == "single-view"
    meta = {"data": {"sampler": {"normals": {"source": "estimated", "k": 24, "orientation": "single-view"}}}}
    assert normals_k(meta) == 24 and normals_orientation(meta) == "single-view"
    assert normals_k({"data": {"sampler": {"normals": {"k": "many"}}}}) == 16  # unreadable: the default


def test_same_seed_same_answer(tiny):
    a = predict_files(tiny["e3"], demo_file("v_pulley"), poses=3, seed=7)
    b = predict_files(tiny["e3"], demo_file("v_pulley"), poses=3, seed=7)
    assert a == b  # reference: shapes.seeding convention, same seed gives the same result


def test_cli_prints_a_table_and_writes_json(tiny, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    out = tmp_path / "answers" / "predicted.json"
    assert main(["predict", f"run={tiny['e3'].parent}", f"predict.input={tiny['one_each']}", f"predict.out={out}",
                 "predict.poses=2", "predict.threads=1"]) == 0
    text = capsys.readouterr().out
    saved = json.loads(out.read_text())  # reference: json.loads parses what was written
    assert len(saved["results"]) == len(CLASSES) and saved["threshold"]["accept"] == 0.95
    assert "rule" in saved["threshold"] and saved["symmetry"] == "E3"
    assert "file" in text and "runner-up" in text and f"wrote {out}" in text
    for r in saved["results"]:
        assert r["file"] in text
    assert not list(out.parent.glob(".*part*"))


def test_verb_help_lists_the_predict_options(capsys):
    assert main(["predict", "--help"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("shapes predict:") and "predict:" in out and "accept: 0.95" in out


def _bad_inputs(tmp: Path) -> None:
    (tmp / "empty").mkdir()
    (tmp / "garbage.stl").write_bytes(b"\x00not a mesh at all" * 3)
    np.save(tmp / "flat.npy", np.zeros((50, 2)))
    np.save(tmp / "few.npy", np.random.default_rng(0).normal(size=(20, 3)))
    np.save(tmp / "bare.npy", np.random.default_rng(0).normal(size=(100, 3)))
    np.savez(tmp / "few_for_k.npz", points=np.random.default_rng(0).normal(size=(35, 3)),
             normals=np.ones((35, 3)))
    np.savez(tmp / "no_points.npz", cloud=np.zeros((40, 3)))
    (tmp / "notes.doc").write_text("hello")
    (tmp / "mixed").mkdir()
    (tmp / "mixed" / "good.ply").write_bytes(demo_file("hex_nut").read_bytes())
    (tmp / "mixed" / "broken.stl").write_bytes(b"")


# A usage error (a bad option, no input, no run) stops before any file is read: exit 2, nothing written.
@pytest.mark.parametrize("run,target,options,needle", [
    ("e3", "nowhere.stl", [], "not found"),
    ("e3", "empty", [], "holds no scan or mesh files"),
    ("e3", None, [], "predict.input is not set"),
    ("e3", "bare.npy", ["predict.accept=1.5"], "predict.accept should be a finite number in (0, 1]"),
    ("e3", "bare.npy", ["predict.regime=mirrored"], "predict.regime should be one of cad, upright, any"),
    ("e3", "bare.npy", ["predict.regime=so3"], "predict.regime 'so3' is now called 'any'"),
    ("e3", "bare.npy", ["predict.poses=0"], "predict.poses should be an integer >= 1"),
    ("e3", "bare.npy", ["predict.units=cm"], "predict.units should be one of mm, m, in"),
    ("e3", "bare.npy", ["predict.normals=mesh"], "predict.normals should be one of auto, file, estimated"),
    ("e3", "bare.npy", ["predict.viewpoint=[1,2]"], "predict.viewpoint should be null or 3 numbers"),
    ("e3", "bare.npy", ["predict.clean.stray_std=-1"], "clean.stray_std should be a positive number"),
    ("e3", "bare.npy", ["+predict.clean.colour=1"], "clean has no option 'colour'"),
    ("nowhere", "bare.npy", [], "no checkpoint"),
    ("e3", "bare.npy", ["predict.calibration=nowhere"], "cannot calibrate"),
])
def test_bad_input_gives_one_line_exit_2_and_writes_nothing(tiny, tmp_path, monkeypatch, capsys,
                                                            run, target, options, needle):
    monkeypatch.chdir(tmp_path)
    _bad_inputs(tmp_path)
    before = sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*"))
    run_path = tiny[run].parent if run in tiny else tmp_path / run
    argv = ["predict", f"run={run_path}", *options] + ([f"predict.input={tmp_path / target}"] if target else [])
    assert main(argv) == 2
    assert needle in one_error_line(capsys)
    # nothing written: no predictions.json, no temporary file
    assert sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*")) == before


def test_a_failed_run_leaves_the_previous_json_untouched(tiny, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    good = tmp_path / "good.npy"
    np.save(good, np.random.default_rng(0).normal(size=(80, 3)))
    assert main(["predict", f"run={tiny['e3'].parent}", f"predict.input={good}", "predict.poses=1"]) == 0
    written = (tmp_path / "predictions.json").read_bytes()
    assert main(["predict", f"run={tiny['e3'].parent}", f"predict.input={good}", "predict.poses=0"]) == 2
    capsys.readouterr()
    assert (tmp_path / "predictions.json").read_bytes() == written
    assert sorted(p.name for p in tmp_path.iterdir()) == ["good.npy", "predictions.json"]
    # a bad file is no usage error: the run completes, its row says why, and the status is 1
    np.save(good, np.zeros((80, 4)))
    assert main(["predict", f"run={tiny['e3'].parent}", f"predict.input={good}", "predict.poses=1"]) == 1
    (row,) = json.loads((tmp_path / "predictions.json").read_text())["results"]
    assert row == {"file": "good.npy", "error": "should hold an array of shape (N, 3), got (80, 4) instead "
                                                 "(or (N, 6): x y z nx ny nz)."}
    assert "error: good.npy: should hold an array of shape (N, 3)" in capsys.readouterr().out


# ---------------------------------------------------------------- a batch that survives bad scans


def _ply_binary(path: Path, points: np.ndarray, promise: int | None = None) -> None:
    # source: PLY format (Turk 1994): ASCII header, then little-endian float32 rows of the vertex element
    header = (f"ply\nformat binary_little_endian 1.0\nelement vertex {promise or len(points)}\n"
              "property float x\nproperty float y\nproperty float z\nend_header\n").encode()
    path.write_bytes(header + points.astype("<f4").tobytes())


def _cloud(n=200, seed=0):
    return np.random.default_rng(seed).normal(size=(n, 3)) * [20.0, 10.0, 5.0]


def _write_bad_scans(folder: Path) -> dict:
    """Each bad file and a phrase its one-line error must hold."""
    folder.mkdir(parents=True, exist_ok=True)
    pts = _cloud()
    (folder / "empty.xyz").write_bytes(b"")
    _ply_binary(folder / "truncated.ply", pts)
    (folder / "truncated.ply").write_bytes((folder / "truncated.ply").read_bytes()[:-100])
    (folder / "promises_more.ply").write_text(
        "ply\nformat ascii 1.0\nelement vertex 300\nproperty float x\nproperty float y\nproperty float z\n"
        "end_header\n" + "\n".join(" ".join(f"{v:.5f}" for v in r) for r in pts) + "\n")
    nan = pts.copy()
    nan[7] = np.nan
    np.savetxt(folder / "nan_rows.xyz", nan)
    np.savetxt(folder / "two_columns.csv", pts[:, :2], delimiter=",")
    np.savetxt(folder / "identical.xyz", np.tile([1.0, 2.0, 3.0], (50, 1)))
    (folder / "single.xyz").write_text("1 2 3\n")
    t = np.linspace(0, 1, 100)[:, None]
    np.savetxt(folder / "collinear.xyz", t * [1.0, 2.0, 3.0] + [5.0, 0.0, 0.0])
    np.save(folder / "coplanar.npy", np.c_[pts[:, :2], np.full(len(pts), 4.0)])
    np.savetxt(folder / "few_distinct.xyz", np.repeat(pts[:40], 25, axis=0))
    # decimal commas with ',' between the columns as well: '-0,1072,-9,1757,3,2' cannot be split
    (folder / "decimal_comma.csv").write_text("\n".join(",".join(f"{v:.4f}".replace(".", ",") for v in r) for r in pts))
    (folder / "latin1.txt").write_bytes("x y z  # Messung \xb0C\n".encode("latin-1") +
                                        "\n".join(" ".join(f"{v:.4f}" for v in r) for r in pts).encode())
    (folder / "renamed_binary.xyz").write_bytes(pts.astype("<f8").tobytes())
    (folder / "zero.e57").write_bytes(b"")
    (folder / "corrupt.e57").write_bytes(b"ASTM-E57" + bytes(range(256)) * 8)
    (folder / "scan.las").write_bytes(b"LASF" + b"\0" * 200)
    (folder / "words.xyz").write_text("1 2 3\n4 5 6\n7 eight 9\n")
    np.save(folder / "flat.npy", pts[:, :2])
    np.savez(folder / "no_points.npz", cloud=pts)
    (folder / "garbage.stl").write_bytes(b"\x00not a mesh at all" * 3)
    np.save(folder / "few.npy", pts[:20])
    (folder / "unreadable").mkdir()  # a sub-folder with no readable file
    (folder / "unreadable" / "a.stl").write_bytes(b"")
    (folder / "unreadable" / "b.ply").write_bytes(b"\x00\x01 not a ply" * 4)
    return {
        "empty.xyz": "is empty (0 bytes)",
        "truncated.ply": "truncated binary PLY: the header promises 200 vertices (2400 bytes) but 2300 bytes follow",
        "promises_more.ply": "the PLY header promises 300 vertices, found 200 rows",
        "nan_rows.xyz": "NaN or inf coordinates (first at row 7)",
        "two_columns.csv": "line 1: expected at least 3 columns (x y z), found 2",
        "identical.xyz": "all 50 points are identical",
        "single.xyz": "holds a single point",
        "collinear.xyz": "all 100 points lie on one line",
        "coplanar.npy": "all 200 points lie on one plane",
        "few_distinct.xyz": "only 40 distinct points among 1000 rows",
        "decimal_comma.csv": "decimal commas",
        "latin1.txt": "is not a UTF-8 text file",
        "renamed_binary.xyz": "is binary (it holds NUL bytes)",
        "zero.e57": "is empty (0 bytes)",
        "corrupt.e57": "could not be read as E57",
        "scan.las": "unsupported suffix '.las'",
        "words.xyz": "line 3: expected numbers, found '7 eight 9'",
        "flat.npy": "shape (N, 3), got (200, 2)",
        "no_points.npz": "should hold an array 'points'",
        "garbage.stl": "truncated binary STL",
        "few.npy": "has 20 points; need at least 32",
        "unreadable/a.stl": "is empty (0 bytes)",
        "unreadable/b.ply": "could not be parsed as PLY",
    }


def test_every_bad_scan_gets_its_own_error_row_and_the_rest_are_classified(tiny, tmp_path, monkeypatch, capsys):
    folder = tmp_path / "scans"
    expected = _write_bad_scans(folder)
    good = {"good.npy", "good_semicolon.csv", "hex_nut.ply"}
    np.save(folder / "good.npy", _cloud(300, seed=1))
    # a decimal-comma file with ';' between the columns reads (common practice in locales that write 3,2)
    (folder / "good_semicolon.csv").write_text("x;y;z\n" + "\n".join(
        ";".join(f"{v:.4f}".replace(".", ",") for v in r) for r in _cloud(300, seed=1)))
    (folder / "hex_nut.ply").write_bytes(demo_file("hex_nut").read_bytes())
    monkeypatch.chdir(tmp_path)
    assert main(["predict", f"run={tiny['e3'].parent}", f"predict.input={folder}", "predict.poses=2"]) == 1
    captured = capsys.readouterr()
    assert "Traceback" not in captured.out + captured.err
    (summary,) = captured.err.strip().splitlines()
    assert summary.startswith("error: 23 of 26 file(s) could not be classified")
    saved = json.loads((tmp_path / "predictions.json").read_text())
    rows = {r["file"]: r for r in saved["results"]}
    assert set(rows) == set(expected) | good and saved["failed"] == len(expected) >= 15
    table = captured.out.splitlines()
    for name, needle in expected.items():
        assert needle in rows[name]["error"], (name, rows[name])
        assert "\n" not in rows[name]["error"] and set(rows[name]) == {"file", "error"}
        (line,) = [ln for ln in table if ln.startswith(f"error: {name}: ")]
        assert needle in line
    for name in good:
        assert rows[name]["top"]["class"] in CLASSES and "error" not in rows[name]
    # the two spellings of the same cloud read to the same points, so they get the same answer
    assert rows["good.npy"]["probabilities"] == pytest.approx(rows["good_semicolon.csv"]["probabilities"], abs=1e-6)


def test_a_folder_of_only_bad_files_still_writes_its_rows_and_exits_1(tiny, tmp_path, monkeypatch, capsys):
    folder = tmp_path / "bad"
    folder.mkdir()
    (folder / "a.xyz").write_bytes(b"")
    (folder / "b.e57").write_bytes(b"not an e57 file at all")
    monkeypatch.chdir(tmp_path)
    assert main(["predict", f"run={tiny['e3'].parent}", f"predict.input={folder}", "predict.poses=1"]) == 1
    saved = json.loads((tmp_path / "predictions.json").read_text())
    assert [r["file"] for r in saved["results"]] == ["a.xyz", "b.e57"] and saved["failed"] == 2
    assert capsys.readouterr().err.startswith("error: 2 of 2 file(s) could not be classified")


@pytest.mark.slow
def test_a_ten_million_point_scan_is_classified_beside_a_small_one(tiny, tmp_path):
    folder = tmp_path / "big"
    folder.mkdir()
    gen = np.random.default_rng(0)
    n = 10_000_000
    unit = gen.normal(size=(n, 3)).astype(np.float32)
    unit /= np.linalg.norm(unit, axis=1, keepdims=True)
    _ply_binary(folder / "ten_million.ply", unit * np.float32(20.0))
    del unit
    np.save(folder / "small.npy", _cloud(300))
    result = predict_files(tiny["e3"], folder, poses=1, seed=0)
    rows = {r["file"]: r for r in result["results"]}
    assert result["failed"] == 0 and set(rows) == {"ten_million.ply", "small.npy"}
    assert rows["ten_million.ply"]["source"].startswith("points, 10000000 read as ")
    assert any("thinned to" in note and "while reading" in note for note in rows["ten_million.ply"]["reading"])


def test_a_run_from_before_signed_normals_loads_with_signed_normals(tiny, tmp_path):
    # A checkpoint's options are what its weights were trained with. Runs written before the
    # option existed read the normals' signs; loading them with the new default (axes) would keep
    # every weight and silently change what the network computes.
    from shapes.run import load_classifier

    payload = torch.load(tiny["se3"], weights_only=True)
    assert payload["meta"]["backbone"]["options"]["signed_normals"] is False  # new runs record it
    old = {**payload, "meta": {**payload["meta"], "backbone": {**payload["meta"]["backbone"], "options": {
        k: v for k, v in payload["meta"]["backbone"]["options"].items() if k != "signed_normals"}}}}
    torch.save(old, tmp_path / "checkpoint.pt")
    legacy, _ = load_classifier(tmp_path / "checkpoint.pt")
    current, _ = load_classifier(tiny["se3"])
    assert legacy.backbone.config.signed_normals is True and current.backbone.config.signed_normals is False
