"""The classical baseline as a run: D2 shape distributions and a random forest (:mod:`shapes.classic`).

``shapes train backbone=d2`` calls :func:`train_d2`, which fits the forest on the training split and
writes a run folder with the same files a trained network's run has: ``checkpoint.pt`` (the forest
as plain tensors plus the run's metadata; ``torch.load(..., weights_only=True)``),
``train_history.json`` and ``config.yaml`` (written by the command line). :func:`load_d2` turns
such a checkpoint back into a :class:`D2Network`, a ``torch.nn.Module`` with the classifier's call
signature, so ``shapes eval``, ``shapes compare`` and ``shapes predict`` use the baseline as they
use any backbone.

D2 sees distances between points only, so it is E3 by construction: its answer for a part and for
the part's mirror image is the same, and it cannot tell mirror twins apart.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, asdict
from pathlib import Path

import numpy as np
import torch
from torch import nn

from shapes._atomic import atomic_path, write_json
from shapes._runtime import set_threads, versions
from shapes.classic import D2_PAIRS, D2Classifier
from shapes.data import load_split, read_meta
from shapes.errors import DataError

__all__ = ["D2Options", "D2Network", "train_d2", "load_d2", "D2_TARGET", "NAME"]

NAME = "d2"
CHECKPOINT = "checkpoint.pt"  # the name shapes.train uses; a run folder has one checkpoint
# the `_target_` of shapes/conf/backbone/d2.yaml: the command line trains it with train_d2
D2_TARGET = "shapes.baseline.D2Options"
# floor of a class probability before its logarithm: softmax(log(p + EPS)) gives p back within C * EPS
EPS = 1e-9


@dataclass(frozen=True)
class D2Options:
    """The baseline's options as ``shapes/conf/backbone/d2.yaml`` gives them (see :class:`shapes.classic.D2Params`)."""

    bins: int = 64
    pairs: int | None = D2_PAIRS
    trees: int = 300
    min_samples_leaf: int = 1

    def config_dict(self) -> dict:
        return asdict(self)


class D2Network(nn.Module):
    """A fitted :class:`D2Classifier` behind the classifier's interface:
    ``forward(points (B, N, 3), mask (B, N) | None, normals=None) -> logits (B, C)``.

    The logits are ``log(p + EPS)`` of the forest's class probabilities, so their softmax is ``p``.
    Padded points (``mask`` False) are left out of the histogram. Normals are not used.
    """

    name = NAME
    symmetry = "E3"
    uses_normals = False

    def __init__(self, classifier: D2Classifier, num_classes: int):
        super().__init__()
        self.classifier = classifier
        self.num_classes = int(num_classes)

    def learned_numbers(self) -> int:
        """Numbers the forest learned: a split bin and threshold per inner node, class shares per leaf."""
        arrays, _ = self.classifier.state()
        inner = int((arrays["left"] >= 0).sum())
        leaves = int((arrays["left"] < 0).sum())
        return 2 * inner + leaves * len(arrays["classes"])

    def forward(self, points: torch.Tensor, mask: torch.Tensor | None = None,
                normals: torch.Tensor | None = None) -> torch.Tensor:
        x = points.detach().cpu().double().numpy()
        if mask is None:
            clouds = x
        else:
            keep = mask.detach().cpu().numpy().astype(bool)
            clouds = [cloud[k] for cloud, k in zip(x, keep)]
        proba = self.classifier.predict_proba(clouds)  # (B, classes seen in training)
        full = np.zeros((len(x), self.num_classes))
        full[:, self.classifier.classes_] = proba
        return torch.as_tensor(np.log(full + EPS), dtype=points.dtype, device=points.device)


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
        val_pred = network(torch.as_tensor(val.points, dtype=torch.float32)).argmax(-1).numpy()
    val_acc = float((val_pred == np.asarray(val.labels)).mean()) if len(val_pred) else 0.0
    arrays, params = classifier.state()
    run_dir = Path(run_dir)
    run_dir.mkdir(parents=True, exist_ok=True)
    run_meta = {
        "classes": list(meta["classes"]),
        "twins": dict(meta["twins"]),
        "handed": {k: bool(v) for k, v in meta["handed"].items()},
        "backbone": {"name": NAME, "options": options.config_dict(), "symmetry": D2Network.symmetry},
        "head": None,
        "baseline": {"model": "D2 shape distribution (Osada et al. 2002) + random forest", "params": params},
        # training poses do not matter to a model that sees distances only
        "train": {"seed": seed, "threads": threads, "poses": None},
        "data": {"dir": str(data_dir), "points": int(np.asarray(train.points).shape[1]),
                 "sampler": meta.get("sampler", {})},
        "versions": versions(),
        "epoch": 1, "val_accuracy": val_acc,
        **(extra or {}),
    }
    payload = {"state_dict": {f"forest.{k}": torch.as_tensor(np.ascontiguousarray(v)) for k, v in arrays.items()},
               "meta": run_meta}
    ckpt = run_dir / CHECKPOINT
    with atomic_path(ckpt) as tmp:
        torch.save(payload, tmp)
    seconds = time.perf_counter() - started
    write_json(run_dir / "train_history.json", {
        "status": "complete", "best_val_accuracy": val_acc, "best_epoch": 1, "wall_seconds": seconds,
        "history": [{"epoch": 1, "val_accuracy": val_acc, "seconds": seconds, "train_clouds": int(len(train))}]})
    return ckpt


def load_d2(payload: dict, path: str | os.PathLike) -> tuple[D2Network, dict]:
    """The network and metadata of a baseline checkpoint already read with ``weights_only=True``."""
    try:
        meta = payload["meta"]
        arrays = {k.split(".", 1)[1]: v.numpy() for k, v in payload["state_dict"].items() if k.startswith("forest.")}
        classifier = D2Classifier.from_state(arrays, meta["baseline"]["params"])
        return D2Network(classifier, len(meta["classes"])).eval(), meta
    except (KeyError, AttributeError, TypeError, IndexError) as exc:
        raise DataError(f"checkpoint '{path}' is not a complete D2 baseline ({type(exc).__name__}: {exc}); "
                        "retrain it with `shapes train backbone=d2`.") from None
