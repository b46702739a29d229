"""Runs you can trust: the same seed gives the same run, a diverged run says so and saves nothing
bad, every option is checked before work starts, output is standard JSON with ordinary modes."""

import hashlib
import json
import math
import os
import stat
from pathlib import Path

import pytest
import torch

from conftest import TINY_DISTANCE, one_error_line
from shapes import _checks
from shapes._atomic import atomic_dir, atomic_path, write_json
from shapes.cli import main
from shapes.errors import ConfigError, InputError, TrainingError
from shapes.run import CLOCKED, TIMING

TINY_TRAIN = [*TINY_DISTANCE, "train.epochs=2", "train.batch_size=32", "train.threads=1", "hydra.run.dir=run"]


def _weights_hash(ckpt: Path) -> str:
    state = torch.load(ckpt, weights_only=True)["state_dict"]
    h = hashlib.sha256()
    for name in sorted(state):
        h.update(name.encode())
        h.update(state[name].contiguous().numpy().tobytes())
    return h.hexdigest()


def _train_and_eval(folder: Path, data: Path, seed: int, monkeypatch) -> tuple[str, bytes]:
    folder.mkdir()
    monkeypatch.chdir(folder)
    assert main(["train", f"data={data}", f"seed={seed}", *TINY_TRAIN]) == 0
    assert main(["eval", "run=run", "eval.repeats=1", f"seed={seed}"]) == 0
    return _weights_hash(folder / "run" / "checkpoint.pt"), (folder / "run" / "metrics.json").read_bytes()


# ------------------------------------------------------------------ reproducibility


def test_same_seed_same_run_and_another_seed_another_run(tiny_surface_data, tmp_path, monkeypatch):
    # common practice: a seeded run on one thread is repeatable bit for bit; a new seed is a new run
    torch.manual_seed(12345)  # disturb the global generator: the job must seed before it draws anything
    a_weights, a_metrics = _train_and_eval(tmp_path / "a", tiny_surface_data, 0, monkeypatch)
    torch.rand(7)
    b_weights, b_metrics = _train_and_eval(tmp_path / "b", tiny_surface_data, 0, monkeypatch)
    c_weights, c_metrics = _train_and_eval(tmp_path / "c", tiny_surface_data, 1, monkeypatch)
    assert a_weights == b_weights and a_metrics == b_metrics
    assert c_weights != a_weights and c_metrics != a_metrics
    # the clock readings stand apart, in timing.json, so that metrics.json can repeat byte for byte
    timing = json.loads((tmp_path / "a" / "run" / TIMING).read_text())
    assert set(timing) == set(CLOCKED) and timing["parts_per_second"] > 0
    assert not set(CLOCKED) & set(json.loads(a_metrics)["cost"])


def test_output_files_get_ordinary_modes_from_a_training_run(tiny_surface_data, tmp_path, monkeypatch):
    # POSIX open(2)/mkdir(2): a new file gets 0666 & ~umask, a folder 0777 & ~umask (0644 / 0755 under 022)
    old = os.umask(0o022)
    try:
        monkeypatch.chdir(tmp_path)
        assert main(["train", f"data={tiny_surface_data}", *TINY_TRAIN, "train.epochs=1"]) == 0
    finally:
        os.umask(old)
    for name in ("checkpoint.pt", "train_history.json", "config.yaml"):
        assert stat.S_IMODE((tmp_path / "run" / name).stat().st_mode) == 0o644, name


# ------------------------------------------------------------------ divergence


def test_a_diverging_run_stops_with_one_line_and_writes_no_checkpoint(tiny_surface_data, tmp_path, monkeypatch, capsys):
    # from memory: AdamW steps are about lr in size (Loshchilov & Hutter 2019, "Decoupled weight decay
    # regularization", Algorithm 2), so lr = 1e30 overflows float32 (max 3.4e38, IEEE 754 binary32) in a step or two
    monkeypatch.chdir(tmp_path)
    assert main(["train", f"data={tiny_surface_data}", *TINY_TRAIN, "train.lr=1e30", "hydra.run.dir=runs/train/x"]) == 2
    line = one_error_line(capsys)
    assert "diverged" in line and "train.lr=1e+30" in line and "no checkpoint was written" in line
    assert not (tmp_path / "runs" / "train" / "x").exists()  # the empty run folder is removed


def test_a_run_diverging_later_keeps_the_last_good_checkpoint(tiny_surface_data, tmp_path, monkeypatch):
    # common practice: a checkpoint is only replaced by a better finite model, never by a NaN one
    import shapes.train as train
    from shapes.backbones import build_backbone

    normal = train.lr_factor
    monkeypatch.setattr(train, "lr_factor", lambda p, w: normal(p, w) if p < 0.5 else 1e32)  # epoch 2 blows up
    with pytest.raises(TrainingError, match=r"diverged in epoch 2.*best checkpoint so far \(epoch 1\) is kept") as info:
        train.train_classifier(build_backbone("distance", hidden=8, k=4, layers=1), tiny_surface_data, tmp_path,
                               train.TrainSettings(epochs=2, batch_size=32, threads=1))
    assert "\n" not in str(info.value)
    payload = torch.load(tmp_path / "checkpoint.pt", weights_only=True)
    assert payload["meta"]["epoch"] == 1
    assert all(torch.isfinite(v).all() for v in payload["state_dict"].values())
    assert math.isfinite(payload["meta"]["val_loss"])
    assert json.loads((tmp_path / "train_history.json").read_text())["status"] == "diverged"


@pytest.mark.parametrize("option,needle", [
    ("train.lr=inf", "train.lr should be a finite number > 0, got inf instead."),
    ("train.lr=abc", "train.lr should be a finite number > 0, got 'abc' instead."),
    ("train.lr=0", "train.lr should be a finite number > 0, got 0 instead."),
    ("train.epochs=2.5", "train.epochs should be an integer >= 1, got 2.5 instead."),
    ("train.dropout=2", "train.dropout should be a finite number in [0, 1), got 2 instead."),
    ("train.threads=-2", "train.threads should be null or an integer >= 1, got -2 instead."),
    ("train.mirror=1.5", "train.mirror should be a finite number in [0, 1], got 1.5 instead."),
    ("train.device=gpu", "train.device should be one of cpu, cuda, auto, got 'gpu' instead."),
    ("train.poses=so3", "train.poses 'so3' is now called 'any'"),
    ("seed=-1", "seed should be an integer >= 0, got -1 instead."),
    ("train.max_minutes=nan", "train.max_minutes should be null or a finite number > 0, got nan instead."),
])
def test_bad_train_options_give_one_line_before_any_work(option, needle, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(["train", "data=nowhere", option]) == 2  # data=nowhere: the check comes before any reading
    assert needle in one_error_line(capsys)
    assert not (tmp_path / "runs").exists()


@pytest.mark.parametrize("argv,needle", [
    (["predict", "predict.threads=-1"], "predict.threads should be null or an integer >= 1, got -1 instead."),
    (["predict", "predict.accept=0"], "predict.accept should be a finite number in (0, 1], got 0 instead."),
    (["predict", "predict.viewpoint=[1,2]"], "predict.viewpoint should be null or 3 numbers [x, y, z], got [1, 2]"),
    (["predict", "predict.clean.stray_k=abc"], "predict.clean.stray_k should be an integer >= 1, got 'abc' instead."),
    (["eval", "eval.poses=[any,sideways]"], "eval.poses[1] should be one of cad, upright, any, mirrored, got 'sideways'"),
    (["eval", "eval.repeats=0"], "eval.repeats should be an integer >= 1, got 0 instead."),
    (["eval", "eval.threads=two"], "eval.threads should be null or an integer >= 1, got 'two' instead."),
    (["sample", "sample.points=1"], "sample.points should be an integer >= 2, got 1 instead."),
    (["sample", "sample.noise=-0.1"], "sample.noise should be a finite number >= 0, got -0.1 instead."),
    (["sample", "sample.mode=laser"], "sample.mode should be one of surface, scan, mixed, got 'laser' instead."),
    (["demo", "demo.minutes={plain: 0}"], "demo.minutes.plain should be a finite number > 0, got 0 instead."),
    (["demo", "demo.epochs=1.5"], "demo.epochs should be an integer >= 1, got 1.5 instead."),
    (["demo", "train.threads=0"], "train.threads should be null or an integer >= 1, got 0 instead."),
    (["parts", "parts.per_class=2"], "parts.per_class should be an integer >= 3, got 2 instead."),
])
def test_bad_options_of_every_verb_give_one_line(argv, needle, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(argv) == 2
    assert needle in one_error_line(capsys)
    assert not any(tmp_path.iterdir())  # nothing was started


def test_a_bad_value_in_a_sweep_is_refused_before_the_first_run(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(["train", "-m", "data=nowhere", "train.lr=1e-3,abc"]) == 2
    assert "train.lr should be a finite number > 0, got 'abc'" in one_error_line(capsys)
    assert not (tmp_path / "runs").exists()


def test_a_bare_regime_is_one_regime_not_three_letters(tiny_surface_data, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert main(["train", f"data={tiny_surface_data}", *TINY_TRAIN, "train.epochs=1"]) == 0
    assert main(["eval", "run=run", "eval.poses=any", "eval.repeats=1"]) == 0
    assert list(json.loads((tmp_path / "run" / "metrics.json").read_text())["regimes"]) == ["any"]


# ------------------------------------------------------------------ the shared validators


def test_validators_name_the_option_the_expected_and_the_found():
    with pytest.raises(ConfigError, match=r"^x should be an integer in \[1, 3\], got 4 instead\.$"):
        _checks.integer("x", 4, low=1, high=3)
    with pytest.raises(InputError, match=r"^y should be a finite number > 0 mm, got -1 instead\.$"):
        _checks.number("y", -1, low=0, low_open=True, unit="mm", error=InputError)
    for bad in (True, "3", 2.0, None):
        with pytest.raises(ConfigError, match=repr(bad).replace("(", r"\(")):
            _checks.integer("n", bad, low=0)
    for bad in (float("nan"), float("inf"), "1e-3", False):
        with pytest.raises(ConfigError):
            _checks.number("lr", bad)
    assert _checks.integer("n", 3, low=1) == 3 and _checks.number("lr", 1) == 1.0
    assert _checks.optional(_checks.integer, "t", None, low=1) is None
    assert _checks.listed("p", "any", _checks.text, one_as_list=True) == ["any"]
    with pytest.raises(ConfigError, match="should be a list"):
        _checks.listed("p", "any", _checks.text)


# ------------------------------------------------------------------ files


def test_json_is_standard_non_finite_numbers_become_null(tmp_path):
    # source: RFC 8259 section 6, "Numeric values that cannot be represented ... (such as Infinity and NaN)
    # are not permitted"; json.loads(parse_constant=...) sees NaN/Infinity literals if any are written
    path = write_json(tmp_path / "m.json", {"a": float("nan"), "b": [1.5, float("inf"), -float("inf")],
                                             "c": {"d": 2, "e": (float("nan"),)}})
    def refuse(token):
        raise AssertionError(f"non-standard JSON token {token}")
    got = json.loads(path.read_text(), parse_constant=refuse)
    assert got == {"a": None, "b": [1.5, None, None], "c": {"d": 2, "e": [None]}}


@pytest.mark.parametrize("umask,file_mode,dir_mode", [(0o022, 0o644, 0o755), (0o077, 0o600, 0o700)])
def test_atomic_writes_honour_the_umask_like_open_and_mkdir(tmp_path, umask, file_mode, dir_mode):
    # POSIX open(2) and mkdir(2): the mode is 0666 / 0777 with the umask's bits cleared
    old = os.umask(umask)
    try:
        text = write_json(tmp_path / "a.json", {"x": 1})
        with atomic_path(tmp_path / "w.pt") as tmp:
            torch.save({"w": torch.zeros(2)}, tmp)
        with atomic_dir(tmp_path / "folder") as tmp:
            (tmp / "inner.txt").write_text("x")
    finally:
        os.umask(old)
    assert stat.S_IMODE(text.stat().st_mode) == file_mode
    assert stat.S_IMODE((tmp_path / "w.pt").stat().st_mode) == file_mode
    assert stat.S_IMODE((tmp_path / "folder").stat().st_mode) == dir_mode
