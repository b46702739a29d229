"""The command line end to end on tiny settings, and its one-line answers to bad input."""

import json

import pytest
import torch

from conftest import DEMO, TINY_SAMPLE, one_error_line
from shapes.cli import main


def test_no_verb_lists_verbs(capsys):
    assert main([]) == 0
    out = capsys.readouterr().out
    for verb in ("parts", "sample", "train", "eval", "demo"):
        assert f"\n  {verb}" in out


def test_verb_help(capsys):
    assert main(["train", "--help"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("shapes train:") and "backbone: " in out and "distance" in out


@pytest.mark.parametrize("argv,needle", [
    (["train", "backbone=nosuch"], "unknown backbone 'nosuch'; choose one of: "),
    (["train", "train.nosuch=1"], "train.nosuch"),
    (["train", "--frobnicate"], "unknown flag --frobnicate"),
    (["frob"], "unknown verb 'frob'"),
    (["train", "backbone=distance,plain"], "add -m"),
    (["eval", "-m"], "-m (sweeps) is for 'shapes train'"),
    (["train", "backbone=harmonic_attention", "backbone.l_max=5"], "backbone.l_max should be an integer in [0, 3], got 5"),
    (["train", "backbone=harmonic_attention", "backbone.edge_block=0"],
     "backbone.edge_block should be an integer >= 1, got 0"),
    (["train", "backbone=vector_gate", "backbone.handedness=false"], "backbone.handedness is now backbone.symmetry (se3"),
    (["train", "backbone=harmonic_attention", "+backbone.parity=even"], "backbone.parity is now backbone.symmetry (se3"),
    (["train", "backbone=vector_gate", "backbone.symmetry=mirror"], "backbone.symmetry should be one of se3, e3"),
])
def test_bad_options_give_one_line(argv, needle, capsys):
    assert main(argv) == 2
    assert needle in one_error_line(capsys)


def test_bad_values_give_one_line(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(["eval", f"run={tmp_path / 'nowhere'}"]) == 2
    assert "no checkpoint" in one_error_line(capsys)


@pytest.mark.parametrize("argv,needle", [
    (["train", "data=nowhere"], "meta.json"),
    (["train", "backbone=harmonic_attention", "backbone.k=0"], "backbone.k should be an integer >= 1, got 0"),
], ids=["missing-dataset", "bad-backbone-option"])
def test_a_failed_training_leaves_no_run_folder(argv, needle, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(argv) == 2
    assert needle in one_error_line(capsys)
    assert not list((tmp_path / "runs" / "train").glob("*"))


def test_one_class_folder_is_refused_and_leaves_nothing(tmp_path, monkeypatch, capsys):
    import trimesh

    monkeypatch.chdir(tmp_path)
    (tmp_path / "cat" / "only").mkdir(parents=True)
    trimesh.creation.box().export(tmp_path / "cat" / "only" / "a.stl")
    assert main(["sample", f"meshes={tmp_path / 'cat'}", f"data={tmp_path / 'out'}"]) == 2
    assert "class" in one_error_line(capsys)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["cat"]


def test_empty_mesh_file_is_named_and_leaves_nothing(tmp_path, monkeypatch, capsys):
    import trimesh

    monkeypatch.chdir(tmp_path)
    for cls in ("a", "b"):
        (tmp_path / "cat" / cls).mkdir(parents=True)
        for i in range(3):
            trimesh.creation.box(extents=(1, 1 + i, 2)).export(tmp_path / "cat" / cls / f"{cls}{i}.stl")
    (tmp_path / "cat" / "b" / "broken.stl").write_bytes(b"")
    assert main(["sample", f"meshes={tmp_path / 'cat'}", f"data={tmp_path / 'out'}"]) == 2
    assert "broken.stl" in one_error_line(capsys)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["cat"]


@pytest.fixture(scope="module")
def tiny_data(tmp_path_factory):
    root = tmp_path_factory.mktemp("pipeline")
    assert main(["sample", f"meshes={DEMO}", f"data={root / 'data'}", *TINY_SAMPLE]) == 0
    return root / "data"


def test_sample_train_eval(tiny_data, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert main(["train", f"data={tiny_data}", "backbone=distance", "backbone.hidden=8", "backbone.k=6",
                 "train.epochs=1", "train.batch_size=32"]) == 0
    (run,) = list((tmp_path / "runs" / "train").iterdir())
    payload = torch.load(run / "checkpoint.pt", weights_only=True)
    assert payload["meta"]["backbone"]["name"] == "distance"
    assert (run / "config.yaml").is_file() and (run / "train_history.json").is_file()
    assert main(["eval", "run=latest", "eval.repeats=1"]) == 0
    metrics = json.loads((run / "metrics.json").read_text())
    assert set(metrics["regimes"]) == {"cad", "upright", "any", "mirrored"}
    # E3 backbone: its measured invariance must be float32 round-off
    assert metrics["invariance"]["rotation"] < 1e-4 and metrics["invariance"]["reflection"] < 1e-4
    assert (run / "report.md").is_file() and (run / "confusion_any.png").is_file()
    assert not list(run.glob(".*part*"))


def test_multirun_sweeps_backbones(tiny_data, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert main(["train", "-m", f"data={tiny_data}", "backbone=distance,plain", "backbone.hidden=8",
                 "train.epochs=1", "train.batch_size=64"]) == 0
    found = sorted(p.parent.name for p in (tmp_path / "runs" / "sweep").glob("*/*/checkpoint.pt"))
    assert found == ["0-distance", "1-plain"]


def test_multirun_sweeps_an_option_of_the_vector_gate(tiny_data, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert main(["train", "-m", f"data={tiny_data}", "backbone=vector_gate", "backbone.scalars=8,16",
                 "backbone.vectors=4", "backbone.k=6", "train.epochs=1", "train.batch_size=64"]) == 0
    found = sorted((tmp_path / "runs" / "sweep").glob("*/*/checkpoint.pt"))
    widths = [torch.load(f, weights_only=True)["meta"]["backbone"]["options"]["scalars"] for f in found]
    assert [f.parent.name for f in found] == ["0-vector_gate", "1-vector_gate"] and widths == [8, 16]
    # the yaml's normals: true reached the backbone, so it trained on the shards' normals
    assert torch.load(found[0], weights_only=True)["meta"]["backbone"]["options"]["normals"] is True


def test_demo_budget_for_an_unknown_backbone_is_refused(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(["demo", f"demo.out={tmp_path / 'demo'}", "demo.backbones=[plain]", "demo.minutes={plane: 1}"]) == 2
    assert "demo.minutes" in one_error_line(capsys)
    assert not (tmp_path / "demo").exists()


def test_demo_on_a_tiny_setting(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(["demo", f"meshes={DEMO}", f"demo.out={tmp_path / 'demo'}", "demo.points=96", "demo.epochs=1",
                 "demo.copies={train: 1, val: 1, test: 1}", "~demo.minutes", "+demo.minutes={plain: 0.1, vector_gate: null}"]) == 0
    report = (tmp_path / "demo" / "report.md").read_text()
    assert "| distance | E3 |" in report and "| plain | none |" in report
    assert "| vector_gate | SE3 |" in report and "| harmonic_attention | SE3 |" in report
    assert "plain 0.1 min" in report and "distance 1 epoch)" not in report and "distance 1 epoch," in report
    assert "vector_gate 1 epoch," in report  # null: no wall-time budget, demo.epochs alone
    captured = capsys.readouterr()
    assert "demo report:" in captured.out
    # sample.twins=auto (the default) checks the demo catalog's declared map against the meshes, every instance
    assert "[demo] mirror twins: declared in the catalog, checked against the geometry" in captured.out
    assert captured.out.count("[demo]   mirror twins found: ") == 4 and "warning:" not in captured.err
    check = json.loads((tmp_path / "demo" / "data" / "meta.json").read_text())["twin_check"]
    assert check["checked"] and check["warnings"] == [] and check["unpaired"] == []
    # common practice: left-hand studs, springs and helical gears and a left bracket mirror the right-hand
    # ones, and turned parts are achiral; catalog.json declares so
    declared = {c["name"]: c["twin"] for c in json.loads((DEMO / "catalog.json").read_text())["classes"]}
    assert {a: b for a, b in check["pairs"]} | {b: a for a, b in check["pairs"]} == \
        {c: t for c, t in declared.items() if c != t}
    assert sorted(check["achiral"]) == sorted(c for c, t in declared.items() if c == t)
