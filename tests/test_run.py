"""A run's contract (shapes.run): the checkpoint record, the twin index and the pose-scoring helper."""

import torch

from shapes.backbones import Classifier, build_backbone
from shapes.geometry import random_poses
from shapes.run import RunMeta, load_classifier, logits_under_poses, save_checkpoint, twin_index

# a record as `shapes train` wrote it before RunMeta existed (keys and order), with the resolved config
OLD = {
    "classes": ["bracket_left", "bracket_right", "washer"],
    "twins": {"bracket_left": "bracket_right", "bracket_right": "bracket_left", "washer": "washer"},
    "handed": {"bracket_left": True, "bracket_right": True, "washer": False},
    "backbone": {"name": "distance", "options": {"hidden": 8, "k": 4, "layers": 1}, "symmetry": "E3"},
    "head": {"hidden": 16, "dropout": 0.0},
    "train": {"epochs": 1, "seed": 0},
    "data": {"dir": "data/demo", "points": 32, "sampler": {"mode": "surface"}},
    "versions": {"shapes": "0.1"},
    "config": {"seed": 0},
    "epoch": 1, "val_accuracy": 0.5, "val_loss": 1.0,
}


def test_a_stored_record_comes_back_unchanged():
    # convention: DEVELOPERS.md, "Run folders" (checkpoints from before load, and older code reads new ones)
    meta = RunMeta.from_dict(OLD)
    assert meta.backbone.name == "distance" and meta.head.hidden == 16 and meta.data.points == 32
    assert meta.extra == {"config": {"seed": 0}}
    assert meta.to_dict() == OLD and list(meta.to_dict()) == list(OLD)


def test_the_twin_index_maps_each_class_to_its_mirror_twin():
    # common practice: a handed class's twin is the other hand, an achiral class is its own
    assert twin_index(OLD["classes"], OLD["twins"]).tolist() == [1, 0, 2]
    assert RunMeta.from_dict(OLD).twin_index().tolist() == [1, 0, 2]


def test_logits_under_poses_are_the_model_on_each_turned_cloud(tmp_path):
    # reference: the model called on each cloud turned by hand (x' = R x, rows: points @ R^T)
    torch.manual_seed(0)
    model = Classifier(build_backbone("plain", hidden=8, layers=1), 3, hidden=16, dropout=0.0).eval()
    gen = torch.Generator().manual_seed(1)
    points = torch.randn(5, 20, 3, generator=gen)
    rot = random_poses("mirrored", 5, generator=gen)
    got = logits_under_poses(model, points, rot, batch_size=2)
    with torch.no_grad():
        want = torch.cat([model(points[i:i + 1] @ rot[i].T) for i in range(5)])
    torch.testing.assert_close(got, want)
    # saved and loaded back through the run's contract, the same network answers the same
    save_checkpoint(tmp_path / "checkpoint.pt", model, {**OLD, "backbone": {
        "name": "plain", "options": model.backbone.config_dict(), "symmetry": model.backbone.symmetry}})
    loaded, meta = load_classifier(tmp_path)
    torch.testing.assert_close(logits_under_poses(loaded, points, rot, batch_size=3), want)
    assert meta.classes == OLD["classes"]
