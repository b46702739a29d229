"""The pose-robustness verdict: plain against distance over rotation angle, the scanner-imperfection
curves, the train x test pose matrix, and the mirror-twin map the sample flow derives from geometry."""

from __future__ import annotations

import json
import math
import shutil
from pathlib import Path

import numpy as np
import pytest
import torch

from conftest import DEMO, coil, one_error_line, posed_mesh, twisted_bar
from shapes.backbones import build_backbone
from shapes.cli import main
from shapes.compare import pose_matrix
from shapes.data import build_dataset, read_meta
from shapes.evaluate import (OUTLIER_SHARES, POINT_COUNTS, evaluate_run, perturbation_sweeps, point_counts,
                             with_stray_points)
from shapes.report import CURVES, curve_scale, pyplot, run_report
from shapes.seeding import seed_everything, torch_generator
from shapes.train import TrainSettings, train_classifier

# five turned or bent parts of the demo catalog, all achiral: the angle curve is about poses alone
FIVE = ("hex_nut", "stepped_shaft", "v_pulley", "bolted_flange", "bushing")


def _binomial_se(p: float, n: int) -> float:
    # common practice: the standard error of a share p measured on n independent trials, sqrt(p(1-p)/n)
    return math.sqrt(max(p * (1.0 - p), 1.0 / n) / n)


@pytest.fixture(scope="module")
def five_parts(tmp_path_factory):
    """Five demo classes as 64-point surface clouds: 140 training clouds, 100 test clouds."""
    root = tmp_path_factory.mktemp("five")
    for name in FIVE:
        shutil.copytree(DEMO / name, root / "cat" / name)
    return build_dataset(root / "cat", root / "data", points=64, copies={"train": 4, "val": 1, "test": 10},
                         mode="surface", oversample=1, seed=0, twins="declared")  # no twins.json: all achiral


def _trained(name: str, options: dict, epochs: int, data: Path, out: Path) -> dict:
    seed_everything(0)
    train_classifier(build_backbone(name, **options), data, out,
                     TrainSettings(epochs=epochs, batch_size=32, lr=3e-3, seed=0, threads=1))
    return evaluate_run(out, data, poses=("cad",), repeats=1, seed=0, threads=1)


def test_plain_loses_accuracy_with_the_angle_and_distance_stays_flat(five_parts, tmp_path):
    plain = _trained("plain", {"hidden": 32}, 10, five_parts, tmp_path / "plain")
    distance = _trained("distance", {"hidden": 16, "k": 8}, 6, five_parts, tmp_path / "distance")
    n = plain["test_clouds"]
    assert n == 100
    p_sweep, d_sweep = plain["angle_sweep"], distance["angle_sweep"]
    print(f"\nplain {p_sweep}\ndistance {d_sweep}")
    # plain, trained in the CAD frame: well below its 0 degree accuracy at 180 degrees (the gap above four
    # standard errors of a difference of two binomial shares), and clearly better than chance (1/5) at 0
    p0, p180 = p_sweep["0"], p_sweep["180"]
    assert p0 >= 0.6
    assert p0 - p180 > 4 * math.hypot(_binomial_se(p0, n), _binomial_se(p180, n))
    # distance, invariant by construction: every angle within two binomial standard errors of the mean
    mean = float(np.mean(list(d_sweep.values())))
    assert mean > 0.3  # it learned something (chance is 0.2)
    assert max(abs(v - mean) for v in d_sweep.values()) <= 2 * _binomial_se(mean, n)
    # both ways: at 180 degrees the invariant model beats the plain one
    assert d_sweep["180"] > p180


def test_stray_points_replace_the_given_share_inside_the_bounding_box():
    gen = torch_generator(3)
    x = torch.randn(4, 200, 3, generator=gen) * torch.tensor([3.0, 1.0, 0.5])
    nrm = torch.nn.functional.normalize(torch.randn(4, 200, 3, generator=gen), dim=-1)
    for share in (0.0, 0.05, 0.2):
        px, pn = with_stray_points(x, nrm, share, torch_generator(4))
        # undo the renormalisation with the kept points: they moved by one shift and one scale per cloud
        changed = ~torch.isclose(pn, nrm).all(-1)
        assert (changed.sum(1) <= round(share * 200)).all()  # a redrawn normal may come out alike: never more
        same = ~changed
        for i in range(4):
            a, b = x[i][same[i]], px[i][same[i]]
            scale = (a - a.mean(0)).norm(dim=1).mean() / (b - b.mean(0)).norm(dim=1).mean()
            back = (px[i] - b.mean(0)) * scale + a.mean(0)
            lo, hi = x[i].amin(0) - 1e-4, x[i].amax(0) + 1e-4
            assert ((back >= lo) & (back <= hi)).all()  # every stray point inside the cloud's box
        # common practice: a cloud handed to a model is centred and scaled to unit RMS radius
        assert torch.allclose(px.mean(1), torch.zeros(4, 3), atol=1e-5)
        assert torch.allclose(px.pow(2).sum(-1).mean(-1), torch.ones(4), atol=1e-4)
        assert torch.allclose(pn.norm(dim=-1), torch.ones(4, 200), atol=1e-5)
    assert torch.equal(with_stray_points(x, nrm, 0.0, torch_generator(4))[1], nrm)


def test_each_curve_has_one_x_scale_on_run_pages_and_comparisons():
    # common practice: the point counts double along their curve (128 to 4096), so a base-2 log axis spaces
    # them evenly; noise levels start at 0, which a symmetric log axis shows (a plain log axis cannot)
    fig, ax = pyplot().subplots()
    scales = {}
    for key in CURVES:
        ax.set_xscale("linear")
        curve_scale(ax, key)
        scales[key] = ax.get_xscale()
    pyplot().close(fig)
    assert scales == {"angle_sweep": "linear", "noise_sweep": "symlog", "outlier_sweep": "linear",
                      "point_count_sweep": "log", "visible_sweep": "linear"}


def test_point_counts_state_the_range_the_test_clouds_give():
    assert point_counts(4096) == list(POINT_COUNTS)
    assert point_counts(1024) == [128, 256, 512, 1024]
    assert point_counts(1000) == [128, 256, 512, 1000]
    assert point_counts(96) == []
    model = build_backbone("plain", hidden=4)
    from shapes.backbones import Classifier

    net = Classifier(model, 3).eval()
    gen = torch_generator(0)
    x = torch.randn(6, 300, 3, generator=gen)
    nrm = torch.nn.functional.normalize(torch.randn(6, 300, 3, generator=gen), dim=-1)
    out = perturbation_sweeps(net, x, nrm, np.arange(6) % 3, gen, batch_size=4)
    assert list(out["outlier_sweep"]) == [str(s) for s in OUTLIER_SHARES]
    assert list(out["point_count_sweep"]) == ["128", "256", "300"]
    rng = out["point_count_range"]
    assert rng["measured"] == [128, 256, 300] and rng["not_measured"] == [512, 1024, 2048, 4096]
    assert "sample.points=4096" in rng["note"] and json.dumps(out, allow_nan=False)


def _metrics(backbone: str, poses: str | None, seed: int, acc: dict) -> dict:
    return {"backbone": {"name": backbone, "options": {}}, "train": {"poses": poses, "seed": seed}, "data": "d",
            "regimes": {r: {"accuracy": a} for r, a in acc.items()}, "run": f"{backbone}-{poses}-{seed}"}


def test_the_pose_matrix_has_one_row_per_training_regime_pooled_over_seeds():
    runs = [_metrics("plain", "cad", 0, {"cad": 0.9, "any": 0.2}), _metrics("plain", "cad", 1, {"cad": 0.8, "any": 0.3}),
            _metrics("plain", "any", 0, {"cad": 0.6, "any": 0.6}), _metrics("d2", None, 0, {"cad": 0.5, "any": 0.5})]
    matrix = pose_matrix(runs, ["cad", "any"])
    assert list(matrix) == ["plain", "d2"] and list(matrix["plain"]) == ["cad", "any"]
    cell = matrix["plain"]["cad"]["cad"]
    # reference: numpy's mean and sample standard deviation
    assert cell["mean"] == pytest.approx(np.mean([0.9, 0.8])) and cell["sd"] == pytest.approx(np.std([0.9, 0.8], ddof=1))
    assert matrix["plain"]["cad"]["runs"] == 2 and matrix["plain"]["any"]["any"]["sd"] is None
    assert list(matrix["d2"]) == ["none"]


def test_a_sweep_over_training_poses_fills_the_matrix_in_compare(tiny_surface_data, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(["train", "-m", f"data={tiny_surface_data}", "backbone=plain", "train.poses=cad,any",
                 "backbone.hidden=8", "train.epochs=1", "train.batch_size=64", "train.threads=1"]) == 0
    (sweep,) = list((tmp_path / "runs" / "sweep").iterdir())
    assert main(["eval", f"run={sweep}", "eval.repeats=1", "eval.threads=1"]) == 0
    one = next(sweep.glob("*/report.md")).read_text()
    assert "## Train × test poses" in one and "| train poses ↓, test poses → | cad | upright | any | mirrored |" in one
    metrics = json.loads(next(sweep.glob("*/metrics.json")).read_text())
    for key in ("outlier_sweep", "point_count_sweep", "point_count_range", "noise_sweep", "angle_sweep"):
        assert key in metrics
    assert metrics["point_count_range"]["test_points"] == 64 and "sample.points=4096" in metrics["point_count_range"]["note"]
    assert "## Accuracy under stray points" in one and "perturbations.png" in one
    assert main(["compare", str(sweep), f"compare.out={tmp_path / 'cmp'}"]) == 0
    result = json.loads((tmp_path / "cmp" / "compare.json").read_text())
    assert list(result["pose_matrix"]["plain"]) == ["cad", "any"]
    table = (tmp_path / "cmp" / "compare.md").read_text()
    assert "| cad | 1 |" in table and "| any | 1 |" in table
    for name in ("compare_outliers.png", "compare_angle.png", "compare_noise.png"):
        assert (tmp_path / "cmp" / name).is_file()
    assert set(result["groups"]["plain (poses=cad)"]["curves"]) >= {"outlier_sweep", "point_count_sweep", "visible_sweep"}


# -- the mirror-twin map in the sample flow ---------------------------------------------------

@pytest.fixture(scope="module")
def handed_folder(tmp_path_factory):
    """A folder of four classes, no twins.json: a right- and a left-hand coil (twins), a right-hand
    twisted bar whose twin is missing, and a cube; three posed copies each."""
    import trimesh

    root = tmp_path_factory.mktemp("handed") / "cat"
    shapes_ = {"coil_rh": coil("right"), "coil_lh": coil("left"), "bar_rh": twisted_bar("right"),
               "cube": trimesh.creation.box([8.0, 8.0, 8.0])}
    for k, (name, mesh) in enumerate(shapes_.items()):
        (root / name).mkdir(parents=True)
        for i in range(3):
            posed_mesh(mesh, 10 * k + i).export(root / name / f"{name}_{i}.stl")
    return root


SMALL = ["sample.points=64", "sample.mode=surface", "sample.copies={train: 2, val: 1, test: 2}", "sample.oversample=1"]


@pytest.mark.slow
def test_sample_derives_the_twins_a_folder_does_not_declare(handed_folder, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(["sample", f"meshes={handed_folder}", f"data={tmp_path / 'data'}", *SMALL]) == 0
    out = capsys.readouterr().out
    assert "mirror twins: derived from geometry" in out
    assert "  mirror twins found: coil_rh <-> coil_lh" in out or "  mirror twins found: coil_lh <-> coil_rh" in out
    assert "handed, its mirror twin is not in the catalog: bar_rh (its mirror image is not a known part)" in out
    meta = read_meta(tmp_path / "data")
    # from memory: a right- and a left-hand helix are mirror images; a cube has mirror planes (achiral)
    assert meta["twins"] == {"bar_rh": "bar_rh", "coil_lh": "coil_rh", "coil_rh": "coil_lh", "cube": "cube"}
    assert meta["handed"] == {"bar_rh": False, "coil_lh": True, "coil_rh": True, "cube": False}
    check = meta["twin_check"]
    assert check["source"] == "derived from geometry" and check["unpaired"] == ["bar_rh"] and check["achiral"] == ["cube"]
    # the detector off: every class its own twin, said so in one line
    assert main(["sample", f"meshes={handed_folder}", f"data={tmp_path / 'off'}", "sample.twins=declared", *SMALL]) == 0
    assert "not checked: sample.twins=declared" in capsys.readouterr().out
    assert set(read_meta(tmp_path / "off")["twins"].items()) == {(c, c) for c in ("bar_rh", "coil_lh", "coil_rh", "cube")}

    # a run trained on it: the mirror images of bar_rh are scored apart, as no known part
    seed_everything(0)
    train_classifier(build_backbone("plain", hidden=8), tmp_path / "data", tmp_path / "run",
                     TrainSettings(epochs=1, batch_size=32, seed=0, threads=1))
    metrics = evaluate_run(tmp_path / "run", poses=("any", "mirrored"), repeats=1, threads=1, sweeps=False)
    unknown = metrics["unknown_mirror"]
    bar = metrics["classes"].index("bar_rh")
    assert unknown["clouds"] == sum(metrics["regimes"]["any"]["confusion"][bar]) > 0  # every bar_rh test cloud
    assert metrics["regimes"]["mirrored"]["count"] == metrics["test_clouds"] - unknown["clouds"]
    assert 0.0 <= unknown["named_as_itself"] <= 1.0 and 0.0 <= unknown["rejected"] <= 1.0
    report = run_report(metrics, tmp_path / "run").read_text()
    assert "Mirror-twin map: derived from geometry." in report and "*not a known part*" in report

    # a declared map that the geometry contradicts: warning lines at sampling and in the eval report
    wrong = tmp_path / "wrong"
    shutil.copytree(handed_folder, wrong)
    (wrong / "twins.json").write_text(json.dumps({"coil_rh": "cube"}))
    assert main(["sample", f"meshes={wrong}", f"data={tmp_path / 'wrong_data'}", *SMALL]) == 0
    captured = capsys.readouterr()
    assert "mirror twins: declared in the catalog, checked against the geometry" in captured.out
    warnings = [line for line in captured.err.splitlines() if line.startswith("warning: ")]
    assert any(w.startswith("warning: cube: declared the twin of coil_rh") for w in warnings)
    assert read_meta(tmp_path / "wrong_data")["twins"]["coil_rh"] == "cube"  # the declared map is kept
    flagged = evaluate_run(tmp_path / "run", tmp_path / "wrong_data", poses=("any",), repeats=1, threads=1,
                           sweeps=False, write=False)
    (tmp_path / "flagged").mkdir()
    text = run_report(flagged, tmp_path / "flagged").read_text()
    assert "**Warning:** cube: declared the twin of coil_rh" in text
    # derived: the geometry's map replaces the declared one
    assert main(["sample", f"meshes={wrong}", f"data={tmp_path / 'derived'}", "sample.twins=derived", *SMALL]) == 0
    assert read_meta(tmp_path / "derived")["twins"]["coil_rh"] == "coil_lh"


def test_a_bad_twins_option_gives_one_line(capsys):
    assert main(["sample", "sample.twins=maybe"]) == 2
    assert "sample.twins should be one of auto, derived, declared, got 'maybe' instead." in one_error_line(capsys)


def test_a_wrong_output_folder_is_refused_before_the_twin_check(tmp_path, monkeypatch, capsys):
    import trimesh

    monkeypatch.chdir(tmp_path)
    for cls in ("a", "b"):
        (tmp_path / "cat" / cls).mkdir(parents=True)
        for i in range(3):
            trimesh.creation.box(extents=(1, 1 + i, 2 + len(cls))).export(tmp_path / "cat" / cls / f"{cls}{i}.stl")
    (tmp_path / "keep").mkdir()
    (tmp_path / "keep" / "notes.txt").write_text("mine")
    assert main(["sample", f"meshes={tmp_path / 'cat'}", f"data={tmp_path / 'keep'}"]) == 2
    captured = capsys.readouterr()
    errors = captured.err.strip().splitlines()
    assert len(errors) == 1 and errors[0].startswith("error: ") and "is not a shapes dataset" in errors[0]
    assert "mirror twins" not in captured.out  # the geometry was never read
