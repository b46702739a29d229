"""The evaluation's test conditions beyond the pose regimes, for :mod:`shapes.evaluate`: each handed
test cloud beside its mirror image, accuracy against rotation angle and sensor noise, stray points
and point count (the scanner's imperfections), and the mirror images of handed parts with no twin in
the catalog. Every function takes a trained model and the test clouds as tensors and returns numbers.
"""

from __future__ import annotations

import math

import numpy as np
import torch

from shapes.geometry import rotation_about_axis, uniform_rotations
from shapes.run import logits_under_poses

__all__ = ["perturbation_sweeps", "with_stray_points", "point_counts", "unknown_mirror_test", "OUTLIER_SHARES",
           "POINT_COUNTS", "UNKNOWN_ACCEPT"]

ANGLES_DEG = (0, 30, 60, 90, 120, 150, 180)
NOISE_LEVELS = (0.0, 0.01, 0.02, 0.05)  # in RMS radii of the normalised part
OUTLIER_SHARES = (0.0, 0.01, 0.02, 0.05, 0.1, 0.2)  # share of a cloud's points replaced by stray points
POINT_COUNTS = (128, 256, 512, 1024, 2048, 4096)  # points per cloud of the point-count curve, where the test clouds have them


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
