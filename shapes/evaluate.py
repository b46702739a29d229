"""The evaluation job: score a trained classifier under the pose-robustness protocol.

Test regimes: ``cad`` (as modelled), ``upright`` (turned about the vertical axis), ``any``
(uniform random rotation) and ``mirrored`` (a reflection then a uniform rotation, scored against
the mirror-twin map: a handed part's mirror image must be called its twin, an achiral part's
mirror image keeps its class). Also accuracy against rotation angle and sensor noise, and the
measured invariance of the logits (rotation change, reflection change), so a claim of invariance
is a number.

Scans are a test condition of their own: when the test split holds single-view virtual scans
(``sample.mode`` scan or mixed), every regime is also scored on the scans and on the full surfaces
apart, and the scans' accuracy under uniform random poses is given against the share of the
part's surface each scan shows.

The test conditions beyond the pose regimes (mirror images, angle, noise, stray points, point count)
are measured in ``shapes/_conditions.py``; this module runs them and scores the regimes.
"""

from __future__ import annotations

import dataclasses
import math
import os
import time
from pathlib import Path

import numpy as np
import torch
from sklearn.metrics import balanced_accuracy_score, confusion_matrix

from shapes import _checks as check
from shapes._conditions import (OUTLIER_SHARES, POINT_COUNTS, _angle_sweep, _hand_test, _noise_sweep, perturbation_sweeps,
                                point_counts, unknown_mirror_test, with_stray_points)
from shapes._runtime import set_threads
from shapes.data import SCAN, SURFACE, load_split
from shapes.errors import DataError
from shapes.metrics import expected_calibration_error, pose_consistency, reliability_curve
from shapes.geometry import POSE_REGIMES, check_regime, random_improper, random_poses, uniform_rotations
from shapes.report import run_report
from shapes.run import find_checkpoint, load_classifier, logits_under_poses, read_history, runs_in, trained_run
from shapes.run import write_metrics
from shapes.seeding import torch_generator

__all__ = ["score", "invariance_errors", "evaluate_run", "evaluate_runs", "parameter_count", "perturbation_sweeps",
           "unknown_mirror_test", "with_stray_points", "point_counts", "CALIBRATION_BINS", "OUTLIER_SHARES", "POINT_COUNTS"]

VISIBLE_BINS = (0.0, 0.2, 0.3, 0.4, 0.5, 1.0)  # edges of the visible-share bins of the scans' curve
CALIBRATION_BINS = 10  # equal-width confidence bins of the calibration error (Guo et al. 2017 use 15 on
# 10 000 images; a test split of a few hundred clouds fills 10 bins better)


def score(pred: np.ndarray, target: np.ndarray, classes: list[str], handed: dict[str, bool]) -> dict:
    """Overall, balanced, per-class and handed/achiral accuracy plus the confusion matrix."""
    labels = np.arange(len(classes))
    handed_mask = np.array([handed[classes[t]] for t in target])
    per_class = {}
    for i, name in enumerate(classes):
        sel = target == i
        per_class[name] = float((pred[sel] == i).mean()) if sel.any() else None
    return {
        "accuracy": float((pred == target).mean()),
        "balanced_accuracy": float(balanced_accuracy_score(target, pred)),
        "handed_accuracy": float((pred[handed_mask] == target[handed_mask]).mean()) if handed_mask.any() else None,
        "achiral_accuracy": float((pred[~handed_mask] == target[~handed_mask]).mean()) if (~handed_mask).any() else None,
        "per_class": per_class,
        "confusion": confusion_matrix(target, pred, labels=labels).tolist(),
        "count": int(len(target)),
    }


@torch.no_grad()
def invariance_errors(model, points: torch.Tensor, trials: int = 8, seed: int = 0,
                      normals: torch.Tensor | None = None) -> dict:
    """Largest change of the logits under random rotations and under reflections, relative to
    the largest logit magnitude. An invariant model shows float round-off (~1e-6 in float32);
    a model that sees handedness must change under reflections."""
    gen = torch_generator(seed)
    base = logits_under_poses(model, points, None, 64, normals)
    scale = float(base.abs().max().clamp_min(1e-12))
    out = {}
    for name, sampler in (("rotation", uniform_rotations), ("reflection", random_improper)):
        worst = 0.0
        for _ in range(trials):
            rot = sampler(len(points), generator=gen, dtype=points.dtype)
            worst = max(worst, float((logits_under_poses(model, points, rot, 64, normals) - base).abs().max()) / scale)
        out[name] = worst
    # translation: every backbone is built translation invariant; measure it too
    shift = torch.randn(len(points), 1, 3, generator=gen, dtype=points.dtype) * 5.0
    out["translation"] = float((logits_under_poses(model, points + shift, None, 64, normals) - base).abs().max()) / scale
    return out


def evaluate_run(run: str | os.PathLike, data_dir: str | os.PathLike | None = None, *,
                 poses: tuple[str, ...] = POSE_REGIMES, repeats: int = 3, seed: int = 0,
                 batch_size: int = 32, threads: int | None = None, sweeps: bool = True,
                 write: bool = True) -> dict:
    """Score the checkpoint in ``run`` on the test split; write ``metrics.json`` beside it.

    Each test cloud is scored under ``repeats`` random poses per regime.
    """
    if isinstance(poses, str):
        check.fail("eval.poses", "a list of regimes (e.g. '[any,mirrored]')", f"the string {poses!r}")
    for p in poses:
        check_regime(p, POSE_REGIMES, "eval.poses")
    check.integer("eval.repeats", repeats, low=1)
    set_threads(threads)
    ckpt = find_checkpoint(run)
    model, meta = load_classifier(ckpt)
    data_dir = data_dir or meta.data.dir
    test = load_split(data_dir, "test")
    classes, handed = list(meta.classes), meta.handed
    if list(test.meta["classes"]) != classes:
        raise DataError(f"the classes in '{data_dir}' differ from the checkpoint's: "
                        f"{len(test.meta['classes'])} vs {len(classes)} classes.")
    twin_index = meta.twin_index()
    x = torch.tensor(np.asarray(test.points), dtype=torch.float32)  # copies: the split's arrays are read-only maps
    nrm = torch.tensor(np.asarray(test.normals), dtype=torch.float32)
    y = np.asarray(test.labels)
    gen = torch_generator(seed)
    results: dict = {"checkpoint": str(ckpt), "data": str(data_dir), "backbone": dataclasses.asdict(meta.backbone),
                     "train": meta.train, "catalog": test.meta.get("catalog"), "twins": dict(meta.twins),
                     "handed": dict(handed), "seed": seed, "repeats": repeats, "test_clouds": int(len(x)),
                     "classes": classes, "regimes": {}}
    twin_check = test.meta.get("twin_check")
    if twin_check:
        results["twin_check"] = twin_check
    # mirror images of handed classes whose twin is not in the catalog have no right class: scored apart
    no_twin = np.isin(y, [classes.index(c) for c in (twin_check or {}).get("unpaired", []) if c in classes])
    infer_seconds, inferred = 0.0, 0
    for regime in poses:
        probs, targets = [], []
        sel = ~no_twin if regime == "mirrored" else np.ones(len(y), bool)
        if not sel.any():
            continue
        kind = np.tile(np.asarray(test.kind)[sel], repeats)
        for _ in range(repeats):
            rot = random_poses(regime, int(sel.sum()), generator=gen)
            t0 = time.perf_counter()
            logits = logits_under_poses(model, x[sel], rot, batch_size, nrm[sel])
            infer_seconds, inferred = infer_seconds + time.perf_counter() - t0, inferred + int(sel.sum())
            probs.append(torch.softmax(logits.double(), -1).numpy())
            targets.append(twin_index[y[sel]] if regime == "mirrored" else y[sel])
        prob, target = np.concatenate(probs), np.concatenate(targets)
        pred = prob.argmax(-1)
        results["regimes"][regime] = score(pred, target, classes, handed)
        results["regimes"][regime].update(_calibration(prob, target, pred, repeats))
        results["regimes"][regime]["by_kind"] = {
            name: _kind_score(pred[kind == value], target[kind == value], classes, handed)
            for name, value in (("surface", SURFACE), ("scan", SCAN))}
    results["scans"] = _scan_condition(model, x, nrm, y, test, twin_index, classes, handed, gen,
                                       repeats, batch_size)
    results["hand"] = _hand_test(model, x, nrm, y, twin_index, gen, batch_size)
    if no_twin.any():
        results["unknown_mirror"] = unknown_mirror_test(model, x, nrm, y, no_twin, gen, batch_size)
    few = min(len(x), 32)
    results["invariance"] = invariance_errors(model, x[:few], seed=seed, normals=nrm[:few])
    if sweeps:
        results["angle_sweep"] = _angle_sweep(model, x, nrm, y, gen, batch_size)
        results["noise_sweep"] = _noise_sweep(model, x, nrm, y, gen, batch_size)
        results.update(perturbation_sweeps(model, x, nrm, y, gen, batch_size))
    results["cost"] = _cost(model, meta.train, ckpt.parent, inferred, infer_seconds, batch_size)
    if write:
        write_metrics(ckpt.parent, results)
    return results


def evaluate_runs(run: str | os.PathLike, *, allow_unfinished: bool = False, **options) -> list[tuple[dict, Path]]:
    """``shapes eval``: evaluate ``run`` (a run folder, a checkpoint, ``latest``, or a folder of runs such
    as a sweep, run by run) and write each run's report beside its metrics. Every run must have
    finished training unless ``allow_unfinished``. ``options`` go to :func:`evaluate_run`.

    Returns (metrics, report path) per run.
    """
    out = []
    for one in runs_in(run):
        metrics = evaluate_run(trained_run(one, allow_unfinished), None, **options)
        out.append((metrics, run_report(metrics, Path(metrics["checkpoint"]).parent)))
    return out


def _calibration(prob: np.ndarray, target: np.ndarray, pred: np.ndarray, repeats: int) -> dict:
    """Expected calibration error, the reliability curve and pose consistency of one regime.

    ``prob (repeats * M, C)`` holds the test clouds in order once per pose, so the answers of cloud
    ``i`` are ``pred[i::M]``; pose consistency needs at least two poses per cloud.
    """
    curve = reliability_curve(prob, target, CALIBRATION_BINS)
    votes = pred.reshape(repeats, -1).T  # (M, repeats)
    return {
        "ece": expected_calibration_error(prob, target, CALIBRATION_BINS),
        "reliability": {"edges": curve.edges.tolist(), "count": curve.count.tolist(),
                        "confidence": [None if math.isnan(v) else float(v) for v in curve.confidence],
                        "accuracy": [None if math.isnan(v) else float(v) for v in curve.accuracy]},
        "mean_confidence": float(prob.max(-1).mean()),
        "pose_consistency": pose_consistency(votes) if repeats >= 2 else None,
    }


def parameter_count(model) -> int:
    """Numbers the model learned: trainable weights of a network, stored tree numbers of a forest."""
    own = getattr(model, "learned_numbers", None)
    if own is not None:
        return int(own() if callable(own) else own)
    return int(sum(p.numel() for p in model.parameters()))


def _cost(model, train: dict, run_dir: Path, inferred: int, infer_seconds: float, batch_size: int) -> dict:
    """What the run cost: training wall time and threads (from the run's record), parameters, and
    inference throughput measured over every pose regime of this evaluation."""
    history = read_history(run_dir)
    train_threads = train.get("threads")
    return {
        "train_seconds": history.get("wall_seconds"),
        "train_epochs": len(history.get("history", [])) or None,
        "train_threads": train_threads,
        "train_threads_note": "train.threads" if train_threads else "torch's default (train.threads unset)",
        "max_minutes": train.get("max_minutes"),
        "parameters": parameter_count(model),
        "eval_threads": int(torch.get_num_threads()),
        "parts_per_second": inferred / infer_seconds if infer_seconds > 0 else None,
        "inference_batch_size": int(batch_size),
        "inferred_parts": int(inferred),
    }


def _kind_score(pred: np.ndarray, target: np.ndarray, classes, handed) -> dict | None:
    """Accuracy and handed accuracy of one kind of cloud, or None when the split has none of it."""
    if len(target) == 0:
        return None
    m = score(pred, target, classes, handed)
    return {k: m[k] for k in ("accuracy", "handed_accuracy", "achiral_accuracy", "count")}


def _scan_condition(model, x, nrm, y, test, twin_index, classes, handed, gen, repeats, batch_size) -> dict:
    """The test split's virtual scans alone: accuracy under uniform random poses and mirrored, and
    accuracy (random poses) against the share of the surface each scan shows."""
    sel = np.flatnonzero(np.asarray(test.kind) == SCAN)
    if len(sel) == 0:
        return {"count": 0, "note": "the test split holds no virtual scans; sample with sample.mode=mixed or scan"}
    xs, ns, ys = x[sel], nrm[sel], y[sel]
    visible = np.asarray(test.visible)[sel]
    out: dict = {"count": int(len(sel)), "visible_mean": float(visible.mean())}
    hits_any = None
    for regime in ("any", "mirrored"):
        preds, targets = [], []
        for _ in range(repeats):
            rot = random_poses(regime, len(xs), generator=gen)
            preds.append(logits_under_poses(model, xs, rot, batch_size, ns).argmax(-1).numpy())
            targets.append(twin_index[ys] if regime == "mirrored" else ys)
        pred, target = np.concatenate(preds), np.concatenate(targets)
        out[regime] = _kind_score(pred, target, classes, handed)
        if regime == "any":
            hits_any = (pred == target).reshape(repeats, -1).mean(axis=0)  # (S,) per scan
    curve = {}
    for lo, hi in zip(VISIBLE_BINS[:-1], VISIBLE_BINS[1:]):
        inside = (visible >= lo) & (visible < hi) if hi < 1.0 else (visible >= lo)
        if inside.any():
            curve[f"{lo:.1f}-{hi:.1f}"] = {"accuracy": float(hits_any[inside].mean()), "count": int(inside.sum())}
    out["visible_sweep"] = curve
    return out
