"""The classical baseline as a run: D2 shape distributions and a random forest (:mod:`shapes.classic`).

``shapes train backbone=d2`` calls :func:`train_d2`, which fits the forest on the training split and
writes a run folder with the same files a trained network's run has: ``checkpoint.pt`` (the forest
as plain tensors plus the run's :class:`shapes.run.RunMeta`; ``torch.load(..., weights_only=True)``),
``train_history.json`` and ``config.yaml`` (written by the command line). :func:`shapes.run.load_classifier`
turns such a checkpoint back into a :class:`shapes.classic.D2Network`, a ``torch.nn.Module`` with the
classifier's call signature, so ``shapes eval``, ``shapes compare`` and ``shapes predict`` use the
baseline as they use any backbone.

D2 sees distances only, so it is E3 by construction: its answer for a part and for
the part's mirror image is the same, and it cannot tell mirror twins apart.
"""

from __future__ import annotations

import os
import time
from dataclasses import asdict
from pathlib import Path

import numpy as np
import torch

from shapes._atomic import write_json
from shapes._runtime import set_threads, versions
from shapes.classic import D2_NAME, D2Classifier, D2Network, D2Options
from shapes.data import load_split, read_meta
from shapes.run import CHECKPOINT, HISTORY, BackboneRecord, RunMeta, save_checkpoint

__all__ = ["D2Options", "train_d2", "D2_TARGET", "NAME"]

NAME = D2_NAME
# the `_target_` of shapes/conf/backbone/d2.yaml: the command line trains it with train_d2
D2_TARGET = "shapes.classic.D2Options"


def train_d2(data_dir: str | os.PathLike, run_dir: str | os.PathLike, options: D2Options | None = None, *,
             seed: int = 0, threads: int | None = None, extra: dict | None = None) -> Path:
    """Fit the baseline on the training split of ``data_dir``; write ``checkpoint.pt`` and
    ``train_history.json`` to ``run_dir``. Returns the checkpoint path."""
    options = options or D2Options()
    set_threads(threads)
    started = time.perf_counter()
    meta = read_meta(data_dir)
    train, val = load_split(data_dir, "train"), load_split(data_dir, "val")
    classifier = D2Classifier(**asdict(options), seed=seed)  # checks the options
    classifier.fit(np.asarray(train.points, dtype=np.float64), np.asarray(train.labels, dtype=np.int64))
    network = D2Network(classifier, len(meta["classes"]))
    with torch.no_grad():
        val_pred = network(torch.tensor(np.asarray(val.points), dtype=torch.float32)).argmax(-1).numpy()
    val_acc = float((val_pred == np.asarray(val.labels)).mean()) if len(val_pred) else 0.0
    _, params = classifier.state()
    run_dir = Path(run_dir)
    run_dir.mkdir(parents=True, exist_ok=True)
    run_meta = RunMeta.for_dataset(
        meta, data_dir, np.asarray(train.points).shape[1],
        BackboneRecord(NAME, options.config_dict(), D2Network.symmetry), head=None,
        baseline={"model": "D2 shape distribution (Osada et al. 2002) + random forest", "params": params},
        # training poses do not matter to a model that sees distances only
        train={"seed": seed, "threads": threads, "poses": None}, versions=versions(),
        epoch=1, val_accuracy=val_acc, extra=dict(extra or {}))
    ckpt = save_checkpoint(run_dir / CHECKPOINT, network.forest_tensors(), run_meta)
    seconds = time.perf_counter() - started
    write_json(run_dir / HISTORY, {
        "status": "complete", "best_val_accuracy": val_acc, "best_epoch": 1, "wall_seconds": seconds,
        "history": [{"epoch": 1, "val_accuracy": val_acc, "seconds": seconds, "train_clouds": int(len(train))}]})
    return ckpt
