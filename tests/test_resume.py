"""Resuming: a training process killed with SIGKILL mid-epoch and resumed ends with the weights of
a run that was never stopped, bit for bit; the unfinished run is marked and refused meanwhile."""

import json
import signal
import subprocess
import sys
from pathlib import Path

import pytest
import torch

from conftest import TINY_DISTANCE, one_error_line
from shapes.backbones import build_backbone
from shapes.cli import main
from shapes.errors import ConfigError
from shapes.run import CHECKPOINT, RESUME
from shapes.train import TrainSettings, train_classifier

# 128 training clouds in batches of 16: 8 steps an epoch; a state every 3 steps
TRAIN = [*TINY_DISTANCE, "train.epochs=3", "train.batch_size=16", "train.threads=1", "train.save_every=3",
         "train.jitter=0.01", "train.poses=any"]

# the child kills itself with SIGKILL as its 14th optimiser step begins (epoch 2, after the forward and
# backward passes): the last state on disk is step 12's, and steps 13 and 14 are lost with the process
KILLED_AT_STEP = """
import os, signal, sys, torch
from shapes.cli import main
step, calls = torch.optim.AdamW.step, [0]
def dying(self, *args, **kwargs):
    calls[0] += 1
    if calls[0] == 14:
        os.kill(os.getpid(), signal.SIGKILL)
    return step(self, *args, **kwargs)
torch.optim.AdamW.step = dying
sys.exit(main(sys.argv[1:]))
"""


def _shapes(args: list[str], cwd: Path, code: str | None = None) -> subprocess.CompletedProcess:
    argv = [sys.executable, "-c", code, *args] if code else [sys.executable, "-m", "shapes", *args]
    return subprocess.run(argv, cwd=cwd, capture_output=True, text=True, timeout=600)


def _weights(path: Path, key: str) -> dict:
    return torch.load(path, weights_only=True)[key]


def _bitwise_equal(a: dict, b: dict) -> bool:
    return a.keys() == b.keys() and all(a[k].dtype == b[k].dtype and torch.equal(a[k], b[k]) for k in a)


@pytest.mark.slow
def test_a_run_killed_mid_epoch_and_resumed_ends_bitwise_equal_to_one_never_stopped(tiny_surface_data, tmp_path,
                                                                                   capsys):
    # reference: the same command run to the end in one process (CPU, one thread, deterministic kernels)
    whole = _shapes(["train", f"data={tiny_surface_data}", *TRAIN, "hydra.run.dir=whole"], tmp_path)
    assert whole.returncode == 0, whole.stderr
    killed = _shapes(["train", f"data={tiny_surface_data}", *TRAIN, "hydra.run.dir=cut"], tmp_path, KILLED_AT_STEP)
    # reference: Python's subprocess documentation, Popen.returncode: -N for a child ended by signal N;
    # SIGKILL from the signal module (no handler can run)
    assert killed.returncode == -signal.SIGKILL, killed.stderr
    cut = tmp_path / "cut"
    state = torch.load(cut / RESUME, weights_only=True)
    assert (state["epoch"], state["step"], state["position"], state["epoch_done"]) == (2, 12, 64, False)
    assert json.loads((cut / "train_history.json").read_text())["status"] == "interrupted"
    for verb in (["eval"], ["export"]):  # the unfinished run is refused unless asked
        assert main([*verb, f"run={cut}"]) == 2
        assert f"resume={cut}" in capsys.readouterr().err
    resumed = _shapes(["train", f"resume={cut}"], tmp_path)
    assert resumed.returncode == 0, resumed.stderr
    assert "resuming" in resumed.stdout and "epoch   2" in resumed.stdout
    assert _bitwise_equal(_weights(cut / RESUME, "model"), _weights(tmp_path / "whole" / RESUME, "model"))
    assert _bitwise_equal(_weights(cut / CHECKPOINT, "state_dict"),
                          _weights(tmp_path / "whole" / CHECKPOINT, "state_dict"))
    ours, theirs = (json.loads((d / "train_history.json").read_text()) for d in (cut, tmp_path / "whole"))
    assert ours["status"] == theirs["status"] == "complete"
    assert [(r["loss"], r["val_loss"], r["steps"]) for r in ours["history"]] == \
           [(r["loss"], r["val_loss"], r["steps"]) for r in theirs["history"]]
    assert (cut / "config.yaml").is_file() and not list(cut.glob(".*part*"))
    # and the other way: a state from another step does not give those weights
    assert not _bitwise_equal(state["model"], _weights(cut / RESUME, "model"))


def test_resuming_a_complete_run_or_with_other_options_gives_one_line(tiny_surface_data, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(["train", f"data={tiny_surface_data}", *TINY_DISTANCE, "train.epochs=1", "train.batch_size=32",
                 "train.threads=1", "hydra.run.dir=done"]) == 0
    capsys.readouterr()
    assert main(["train", "resume=done"]) == 2
    assert "the run is complete" in one_error_line(capsys)
    assert main(["train", "resume=done", "train.lr=0.1"]) == 2
    assert "'train.lr=0.1' cannot be given with it" in one_error_line(capsys)
    assert main(["train", "resume=nowhere"]) == 2
    assert "no such run folder" in one_error_line(capsys)
    assert not (tmp_path / "nowhere").exists()
    (tmp_path / "empty").mkdir()
    assert main(["train", "resume=empty"]) == 2
    assert f"has no {RESUME}" in one_error_line(capsys)
    assert main(["train", f"data={tiny_surface_data}", "train.save_every=0"]) == 2
    assert "train.save_every should be" in one_error_line(capsys)


def test_the_python_call_refuses_a_resume_with_other_settings(tiny_surface_data, tmp_path):
    backbone = build_backbone("distance", hidden=8, k=4, layers=1)
    settings = TrainSettings(epochs=2, batch_size=16, threads=1, save_every=3)
    train_classifier(backbone, tiny_surface_data, tmp_path, settings)
    state = torch.load(tmp_path / RESUME, weights_only=True)
    state["status"] = "interrupted"  # as if it had stopped
    torch.save(state, tmp_path / RESUME)
    (tmp_path / "train_history.json").unlink()
    with pytest.raises(ConfigError, match="train.batch_size is 8 but the run being resumed has 16"):
        train_classifier(build_backbone("distance", hidden=8, k=4, layers=1), tiny_surface_data, tmp_path,
                         TrainSettings(epochs=2, batch_size=8, threads=1, save_every=3), resume=True)
    with pytest.raises(ConfigError, match="the backbone differs"):
        train_classifier(build_backbone("distance", hidden=16, k=4, layers=1), tiny_surface_data, tmp_path, settings,
                         resume=True)
