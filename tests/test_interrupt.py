"""Ctrl-C or SIGTERM during training: one line saying what was kept, the shell's status, no traceback."""

import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest
import torch

from conftest import TINY_DISTANCE
from shapes.cli import main


@pytest.mark.slow
@pytest.mark.parametrize("signum,name", [(signal.SIGINT, "Ctrl-C"), (signal.SIGTERM, "SIGTERM")])
def test_a_signal_during_training_gives_one_line_and_keeps_the_checkpoint(signum, name, tiny_surface_data, tmp_path):
    # source: the Bash reference manual, "Exit Status": a command ended by the fatal signal N reports 128 + N
    # (130 for SIGINT, 143 for SIGTERM on Linux); N from the platform's signal module
    status = 128 + int(signum)
    proc = subprocess.Popen(
        [sys.executable, "-m", "shapes", "train", f"data={tiny_surface_data}", *TINY_DISTANCE, "train.epochs=100000",
         "train.batch_size=32", "train.threads=1", "hydra.run.dir=run"],
        cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))  # as typed at a terminal
    try:
        seen = 0
        for line in proc.stdout:  # epoch 2's line comes after epoch 1's checkpoint is on disk
            seen += line.startswith("epoch")
            if seen == 2:
                break
        proc.send_signal(signum)
        _, err = proc.communicate(timeout=300)
    finally:
        if proc.poll() is None:
            proc.kill()
    lines = [x for x in err.strip().splitlines() if x.strip()]
    assert proc.returncode == status, err
    assert len(lines) == 1 and lines[0].startswith(f"error: training interrupted by {name}"), lines
    assert "is kept at" in lines[0] and "Traceback" not in err
    payload = torch.load(tmp_path / "run" / "checkpoint.pt", weights_only=True)
    assert payload["meta"]["epoch"] >= 1
    assert not list((tmp_path / "run").glob(".*part*"))  # nothing half-written left behind
    history = json.loads((tmp_path / "run" / "train_history.json").read_text())
    assert history["status"] == "interrupted" and history["best_epoch"] == payload["meta"]["epoch"]


def test_run_latest_passes_over_an_interrupted_run(tmp_path, monkeypatch, capsys):
    from shapes.run import latest_run

    monkeypatch.chdir(tmp_path)
    for name, status in (("a", "complete"), ("b", "interrupted")):
        run = tmp_path / "runs" / "train" / name
        run.mkdir(parents=True)
        (run / "checkpoint.pt").write_bytes(b"x")
        (run / "train_history.json").write_text(json.dumps({"status": status, "history": []}))
        os.utime(run / "checkpoint.pt", (1e9 + ord(name), 1e9 + ord(name)))  # b is the newer
    assert latest_run() == Path("runs/train/a")
    (tmp_path / "runs" / "train" / "a" / "checkpoint.pt").unlink()
    assert main(["eval", "run=latest"]) == 2
    assert "1 interrupted or diverged run(s) passed over" in capsys.readouterr().err
