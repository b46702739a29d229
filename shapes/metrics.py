"""Scores of a classifier's probabilities beyond accuracy: calibration and pose consistency.

A leaf: numpy only (and :mod:`shapes.errors` for the one-line user errors), so every job and the
report can use it.

Calibration follows Guo, Pleiss, Sun and Weinberger 2017, "On calibration of modern neural
networks" (ICML): the confidence of a prediction is its largest class probability; confidences
fall in ``bins`` equal-width bins, bin ``b`` holding ``(b/bins, (b+1)/bins]`` (the first bin also
holds 0); and

    ECE = sum_b |B_b| / M * |acc(B_b) - conf(B_b)|

over the non-empty bins, with ``acc`` the share of right answers in the bin and ``conf`` its mean
confidence. The predicted class is the first largest probability (``argmax``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from shapes.errors import InputError

__all__ = ["ReliabilityCurve", "reliability_curve", "expected_calibration_error", "pose_consistency", "PROB_TOL"]

# Largest |row sum - 1| accepted for probabilities: float32 softmax rows of a few hundred classes
# sum to 1 within ~1e-6; 1e-4 still catches logits or unnormalised scores passed by mistake.
PROB_TOL = 1e-4


@dataclass(frozen=True)
class ReliabilityCurve:
    """Per-bin calibration of a set of predictions.

    Attributes
    ----------
    edges : (bins + 1,) float, ``b / bins``; bin b is ``(edges[b], edges[b + 1]]``
    confidence : (bins,) float, mean confidence in each bin (NaN where empty)
    accuracy : (bins,) float, share of right answers in each bin (NaN where empty)
    count : (bins,) int64, predictions in each bin
    """

    edges: np.ndarray
    confidence: np.ndarray
    accuracy: np.ndarray
    count: np.ndarray

    @property
    def total(self) -> int:
        return int(self.count.sum())


def _check_bins(bins) -> int:
    if isinstance(bins, bool) or not isinstance(bins, (int, np.integer)) or bins < 1:
        raise InputError(f"bins should be a positive int, got {bins!r} instead.")
    return int(bins)


def _check(probs, target) -> tuple[np.ndarray, np.ndarray]:
    p = np.asarray(probs)
    if p.ndim != 2 or p.shape[0] < 1 or p.shape[1] < 1:
        raise InputError(f"probs should have shape (M, C) with M, C >= 1, got {p.shape} instead.")
    if not np.issubdtype(p.dtype, np.floating) and not np.issubdtype(p.dtype, np.integer):
        raise InputError(f"probs should be numbers, got dtype {p.dtype} instead.")
    p = p.astype(np.float64)
    if not np.isfinite(p).all() or p.min() < 0.0 or p.max() > 1.0:
        raise InputError(f"probs should be finite and in [0, 1], got values in [{np.nanmin(p):g}, {np.nanmax(p):g}] instead.")
    worst = float(np.abs(p.sum(1) - 1.0).max())
    if worst > PROB_TOL:
        raise InputError(f"probs rows should sum to 1 (within {PROB_TOL:g}), got a row off by {worst:.3g} instead; pass softmax outputs, not logits.")
    t = np.asarray(target)
    if t.shape != (p.shape[0],) or not np.issubdtype(t.dtype, np.integer):
        raise InputError(f"target should be {p.shape[0]} integer labels, got shape {t.shape} of dtype {t.dtype} instead.")
    if t.min() < 0 or t.max() >= p.shape[1]:
        raise InputError(f"target labels should lie in 0..{p.shape[1] - 1}, got values in {t.min()}..{t.max()} instead.")
    return p, t.astype(np.int64)


def reliability_curve(probs, target, bins: int = 10) -> ReliabilityCurve:
    """Mean confidence, accuracy and count per equal-width confidence bin (Guo et al. 2017).

    Parameters
    ----------
    probs : (M, C) float, class probabilities; rows sum to 1
    target : (M,) int, true labels in 0..C-1
    bins : number of equal-width bins over [0, 1]

    Returns
    -------
    ReliabilityCurve
    """
    bins = _check_bins(bins)
    p, t = _check(probs, target)
    pred = p.argmax(1)
    conf = p[np.arange(len(p)), pred]
    right = (pred == t).astype(np.float64)
    edges = np.arange(bins + 1, dtype=np.float64) / bins  # k / bins, correctly rounded
    # right-closed bins: a confidence equal to an edge falls in the bin below it; 0 in the first
    index = np.clip(np.searchsorted(edges, conf, side="left") - 1, 0, bins - 1)
    count = np.bincount(index, minlength=bins).astype(np.int64)
    with np.errstate(invalid="ignore", divide="ignore"):
        confidence = np.bincount(index, weights=conf, minlength=bins) / count
        accuracy = np.bincount(index, weights=right, minlength=bins) / count
    return ReliabilityCurve(edges=edges, confidence=confidence, accuracy=accuracy, count=count)


def expected_calibration_error(probs, target, bins: int = 10) -> float:
    """Expected calibration error (Guo et al. 2017), in [0, 1].

    Parameters
    ----------
    probs : (M, C) float, class probabilities; rows sum to 1
    target : (M,) int, true labels in 0..C-1
    bins : number of equal-width confidence bins over [0, 1]

    Returns
    -------
    ece : float, ``sum_b |B_b| / M * |acc(B_b) - conf(B_b)|`` over the non-empty bins
    """
    curve = reliability_curve(probs, target, bins)
    full = curve.count > 0
    gap = np.abs(curve.accuracy[full] - curve.confidence[full])
    return float((curve.count[full] * gap).sum() / curve.total)


def pose_consistency(votes) -> float:
    """Share of parts whose answer is the same under every one of K poses.

    Parameters
    ----------
    votes : (M, K) labels (int or str), ``votes[i, k]`` the answer for part i in pose k

    Returns
    -------
    consistency : float in [0, 1]
    """
    v = np.asarray(votes)
    if v.ndim != 2 or v.shape[0] < 1 or v.shape[1] < 2:
        raise InputError(f"votes should have shape (M, K) with M >= 1 parts and K >= 2 poses, got {v.shape} instead.")
    if v.dtype.kind not in "iuUS":
        raise InputError(f"votes should be labels (integers or strings), got dtype {v.dtype} instead.")
    return float((v == v[:, :1]).all(1).mean())
