"""A run folder's contract: the files a run leaves, the record its checkpoint carries, and how a run
is saved, found, loaded and scored. Every job reads a run through this module, so the jobs need not
import one another.

``checkpoint.pt`` holds the weights and a :class:`RunMeta` as plain data (``torch.load(...,
weights_only=True)``); ``train_history.json`` holds the run's ``status`` (complete, interrupted or
diverged). ``metrics.json`` holds what ``shapes eval`` measured and what a seeded run repeats byte for
byte; ``timing.json`` beside it holds the clock readings of the run's cost (training wall time,
inference parts per second), which differ between two otherwise identical runs.
"""

from __future__ import annotations

import dataclasses
import importlib
import inspect
import json
import os
import pickle
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch

from shapes._atomic import atomic_path, write_json
from shapes.backbones import Classifier, build_backbone, stored_options
from shapes.errors import ConfigError, DataError

__all__ = ["CHECKPOINT", "RESUME", "HISTORY", "METRICS", "TIMING", "CLOCKED", "BackboneRecord", "HeadRecord",
           "DataRecord", "RunMeta", "twin_index", "save_checkpoint", "find_checkpoint", "read_history", "run_status",
           "latest_run", "trained_run", "runs_in", "load_classifier", "backbone_from_config", "logits_under_poses",
           "write_metrics", "read_metrics"]

CHECKPOINT = "checkpoint.pt"  # the best weights and the run's record
RESUME = "resume.pt"  # the training loop's latest state, for `shapes train resume=RUN_DIR`
HISTORY = "train_history.json"  # one row per epoch and the run's status
METRICS = "metrics.json"
TIMING = "timing.json"
CLOCKED = ("train_seconds", "parts_per_second")  # read off a clock: they differ between two identical runs
UNFINISHED = ("interrupted", "diverged", "running")  # statuses a run that did not finish training has


# --------------------------------------------------------------------------------- the record
@dataclass
class BackboneRecord:
    name: str  # the registry name (or "d2", the baseline)
    options: dict  # the options it was built with: building it again from them gives the same network
    symmetry: str  # "E3", "SE3" or "none"


@dataclass
class HeadRecord:
    hidden: int
    dropout: float


@dataclass
class DataRecord:
    dir: str  # the dataset folder the run was trained on
    points: int  # points per training cloud
    sampler: dict = field(default_factory=dict)  # the sampler's settings, as the dataset's meta.json has them


@dataclass
class RunMeta:
    """What a checkpoint says about its run: the task (classes, mirror twins, which are handed), the
    network (backbone, head), how it was trained and on what, and the best epoch's score.

    ``to_dict``/``from_dict`` give and take the plain dict stored in the checkpoint (unchanged keys, so
    checkpoints from before this record load, and older code reads new ones); keys this record does not
    name (the resolved config under ``"config"``) travel in ``extra``.
    """

    classes: list
    twins: dict
    handed: dict
    backbone: BackboneRecord
    head: HeadRecord | None  # None for the baseline, which has no torch head
    data: DataRecord
    train: dict = field(default_factory=dict)  # the training settings (TrainSettings without ``extra``)
    versions: dict = field(default_factory=dict)
    baseline: dict | None = None  # the baseline's model and fitted parameters
    epoch: int | None = None
    val_accuracy: float | None = None
    val_loss: float | None = None
    extra: dict = field(default_factory=dict)

    _SCORE = ("epoch", "val_accuracy", "val_loss")

    @classmethod
    def for_dataset(cls, dataset: dict, data_dir, points: int, backbone: BackboneRecord, **fields) -> "RunMeta":
        """A new run's record from its dataset's ``meta.json`` (classes, twins, handed, sampler)."""
        return cls(classes=list(dataset["classes"]), twins=dict(dataset["twins"]),
                   handed={k: bool(v) for k, v in dataset["handed"].items()}, backbone=backbone,
                   data=DataRecord(str(data_dir), int(points), dataset.get("sampler", {})), **fields)

    def to_dict(self) -> dict:
        out = {"classes": list(self.classes), "twins": dict(self.twins), "handed": dict(self.handed),
               "backbone": dataclasses.asdict(self.backbone),
               "head": None if self.head is None else dataclasses.asdict(self.head)}
        if self.baseline is not None:
            out["baseline"] = self.baseline
        out.update(train=self.train, data=dataclasses.asdict(self.data), versions=self.versions, **self.extra)
        out.update({k: getattr(self, k) for k in self._SCORE if getattr(self, k) is not None})
        return out

    @classmethod
    def from_dict(cls, meta: dict) -> "RunMeta":
        """The record of a stored dict; KeyError or TypeError when a key every run has is missing."""
        known = {f.name for f in dataclasses.fields(cls)} - {"extra"}
        b, h, d = meta["backbone"], meta["head"], meta["data"]
        twins = dict(meta["twins"])
        return cls(classes=list(meta["classes"]), twins=twins,
                   handed=dict(meta.get("handed") or {c: twins[c] != c for c in twins}),
                   backbone=BackboneRecord(b["name"], dict(b["options"]), b.get("symmetry")),
                   head=None if h is None else HeadRecord(h["hidden"], h["dropout"]),
                   data=DataRecord(d["dir"], d["points"], d.get("sampler") or {}),
                   train=dict(meta.get("train") or {}), versions=dict(meta.get("versions") or {}),
                   baseline=meta.get("baseline"), **{k: meta.get(k) for k in cls._SCORE},
                   extra={k: v for k, v in meta.items() if k not in known})

    def scored(self, epoch: int, val_accuracy: float, val_loss: float | None = None) -> "RunMeta":
        return dataclasses.replace(self, epoch=epoch, val_accuracy=val_accuracy, val_loss=val_loss)

    def twin_index(self) -> np.ndarray:
        return twin_index(self.classes, self.twins)


def twin_index(classes, twins: dict) -> np.ndarray:
    """``(C,)`` the index of each class's mirror twin (its own for an achiral class)."""
    classes = list(classes)
    return np.array([classes.index(twins[c]) for c in classes], dtype=np.int64)


# ------------------------------------------------------------------------------ save and find
def save_checkpoint(path: Path, weights, meta: RunMeta | dict) -> Path:
    """Weights (a module or a state dict of tensors) plus the plain record; loads with
    ``torch.load(path, weights_only=True)``. Renamed into place when whole."""
    state = weights.state_dict() if isinstance(weights, torch.nn.Module) else weights
    payload = {"state_dict": {k: v.detach().cpu() for k, v in state.items()},
               "meta": meta.to_dict() if isinstance(meta, RunMeta) else meta}
    with atomic_path(path) as tmp:
        torch.save(payload, tmp)
    return path


def find_checkpoint(run: str | os.PathLike) -> Path:
    """A run folder or a checkpoint file → the checkpoint path; DataError when there is none."""
    path = Path(run)
    if path.is_dir():
        path = path / CHECKPOINT
    if not path.is_file():
        raise DataError(f"no checkpoint at '{path}'; expected a run folder written by 'shapes train' or a {CHECKPOINT} file.")
    return path


def read_history(run_dir: str | os.PathLike) -> dict:
    """The run's ``train_history.json``; ``{}`` when it is missing or unreadable (an older run)."""
    try:
        history = json.loads((Path(run_dir) / HISTORY).read_text())
    except (OSError, ValueError):
        return {}
    return history if isinstance(history, dict) else {}


def run_status(run_dir: str | os.PathLike) -> str | None:
    """complete, interrupted or diverged, from the run's history; None when it records none."""
    return read_history(run_dir).get("status")


def latest_run(root: str | os.PathLike = "runs") -> Path:
    """The newest run folder under ``root`` whose training finished (interrupted and diverged runs
    are passed over); ConfigError when there is none."""
    found = sorted(Path(root).glob(f"**/{CHECKPOINT}"), key=lambda p: p.stat().st_mtime)
    finished = [p for p in found if run_status(p.parent) not in ("interrupted", "diverged")]
    if not finished:
        passed = f" ({len(found)} interrupted or diverged run(s) passed over)" if found else ""
        raise ConfigError(f"run=latest but no finished trained run exists under {root}/{passed}; train one with "
                          "`shapes train` or name it with run=<folder>.")
    return finished[-1].parent


def trained_run(run: str | os.PathLike, allow_unfinished: bool = False) -> str:
    """The run a job uses: ``latest`` resolved, and a run whose training did not finish refused unless
    ``allow_unfinished``."""
    run = str(latest_run()) if str(run) == "latest" else str(run)
    folder = Path(run) if Path(run).is_dir() else Path(run).parent
    status = run_status(folder)
    if status in UNFINISHED and not allow_unfinished:
        why = ("its checkpoint is the last good one before the loss became non-finite; retrain with a lower "
               "train.lr" if status == "diverged" else
               f"its checkpoint is the best of the epochs it finished; continue it with `shapes train "
               f"resume={folder}`")
        raise ConfigError(f"run '{run}' did not finish training (status: {status}): {why}, or pass "
                          "allow_unfinished=true to use it as it is.")
    return run


def runs_in(path: str | os.PathLike) -> list[Path]:
    """A run folder or checkpoint → itself; a folder of runs (a sweep) → every run folder under it."""
    path = Path(str(latest_run()) if str(path) == "latest" else path)
    if not path.is_dir() or (path / CHECKPOINT).is_file():
        return [path]
    return sorted(p.parent for p in path.rglob(CHECKPOINT)) or [path]


# ------------------------------------------------------------------------------------- load
def load_classifier(run: str | os.PathLike, device: str | torch.device = "cpu") -> tuple[torch.nn.Module, RunMeta]:
    """Rebuild the classifier from a checkpoint (``weights_only=True``); returns (model in eval mode, meta).

    A checkpoint whose weights do not fit the network its options build fails with one line, never
    half-loaded. The baseline's checkpoint gives its forest behind the classifier's interface.
    """
    path = find_checkpoint(run)
    payload = _load_weights_only(path, device)
    try:
        meta = RunMeta.from_dict(payload["meta"])
        if meta.backbone.name == "d2":
            from shapes.classic import D2Network  # the classical baseline: a forest behind the same interface

            model = D2Network.from_state(payload["state_dict"], meta.baseline, len(meta.classes), path)
            return model.to(device).eval(), meta
        options = stored_options(meta.backbone.name, meta.backbone.options)  # in today's names
        model = Classifier(build_backbone(meta.backbone.name, **options), len(meta.classes),
                           **dataclasses.asdict(meta.head))
        fit = model.load_state_dict(payload["state_dict"], strict=False)
    except (KeyError, RuntimeError, EOFError, TypeError, pickle.UnpicklingError) as exc:
        # torch's messages span lines ("Error(s) in loading ...:" then the details): keep one line
        detail = " ".join(line.strip() for line in str(exc).splitlines() if line.strip())
        raise DataError(f"checkpoint '{path}' cannot be read: {detail[:400]}") from exc
    if fit.missing_keys or fit.unexpected_keys:
        written = meta.versions.get("shapes", "an unknown version")
        parts = [f"{len(keys)} {what}, e.g. '{keys[0]}'"
                 for keys, what in ((fit.missing_keys, "weights missing"), (fit.unexpected_keys, "unexpected"))
                 if keys]
        raise DataError(
            f"checkpoint '{path}' does not fit the {meta.backbone.name} backbone built from its saved options "
            f"({'; '.join(parts)}): it was written by shapes {written} with other network code; retrain it with "
            "`shapes train`."
        )
    return model.to(device).eval(), meta


def _load_weights_only(path: Path, device) -> dict:
    """``torch.load(path, weights_only=True)``; whatever goes wrong becomes one DataError line.

    A file whose unpickling would build anything but tensors and plain data is refused unread,
    and the message never suggests turning that safety off.
    """
    try:
        payload = torch.load(path, map_location=device, weights_only=True)
    except pickle.UnpicklingError as exc:
        found = re.search(r"Unsupported global: (GLOBAL \S+)", str(exc))
        if found or "Weights only load failed" in str(exc):
            what = f" ({found.group(1)})" if found else ""
            raise DataError(f"checkpoint '{path}' holds objects other than weights and plain metadata{what}; it was "
                            "refused unread. Expected a checkpoint written by `shapes train`.") from None
        raise DataError(f"checkpoint '{path}' is not a torch checkpoint ({_first_line(exc)}); expected a "
                        "checkpoint written by `shapes train`.") from None
    except OSError as exc:
        raise DataError(f"checkpoint '{path}' cannot be read: {exc.strerror or _first_line(exc)}.") from None
    except (RuntimeError, EOFError, KeyError, ValueError, TypeError, AttributeError, IndexError) as exc:
        raise DataError(f"checkpoint '{path}' is truncated or corrupted, or not a torch checkpoint "
                        f"({type(exc).__name__}: {_first_line(exc)}); expected a complete checkpoint written by "
                        "`shapes train`.") from None
    if not isinstance(payload, dict):
        raise DataError(f"checkpoint '{path}' holds a {type(payload).__name__}; expected the dict of weights and "
                        "metadata written by `shapes train`.")
    return payload


def _first_line(exc: BaseException) -> str:
    """The first sentence of an exception's message, on one line."""
    text = " ".join(str(exc).split())
    return (text.split(". ")[0] if text else type(exc).__name__)[:200]


def backbone_from_config(config: dict):
    """Build what a ``shapes/conf/backbone/<name>.yaml`` describes: ``_target_`` (``module.Class``) called
    with the other keys as options. A ShapesError from the options comes through as it is."""
    options = {k: v for k, v in config.items() if k != "_target_"}
    module, _, name = str(config.get("_target_", "")).rpartition(".")
    try:
        target = getattr(importlib.import_module(module), name)
    except (ImportError, AttributeError, ValueError):
        raise ConfigError(f"backbone _target_ '{config.get('_target_')}' cannot be imported; expected "
                          "module.Class, as in shapes/conf/backbone/*.yaml.") from None
    try:
        inspect.signature(target).bind(**options)
    except TypeError as exc:
        raise ConfigError(f"backbone {config.get('_target_')}: {exc}; see shapes/conf/backbone/ for its options.") from None
    return target(**options)


# ------------------------------------------------------------------------------------ score
@torch.no_grad()
def logits_under_poses(model, points: torch.Tensor, rotations: torch.Tensor | None = None, batch_size: int = 32,
                       normals: torch.Tensor | None = None) -> torch.Tensor:
    """Logits of ``points (M, N, 3)`` each turned by its own ``rotations (M, 3, 3)`` → (M, classes),
    computed ``batch_size`` clouds at a time. ``normals (M, N, 3)``, when given, turn with their points
    (proper or improper ``rotations``); ``rotations=None`` leaves the clouds as they are."""
    if rotations is not None:
        r = rotations.transpose(-1, -2)
        points, normals = points @ r, None if normals is None else normals @ r
    out = []
    for i in range(0, len(points), batch_size):
        out.append(model(points[i:i + batch_size], None, None if normals is None else normals[i:i + batch_size]))
    return torch.cat(out)


# ---------------------------------------------------------------------------------- metrics
def write_metrics(run_dir: Path, results: dict) -> None:
    """``metrics.json`` holds what a seeded run repeats byte for byte; the clock readings of its cost
    (training wall time, inference parts/s) go to ``timing.json`` beside it."""
    cost = results.get("cost", {})
    write_json(run_dir / METRICS, {**results, "cost": {k: v for k, v in cost.items() if k not in CLOCKED}})
    write_json(run_dir / TIMING, {k: cost.get(k) for k in CLOCKED})


def read_metrics(run_dir: Path) -> dict:
    """``metrics.json`` with the clock readings of ``timing.json`` put back into its cost record
    (left ``None`` when ``timing.json`` is missing or unreadable). Raises ``OSError``/``ValueError``."""
    metrics = json.loads((Path(run_dir) / METRICS).read_text(encoding="utf-8"))
    if isinstance(metrics, dict) and isinstance(metrics.get("cost"), dict):
        try:
            timing = json.loads((Path(run_dir) / TIMING).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            timing = {}
        timing = timing if isinstance(timing, dict) else {}
        metrics["cost"].update({k: timing.get(k) for k in CLOCKED})
    return metrics
