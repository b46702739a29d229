"""Two processes under torchrun (gloo on the loopback interface) train as one process over the same
global batch, and only the first process writes files."""

import json
import os
import socket
import subprocess
import sys
from pathlib import Path

import pytest
import torch

from conftest import TINY_DISTANCE
from shapes.run import CHECKPOINT, RESUME

# jitter, random poses and mirroring all draw from the run's generator: the global batch's draws
# must be split between the processes exactly as one process makes them. Dropout masks are drawn
# per process, so the comparison runs without dropout.
TRAIN = [*TINY_DISTANCE, "train.epochs=2", "train.threads=1", "train.dropout=0", "train.poses=any",
         "train.jitter=0.01", "train.mirror=0.3"]


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _run(argv: list[str], cwd: Path) -> subprocess.CompletedProcess:
    env = {**os.environ, "GLOO_SOCKET_IFNAME": "lo", "OMP_NUM_THREADS": "1"}
    done = subprocess.run(argv, cwd=cwd, capture_output=True, text=True, timeout=600, env=env)
    assert done.returncode == 0, done.stderr[-3000:]
    return done


def _model(folder: Path, name: str = RESUME) -> dict:
    payload = torch.load(folder / name, weights_only=True)
    return payload["model" if name == RESUME else "state_dict"]


@pytest.mark.slow
def test_two_processes_train_as_one_over_the_same_global_batch(tiny_surface_data, tmp_path):
    # reference: one process over the same global batch of 16 (DistributedDataParallel averages the
    # gradients of the two halves, which is the gradient of the mean loss over the whole batch)
    data = f"data={tiny_surface_data}"
    _run([sys.executable, "-m", "shapes", "train", data, *TRAIN, "train.batch_size=16", "hydra.run.dir=one"],
         tmp_path)
    _run([sys.executable, "-m", "shapes", "train", data, *TRAIN, "train.batch_size=8", "hydra.run.dir=half"],
         tmp_path)
    ddp_dir = tmp_path / "ddp"
    ddp_dir.mkdir()
    done = _run([sys.executable, "-m", "torch.distributed.run", "--nproc_per_node=2", "--master_addr=127.0.0.1",
                 f"--master_port={_free_port()}", "-m", "shapes", "train", data, *TRAIN, "train.batch_size=16"],
                ddp_dir)
    # only rank 0 writes: one run folder (the default, named by the second it started), its four files
    written = sorted(p.relative_to(ddp_dir).as_posix() for p in ddp_dir.rglob("*") if p.is_file())
    assert len(written) == 4, written
    run = (ddp_dir / written[0]).parent
    assert list((ddp_dir / "runs" / "train").iterdir()) == [run]  # no empty folder of the second process
    assert sorted(p.name for p in run.iterdir()) == sorted([CHECKPOINT, RESUME, "config.yaml", "train_history.json"])
    assert done.stdout.count("epoch   1") == 1 and done.stdout.count("best checkpoint") == 1
    one, ddp, half = _model(tmp_path / "one"), _model(run), _model(tmp_path / "half")
    for name in one:  # float tolerance: the two halves' gradients are summed in another order
        torch.testing.assert_close(ddp[name], one[name], rtol=1e-5, atol=1e-6)
    assert any(not torch.allclose(half[k], one[k], rtol=1e-5, atol=1e-6) for k in one)  # another batch, other weights
    a, b = (json.loads((d / "train_history.json").read_text())["history"] for d in (tmp_path / "one", run))
    assert [r["steps"] for r in a] == [r["steps"] for r in b] == [8, 16]
    assert [r["loss"] for r in b] == pytest.approx([r["loss"] for r in a], rel=1e-5)
