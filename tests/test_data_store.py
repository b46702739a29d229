"""A dataset on disk: per-split folders of plain .npy arrays, written whole or not at all, loaded as
read-only memory maps; folders of the earlier .npz layout still load and train alike."""

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import torch
import trimesh
from torch.utils.data import DataLoader

import shapes.data._build as build
from shapes.backbones import build_backbone
from shapes.cli import main
from shapes.data import CloudDataset, build_dataset, collate_clouds, draw_cloud, load_split, read_mesh, read_meta
from shapes.data._store import DTYPES, SplitWriter
from shapes.errors import DataError
from shapes.train import TrainSettings, train_classifier

ROOT = Path(__file__).resolve().parent.parent
KEYS = ("points", "normals", "labels", "instance", "scale", "kind", "visible")
SETTINGS = dict(points=40, copies={"train": 3, "val": 1, "test": 1}, mode="surface", oversample=2, seed=5,
                twins="declared")


def one_error_line(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: "), err
    return err[0]


def make_catalog(root: Path) -> Path:
    for cls, make in (("box", lambda s: trimesh.creation.box(extents=(s, 1, 2))),
                      ("rod", lambda s: trimesh.creation.cylinder(radius=0.3 * s, height=3.0, sections=10))):
        (root / cls).mkdir(parents=True, exist_ok=True)
        for k in range(3):
            make(1.0 + k).export(root / cls / f"{cls}{k}.stl")
    return root


@pytest.fixture(scope="module")
def sampled(tmp_path_factory):
    base = tmp_path_factory.mktemp("store")
    catalog = make_catalog(base / "cat")
    return catalog, build_dataset(catalog, base / "ds", **SETTINGS)


def repack_as_npz(dataset: Path, out: Path) -> Path:
    """The same dataset in the earlier layout (format 1): one train.npz / val.npz / test.npz."""
    out.mkdir()
    meta = read_meta(dataset)
    for split in ("train", "val", "test"):
        np.savez(out / f"{split}.npz", **{k: np.load(dataset / split / f"{k}.npy") for k in KEYS})
    (out / "meta.json").write_text(json.dumps({**meta, "format": 1}))
    return out


def test_writer_output_loads_as_read_only_maps_holding_what_was_written(tmp_path):
    rng = np.random.default_rng(0)
    m, n = 7, 5
    rows = {"points": rng.normal(size=(m, n, 3)), "normals": rng.normal(size=(m, n, 3)),
            "labels": rng.integers(0, 2, m), "instance": np.arange(m), "scale": rng.uniform(1, 2, m),
            "kind": rng.integers(0, 2, m), "visible": rng.uniform(0, 1, m)}
    writer = SplitWriter(tmp_path / "train", m, n)
    writer.add(**{k: v[0] for k, v in rows.items()})  # one cloud ...
    writer.add(**{k: v[1:] for k, v in rows.items()})  # ... then a block of them
    writer.close()
    for split in ("val", "test"):
        SplitWriter(tmp_path / split, 0, n).close()
    meta = {"format": 2, "classes": ["a", "b"], "twins": {"a": "a", "b": "b"}, "handed": {"a": False, "b": False},
            "instances": [], "sampler": {}, "counts": {"train": m, "val": 0, "test": 0}}
    (tmp_path / "meta.json").write_text(json.dumps(meta))

    data = load_split(tmp_path, "train")
    for key in ("points", "normals"):
        array = getattr(data, key)
        # numpy.memmap: the pages of the file, not a copy (numpy.load(mmap_mode="r")), and read-only
        assert isinstance(array, np.memmap) and Path(array.filename) == tmp_path / "train" / f"{key}.npy"
        assert not array.flags.writeable
    for key, dtype in DTYPES.items():
        got = getattr(data, key)
        assert got.dtype == dtype
        np.testing.assert_array_equal(got, rows[key].astype(dtype))  # float32 storage: the cast, exactly
    pick = [5, 0, 3]
    points, normals, labels = data.batch(pick)  # in the order asked, copies of those rows alone
    np.testing.assert_array_equal(points, rows["points"][pick].astype(np.float32))
    np.testing.assert_array_equal(normals, rows["normals"][pick].astype(np.float32))
    assert labels.tolist() == rows["labels"][pick].tolist()
    assert not isinstance(points, np.memmap) and points.flags.writeable and points.flags.c_contiguous
    assert len(load_split(tmp_path, "val")) == 0


def test_sampled_dataset_is_mapped_and_holds_each_drawn_cloud(sampled):
    catalog, out = sampled
    meta = read_meta(out)
    assert meta["format"] == 2
    data = load_split(out, "train")
    assert isinstance(data.points, np.memmap) and isinstance(data.normals, np.memmap)
    # reference: build_dataset's contract, cloud (instance i, copy k) drawn from SeedSequence([seed, i, k])
    s = {"points": SETTINGS["points"], "oversample": SETTINGS["oversample"], "noise": 0.0}
    for row in (0, len(data) - 1):
        i = int(data.instance[row])
        k = int(np.sum(data.instance[:row] == i))
        gen = np.random.default_rng(np.random.SeedSequence([SETTINGS["seed"], i, k]))
        pts, nrm, scale, visible = draw_cloud(read_mesh(catalog / meta["instances"][i]["file"]), False, s, gen)
        np.testing.assert_array_equal(data.points[row], pts.astype(np.float32))
        np.testing.assert_array_equal(data.normals[row], nrm.astype(np.float32))
        assert data.scale[row] == np.float32(scale) and data.visible[row] == np.float32(visible)


def test_the_dataset_and_a_loader_gather_batches_from_the_map(sampled):
    _, out = sampled
    data = load_split(out, "train")
    ds = CloudDataset(data, transform=lambda p: 2 * p)
    points, mask, labels = next(iter(DataLoader(ds, batch_size=4, shuffle=False, collate_fn=collate_clouds)))
    np.testing.assert_array_equal(points.numpy(), 2 * np.asarray(data.points[:4]))
    assert bool(mask.all()) and labels.tolist() == data.labels[:4].tolist()
    one, label = ds[3]  # one item alone is the same as in a batch
    np.testing.assert_array_equal(one.numpy(), points[3].numpy())
    assert label == labels[3]
    one += 1  # a copy: the mapped file is not touched
    np.testing.assert_array_equal(points[3].numpy(), 2 * np.asarray(data.points[3]))


def _train(data: Path, run: Path) -> tuple[dict, list]:
    torch.manual_seed(0)  # the caller seeds the backbone's weights (train_classifier seeds the head)
    backbone = build_backbone("vector_gate", scalars=4, vectors=2, k=4, layers=1)
    ckpt = train_classifier(backbone, data, run, TrainSettings(epochs=2, batch_size=4, threads=1, mirror=0.5,
                                                              jitter=0.01))
    history = json.loads((run / "train_history.json").read_text())["history"]
    return (torch.load(ckpt, weights_only=True)["state_dict"],
            [{k: v for k, v in row.items() if "seconds" not in k} for row in history])


def test_an_npz_dataset_still_loads_whole_and_trains_to_the_same_weights(sampled, tmp_path):
    _, out = sampled
    old = repack_as_npz(out, tmp_path / "old")
    for split in ("train", "val", "test"):
        a, b = load_split(out, split), load_split(old, split)
        assert not isinstance(b.points, np.memmap)  # format 1: read whole, as before
        for key in KEYS:
            np.testing.assert_array_equal(getattr(a, key), getattr(b, key))
    # common practice: one seed, one thread, the same clouds: the same run bit for bit, from the map or
    # from memory (the gather copies the same float32 rows the whole array held)
    mapped, from_npz = _train(out, tmp_path / "a"), _train(old, tmp_path / "b")
    assert mapped[1] == from_npz[1]
    assert sorted(mapped[0]) == sorted(from_npz[0])
    assert all(torch.equal(mapped[0][k], from_npz[0][k]) for k in mapped[0])


@pytest.mark.parametrize("damage, needle", [
    (lambda f: f.write_bytes(f.read_bytes()[:-10]), "train/points.npy is truncated"),
    (lambda f: f.write_bytes(f.read_bytes() + b"\0" * 12), "train/points.npy is longer than its header says"),
    (lambda f: f.write_bytes(b"not an array"), "train/points.npy is not a readable .npy file"),
    (lambda f: f.unlink(), "train/ lacks arrays ['points']"),
])
def test_a_damaged_array_file_is_one_error_line(sampled, tmp_path, monkeypatch, capsys, damage, needle):
    _, out = sampled
    copy = tmp_path / "ds"
    copy.mkdir()
    for split in ("train", "val", "test"):
        (copy / split).mkdir()
        for key in KEYS:
            (copy / split / f"{key}.npy").write_bytes((out / split / f"{key}.npy").read_bytes())
    (copy / "meta.json").write_text((out / "meta.json").read_text())
    damage(copy / "train" / "points.npy")
    with pytest.raises(DataError) as info:
        load_split(copy, "train")
    assert needle in str(info.value) and "\n" not in str(info.value)
    monkeypatch.chdir(tmp_path)
    assert main(["train", f"data={copy}", "backbone=distance", "backbone.hidden=8", "backbone.k=4",
                 "backbone.layers=1", "train.epochs=1", "hydra.run.dir=run"]) == 2
    assert needle in one_error_line(capsys)


def test_a_missing_split_folder_and_an_unknown_format_are_one_line(sampled, tmp_path):
    _, out = sampled
    (tmp_path / "meta.json").write_text((out / "meta.json").read_text())
    with pytest.raises(DataError, match=r"has no train/ folder; sample it again"):
        load_split(tmp_path, "train")
    (tmp_path / "meta.json").write_text(json.dumps({**read_meta(out), "format": 3}))
    with pytest.raises(DataError, match=r'should have "format": 1 or 2, got 3 instead'):
        load_split(tmp_path, "train")


def test_an_interrupted_sampling_keeps_the_old_dataset_and_leaves_no_temporary(sampled, tmp_path, monkeypatch):
    catalog, _ = sampled
    out = build_dataset(catalog, tmp_path / "ds", **SETTINGS)
    before = {k: np.array(getattr(load_split(out, "train"), k)) for k in KEYS}
    drawn, real = [], build.draw_cloud

    def stopping(*args, **kwargs):  # Ctrl-C while the fourth cloud is drawn
        drawn.append(1)
        if len(drawn) == 4:
            raise KeyboardInterrupt
        return real(*args, **kwargs)

    monkeypatch.setattr(build, "draw_cloud", stopping)
    with pytest.raises(KeyboardInterrupt):
        build_dataset(catalog, out, **{**SETTINGS, "seed": 6})
    assert sorted(p.name for p in tmp_path.iterdir()) == ["ds"]  # no .part folder, no .old one
    after = load_split(out, "train")
    assert read_meta(out)["seed"] == SETTINGS["seed"]
    for key in KEYS:
        np.testing.assert_array_equal(getattr(after, key), before[key])
    drawn.clear()
    with pytest.raises(KeyboardInterrupt):  # and into a new folder: nothing at all
        build_dataset(catalog, tmp_path / "new", **SETTINGS)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["ds"]


@pytest.mark.slow
def test_sigterm_while_shapes_sample_writes_leaves_nothing(tmp_path):
    # POSIX: SIGTERM asks a process to stop; a shell reports 128 + 15 = 143
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    proc = subprocess.Popen([sys.executable, "-m", "shapes", "sample", f"meshes={ROOT / 'demo_meshes'}",
                             f"data={tmp_path / 'data'}", "sample.points=256", "sample.twins=declared"],
                            cwd=tmp_path, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while not list(tmp_path.glob(".data.*.part/train/points.npy")):  # clouds are being written
        assert proc.poll() is None and time.monotonic() < deadline, proc.communicate()
        time.sleep(0.01)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=120)
    lines = err.strip().splitlines()
    assert proc.returncode == 143, err
    assert len(lines) == 1 and lines[0].startswith("error: sample interrupted by SIGTERM"), lines
    assert sorted(p.name for p in tmp_path.iterdir()) == []
