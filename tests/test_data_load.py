"""Loading shards back: meta checks, CloudSplit, the torch Dataset and padding collation."""

import json

import numpy as np
import pytest
import torch
import trimesh
from torch.utils.data import DataLoader

from shapes.data import CloudDataset, CloudSplit, build_dataset, collate_clouds, load_split, read_meta
from shapes.errors import DataError, InputError


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    root = tmp_path_factory.mktemp("load")
    for cls, make in (("box", lambda s: trimesh.creation.box(extents=(s, 1, 1))),
                      ("ball", lambda s: trimesh.creation.icosphere(subdivisions=1, radius=s))):
        for k in range(3):
            (root / "cat" / cls).mkdir(parents=True, exist_ok=True)
            make(1.0 + k).export(root / "cat" / cls / f"{cls}{k}.stl")
    return build_dataset(root / "cat", root / "ds", points=40, copies={"train": 2, "val": 1, "test": 1}, seed=0)


def test_load_split_matches_files(dataset):
    data = load_split(dataset, "train")
    assert isinstance(data, CloudSplit) and data.split == "train"
    assert data.classes == ["ball", "box"]  # folder catalog: classes in sorted order
    for key in ("points", "normals", "labels", "instance", "scale"):
        np.testing.assert_array_equal(getattr(data, key), np.load(dataset / "train" / f"{key}.npy"))
    # hand-worked: 3 groups per class at 60/20/20 give 1 train group each; 2 classes x 2 copies
    assert len(data) == data.meta["counts"]["train"] == 4


def test_dataset_items_and_loader(dataset):
    data = load_split(dataset, "test")
    ds = CloudDataset(data)
    assert len(ds) == len(data.labels)
    points, label = ds[0]
    assert points.dtype == torch.float32 and points.shape == (40, 3) and isinstance(label, int)
    np.testing.assert_array_equal(points.numpy(), data.points[0])
    flipped = CloudDataset(data, transform=lambda p: -p)
    np.testing.assert_array_equal(flipped[0][0].numpy(), -data.points[0])
    batch_points, mask, labels = next(iter(DataLoader(ds, batch_size=len(ds), collate_fn=collate_clouds)))
    assert batch_points.shape == (len(ds), 40, 3) and bool(mask.all())
    assert labels.dtype == torch.long and labels.tolist() == data.labels.tolist()


def test_collate_pads_with_zeros_and_masks():
    a = torch.arange(6, dtype=torch.float32).reshape(2, 3) + 1
    b = torch.ones(4, 3)
    c = np.full((1, 3), 7.0)  # numpy clouds are accepted too
    points, mask, labels = collate_clouds([(a, 2), (b, 0), (c, 1)])
    assert points.shape == (3, 4, 3) and points.dtype == torch.float32
    # hand-worked: sizes 2, 4, 1 padded to 4
    assert mask.tolist() == [[True, True, False, False], [True] * 4, [True, False, False, False]]
    torch.testing.assert_close(points[0, :2], a)
    torch.testing.assert_close(points[2, 0], torch.full((3,), 7.0))
    assert float(points[~mask].abs().sum()) == 0.0
    assert labels.tolist() == [2, 0, 1] and labels.dtype == torch.long
    with pytest.raises(InputError, match="empty batch"):
        collate_clouds([])
    with pytest.raises(InputError, match=r"batch\[1\] points should have shape \(N, 3\)"):
        collate_clouds([(a, 0), (torch.ones(3, 2), 1)])


def test_meta_and_split_errors(dataset, tmp_path):
    with pytest.raises(DataError, match="has no meta.json"):
        read_meta(tmp_path)
    (tmp_path / "meta.json").write_text("{not json")
    with pytest.raises(DataError, match="unreadable"):
        read_meta(tmp_path)
    (tmp_path / "meta.json").write_text(json.dumps({"format": 7}))
    with pytest.raises(DataError, match='"format": 1 or 2, got 7'):
        read_meta(tmp_path)
    meta = read_meta(dataset)
    (tmp_path / "meta.json").write_text(json.dumps({**meta, "format": 1}))  # the earlier layout: .npz shards
    with pytest.raises(DataError, match="has no train.npz"):
        load_split(tmp_path, "train")
    with pytest.raises(DataError, match="split should be one of"):
        load_split(dataset, "holdout")
    np.savez(tmp_path / "val.npz", points=np.zeros((2, 5, 3), np.float32))
    with pytest.raises(DataError, match="lacks arrays"):
        load_split(tmp_path, "val")
    (tmp_path / "test.npz").write_bytes(b"PK broken")
    with pytest.raises(DataError, match="unreadable"):
        load_split(tmp_path, "test")
