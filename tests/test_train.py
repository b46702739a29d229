"""The training job's schedule and its wall-time budget."""

import json
import math

import pytest
import torch

from shapes.backbones import build_backbone
from shapes.train import TrainSettings, lr_factor, reflect_to_twins, train_classifier


@pytest.mark.parametrize("progress", [0.0, 0.1, 0.25, 0.5, 0.8, 1.0])
def test_lr_factor_is_a_cosine_after_warmup(progress):
    # closed form: half-cosine annealing 0.5 (1 + cos(pi t)) over the post-warm-up share t
    warmup = 0.1
    got = lr_factor(progress, warmup)
    if progress < warmup:
        assert got == pytest.approx(max(progress / warmup, 1e-3))  # linear ramp
    else:
        t = (progress - warmup) / (1 - warmup)
        assert got == pytest.approx(0.5 * (1 + math.cos(math.pi * t)), abs=1e-12)
    assert lr_factor(1.0, warmup) == pytest.approx(0.0, abs=1e-12)  # annealed to 0 at the end


def _backbone():
    return build_backbone("distance", hidden=8, k=4, layers=1)


def test_an_exhausted_budget_stops_after_one_step_with_a_checkpoint(tiny_surface_data, tmp_path):
    # a budget of about a microsecond is spent before the second step can start
    ckpt = train_classifier(_backbone(), tiny_surface_data, tmp_path,
                            TrainSettings(epochs=5, batch_size=4, max_minutes=1e-8, threads=1))
    history = json.loads((tmp_path / "train_history.json").read_text())["history"]
    assert [row["steps"] for row in history] == [1]
    assert torch.load(ckpt, weights_only=True)["meta"]["epoch"] == 1


def test_without_a_budget_every_epoch_runs(tiny_surface_data, tmp_path):
    train_classifier(_backbone(), tiny_surface_data, tmp_path, TrainSettings(epochs=2, batch_size=8, threads=1))
    history = json.loads((tmp_path / "train_history.json").read_text())["history"]
    n_train = 16 * 4  # classes x training instances (one copy each): at least that many clouds
    assert len(history) == 2 and history[-1]["steps"] == 2 * history[0]["steps"] >= 2 * n_train // 8
    assert history[-1]["lr"] < history[0]["lr"]  # annealing


def test_mirror_option_is_validated(tiny_surface_data, tmp_path):
    from shapes.errors import ConfigError

    with pytest.raises(ConfigError, match="train.mirror"):
        train_classifier(_backbone(), tiny_surface_data, tmp_path, TrainSettings(epochs=1, mirror=1.5))


def test_mirror_training_runs_and_is_recorded(tiny_surface_data, tmp_path):
    ckpt = train_classifier(_backbone(), tiny_surface_data, tmp_path,
                            TrainSettings(epochs=1, batch_size=16, mirror=0.5, threads=1))
    assert torch.load(ckpt, weights_only=True)["meta"]["train"]["mirror"] == 0.5


def test_reflect_to_twins_mirrors_points_and_swaps_hands(tiny_surface_data):
    meta = json.loads((tiny_surface_data / "meta.json").read_text())
    classes = meta["classes"]
    twin_of = torch.tensor([classes.index(meta["twins"][c]) for c in classes])
    labels = torch.tensor([classes.index(n) for n in ("stud_rh", "bracket_left", "hex_nut", "spring_rh")])
    points = torch.randn(4, 10, 3, dtype=torch.float64)
    chosen = torch.tensor([True, True, True, False])
    x, y = reflect_to_twins(points, labels, twin_of, chosen)
    assert [classes[i] for i in y] == ["stud_lh", "bracket_right", "hex_nut", "spring_rh"]
    # what the code produced is a reflection: the linear map fitted from each chosen cloud to its output
    # (least squares over its 10 points) is orthogonal with determinant -1 (closed form: an
    # orientation-reversing isometry), and it is the mirror in the plane x = 0 that the docstring names
    for i in range(3):
        fitted = torch.linalg.lstsq(points[i], x[i]).solution.T  # x[i] = points[i] @ fitted.T
        torch.testing.assert_close(fitted.T @ fitted, torch.eye(3, dtype=torch.float64), rtol=0, atol=1e-12)
        assert abs(float(torch.linalg.det(fitted)) + 1.0) < 1e-12
    reflection = torch.diag(torch.tensor([-1.0, 1.0, 1.0], dtype=torch.float64))
    torch.testing.assert_close(x[:3], points[:3] @ reflection.T, rtol=0, atol=0)
    torch.testing.assert_close(x[3], points[3], rtol=0, atol=0)
    x2, y2 = reflect_to_twins(x, y, twin_of, chosen)
    assert torch.equal(x2, points) and torch.equal(y2, labels)


def test_a_checkpoint_that_does_not_fit_the_network_code_gives_one_line(tiny_surface_data, tmp_path):
    # common practice: a checkpoint from other network code must fail loudly, never load half its weights
    from shapes.errors import DataError
    from shapes.run import load_classifier

    ckpt = train_classifier(_backbone(), tiny_surface_data, tmp_path,
                            TrainSettings(epochs=1, batch_size=16, threads=1, max_minutes=1e-8))
    model, _ = load_classifier(ckpt)  # the unchanged checkpoint loads
    payload = torch.load(ckpt, weights_only=True)
    dropped = sorted(payload["state_dict"])[0]
    del payload["state_dict"][dropped]
    payload["state_dict"]["backbone.extra.weight"] = torch.zeros(1)
    torch.save(payload, ckpt)
    with pytest.raises(DataError, match=rf"1 weights missing, e\.g\. '{dropped}'; 1 unexpected") as info:
        load_classifier(ckpt)
    assert "\n" not in str(info.value) and "retrain it with `shapes train`" in str(info.value)
    payload["state_dict"][dropped] = torch.zeros(3, 3, 3)  # wrong shape: torch's multi-line error, one line here
    del payload["state_dict"]["backbone.extra.weight"]
    torch.save(payload, ckpt)
    with pytest.raises(DataError, match="cannot be read: Error") as info:
        load_classifier(ckpt)
    assert "\n" not in str(info.value) and "size mismatch" in str(info.value)
