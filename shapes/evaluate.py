"""The evaluation job: score a trained classifier under the pose-robustness protocol.

Test regimes: ``cad`` (as modelled), ``upright`` (turned about the vertical axis), ``any``
(uniform random rotation) and ``mirrored`` (a reflection then a uniform rotation, scored against
the mirror-twin map: a handed part's mirror image must be called its twin, an achiral part's
mirror image keeps its class). Also accuracy against rotation angle and sensor noise, and the
measured invariance error of the logits, so a claim of invariance is a number.

Scans are a test condition of their own: when the test split holds single-view virtual scans
(``sample.mode`` scan or mixed), every regime is also scored on the scans and on the full surfaces
apart, and the scans' accuracy under uniform random poses is given against the share of the
part's surface each scan shows.
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
from shapes._runtime import set_threads
from shapes.data import SCAN, SURFACE, load_split
from shapes.errors import DataError
from shapes.metrics import expected_calibration_error, pose_consistency, reliability_curve
from shapes.geometry import POSE_REGIMES, check_regime, rotation_about_axis, random_improper, random_poses, uniform_rotations
from shapes.report import run_report
from shapes.run import find_checkpoint, load_classifier, logits_under_poses, read_history, runs_in, trained_run
from shapes.run import write_metrics
from shapes.seeding import torch_generator

__all__ = ["score", "invariance_errors", "evaluate_run", "evaluate_runs", "parameter_count", "perturbation_sweeps",
           "unknown_mirror_test", "CALIBRATION_BINS", "OUTLIER_SHARES", "POINT_COUNTS"]

ANGLES_DEG = (0, 30, 60, 90, 120, 150, 180)
VISIBLE_BINS = (0.0, 0.2, 0.3, 0.4, 0.5, 1.0)  # edges of the visible-share bins of the scans' curve
NOISE_LEVELS = (0.0, 0.01, 0.02, 0.05)  # in RMS radii of the normalised part
OUTLIER_SHARES = (0.0, 0.01, 0.02, 0.05, 0.1, 0.2)  # share of a cloud's points replaced by stray points
POINT_COUNTS = (128, 256, 512, 1024, 2048, 4096)  # points per cloud of the point-count curve, where the test clouds have them
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
    x = torch.as_tensor(test.points, dtype=torch.float32)
    nrm = torch.as_tensor(test.normals, dtype=torch.float32)
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


@torch.no_grad()
def _hand_test(model, x, nrm, y, twin_index, gen, batch_size) -> dict:
    """Each handed test cloud and its mirror image (``x -> -x``), both under one uniform random rotation.

    ``twin_answer``: share whose mirror image is named as the mirror twin of the part's own (handed)
    answer (what a model that sees hand does); ``same_answer``: share whose mirror image gets the part's own
    answer (what a model blind to hand does, always).
    """
    sel = np.flatnonzero(twin_index[y] != y)
    if len(sel) == 0:
        return {"handed_clouds": 0, "twin_answer": None, "same_answer": None}
    xs, ns = x[sel], nrm[sel]
    rot = uniform_rotations(len(sel), generator=gen)
    flip = xs.new_tensor([-1.0, 1.0, 1.0])
    own = logits_under_poses(model, xs, rot, batch_size, ns).argmax(-1).numpy()
    mirrored = logits_under_poses(model, xs * flip, rot, batch_size, ns * flip).argmax(-1).numpy()
    # an achiral answer is its own twin: only a handed answer swapped for its twin counts
    swapped = (mirrored == twin_index[own]) & (twin_index[own] != own)
    return {"handed_clouds": int(len(sel)), "twin_answer": float(swapped.mean()),
            "same_answer": float((mirrored == own).mean())}


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


def _angle_sweep(model, x, nrm, y, gen, batch_size) -> dict:
    """Accuracy when each cloud is turned by a fixed angle about a random axis."""
    out = {}
    for deg in ANGLES_DEG:
        axis = torch.randn(len(x), 3, generator=gen)
        rot = rotation_about_axis(axis, torch.full((len(x),), math.radians(deg)))
        pred = logits_under_poses(model, x, rot, batch_size, nrm).argmax(-1).numpy()
        out[str(deg)] = float((pred == y).mean())
    return out


def _noise_sweep(model, x, nrm, y, gen, batch_size) -> dict:
    """Accuracy under uniform random poses with Gaussian sensor noise of a given size.

    Points move by ``sigma`` RMS radii per axis; normals get the same ``sigma`` per component and are
    renormalised (about ``sigma`` radians of tilt), as normals estimated from a noisy scan would.
    """
    out = {}
    for sigma in NOISE_LEVELS:
        rot = uniform_rotations(len(x), generator=gen)
        noisy = x + sigma * torch.randn(x.shape, generator=gen)
        tilted = torch.nn.functional.normalize(nrm + sigma * torch.randn(nrm.shape, generator=gen), dim=-1)
        pred = logits_under_poses(model, noisy, rot, batch_size, tilted).argmax(-1).numpy()
        out[str(sigma)] = float((pred == y).mean())
    return out


# -- scanner imperfections: stray points and point count ------------------------------------


def _renormalise(points: torch.Tensor) -> torch.Tensor:
    """Each cloud ``(M, N, 3)`` centred and scaled to unit RMS radius, as ``shapes predict`` prepares a file."""
    centred = points - points.mean(dim=1, keepdim=True)
    rms = centred.pow(2).sum(-1).mean(-1).sqrt().clamp_min(1e-12)
    return centred / rms[:, None, None]


def with_stray_points(points: torch.Tensor, normals: torch.Tensor, share: float,
                      gen: torch.Generator) -> tuple[torch.Tensor, torch.Tensor]:
    """Replace ``round(share * N)`` random points of each cloud by points drawn uniformly in the
    cloud's axis-aligned bounding box, with normals pointing anywhere; then centre and rescale.

    Returns new tensors; the inputs are left as they are.
    """
    m, n, _ = points.shape
    k = int(round(share * n))
    points, normals = points.clone(), normals.clone()
    if k:
        idx = torch.rand(m, n, generator=gen).argsort(dim=1)[:, :k]  # (M, k) distinct per cloud
        lo, hi = points.amin(dim=1, keepdim=True), points.amax(dim=1, keepdim=True)
        stray = lo + (hi - lo) * torch.rand(m, k, 3, generator=gen, dtype=points.dtype)
        turned = torch.nn.functional.normalize(torch.randn(m, k, 3, generator=gen, dtype=normals.dtype), dim=-1)
        rows = torch.arange(m)[:, None]
        points[rows, idx] = stray
        normals[rows, idx] = turned
    return _renormalise(points), normals


def point_counts(available: int) -> list[int]:
    """The counts of the point-count curve that clouds of ``available`` points can give: those of
    :data:`POINT_COUNTS` up to it, and ``available`` itself when it lies inside their range."""
    counts = [c for c in POINT_COUNTS if c <= available]
    if POINT_COUNTS[0] <= available < POINT_COUNTS[-1] and available not in counts:
        counts.append(available)
    return counts


def _accuracy_under_any(model, points, normals, y, gen, batch_size) -> float:
    rot = uniform_rotations(len(points), generator=gen)
    pred = logits_under_poses(model, points, rot, batch_size, normals).argmax(-1).numpy()
    return float((pred == y).mean())


def perturbation_sweeps(model, x: torch.Tensor, nrm: torch.Tensor, y: np.ndarray, gen: torch.Generator,
                        batch_size: int = 32) -> dict:
    """Accuracy under uniform random poses against two scanner imperfections.

    ``outlier_sweep``: share of each cloud's points replaced by stray points (:func:`with_stray_points`),
    no clean-up. ``point_count_sweep``: each cloud cut to a random subset of that many of its points
    and renormalised; counts above the test clouds' own cannot be drawn from them, and
    ``point_count_range`` says which counts were measured and which were not.
    """
    out: dict = {"outlier_sweep": {}, "point_count_sweep": {}}
    for share in OUTLIER_SHARES:
        px, pn = with_stray_points(x, nrm, share, gen)
        out["outlier_sweep"][str(share)] = _accuracy_under_any(model, px, pn, y, gen, batch_size)
    n = int(x.shape[1])
    counts = point_counts(n)
    for count in counts:
        keep = torch.rand(len(x), n, generator=gen).argsort(dim=1)[:, :count]
        rows = torch.arange(len(x))[:, None]
        out["point_count_sweep"][str(count)] = _accuracy_under_any(
            model, _renormalise(x[rows, keep]), nrm[rows, keep], y, gen, batch_size)
    missing = [c for c in POINT_COUNTS if c > n]
    measured = f"{counts[0]} to {counts[-1]} points" if len(counts) > 1 else f"{counts[0]} points" if counts else ""
    note = f"the test clouds hold {n} points: measured from {measured}" if counts else \
        f"the test clouds hold {n} points, fewer than {POINT_COUNTS[0]}: no count of the curve could be measured"
    if missing:
        note += (f"; {', '.join(map(str, missing))} need test clouds of at least {missing[-1]} points "
                 f"(sample with sample.points={missing[-1]})")
    out["point_count_range"] = {"test_points": n, "measured": counts, "not_measured": missing, "note": note}
    return out


UNKNOWN_ACCEPT = 0.95  # share of the known test parts the "not a known part" confidence accepts (predict.accept's default)


@torch.no_grad()
def unknown_mirror_test(model, x, nrm, y, no_twin: np.ndarray, gen, batch_size: int = 32,
                        accept: float = UNKNOWN_ACCEPT) -> dict:
    """The mirror images of the handed classes whose twin is not in the catalog (``no_twin``, a mask
    of the test clouds), under uniform random poses: no class is right for them.

    ``named_as_itself``: share named as the part they mirror (what a model blind to hand does);
    ``rejected``: share whose top-class probability falls below the threshold that accepts ``accept`` of
    the known test clouds (every test cloud, as it is, under uniform random poses), as ``shapes predict``
    calls a cloud *not a known part*.
    """
    known = torch.softmax(logits_under_poses(model, x, uniform_rotations(len(x), generator=gen), batch_size, nrm)
                          .double(), -1).max(-1).values.numpy()
    threshold = float(np.quantile(known, 1.0 - accept))
    sel = np.flatnonzero(no_twin)
    flip = x.new_tensor([-1.0, 1.0, 1.0])
    prob = torch.softmax(logits_under_poses(model, x[sel] * flip, uniform_rotations(len(sel), generator=gen),
                                            batch_size, nrm[sel] * flip).double(), -1)
    conf, pred = prob.max(-1)
    return {"clouds": int(len(sel)), "named_as_itself": float((pred.numpy() == y[sel]).mean()),
            "rejected": float((conf.numpy() < threshold).mean()), "threshold": threshold, "accept": accept}
