"""The plots of the reports, drawn with matplotlib on the file-only Agg backend and written as PNG."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from shapes._atomic import atomic_path

__all__ = ["pyplot", "save_figure", "plot_confusion", "plot_reliability", "plot_angle_sweep", "plot_perturbations",
           "visible_curve", "curve_scale", "CURVES"]


def pyplot():
    """matplotlib's pyplot on the file-only Agg backend (no display needed)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def save_figure(fig, path: str | os.PathLike) -> Path:
    """Lay out, write atomically as PNG and close a figure."""
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=110)
    pyplot().close(fig)
    return Path(path)


def plot_confusion(metrics: dict, regime: str, path: str | os.PathLike) -> Path:
    plt = pyplot()
    cm = np.asarray(metrics["regimes"][regime]["confusion"], dtype=float)
    cm = cm / np.clip(cm.sum(1, keepdims=True), 1, None)
    names = metrics["classes"]
    fig, ax = plt.subplots(figsize=(0.45 * len(names) + 3, 0.45 * len(names) + 2.5))
    im = ax.imshow(cm, cmap="Blues", vmin=0, vmax=1)
    ax.set_xticks(range(len(names)), names, rotation=70, ha="right", fontsize=8)
    ax.set_yticks(range(len(names)), names, fontsize=8)
    ax.set_xlabel("predicted")
    ax.set_ylabel("expected")
    ax.set_title(f"{metrics['backbone']['name']}: {regime} test poses (row-normalised)")
    fig.colorbar(im, ax=ax, fraction=0.04)
    return save_figure(fig, path)


def plot_reliability(metrics: dict, path: str | os.PathLike) -> Path:
    """Reliability diagram: accuracy against confidence per bin, one line per pose regime."""
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(4.8, 4.2))
    ax.plot([0, 1], [0, 1], color="0.6", lw=1, ls="--", label="calibrated")
    for regime, m in metrics["regimes"].items():
        curve = m.get("reliability")
        if not curve:
            continue
        pts = [(c, a) for c, a in zip(curve["confidence"], curve["accuracy"]) if c is not None]
        if pts:
            ax.plot(*zip(*pts), marker="o", label=f"{regime} (error {m['ece']:.3f})")
    ax.set_xlabel("confidence (top-class probability)")
    ax.set_ylabel("accuracy in the bin")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1.02)
    ax.set_title(f"{metrics['backbone']['name']}: reliability")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    return save_figure(fig, path)


def plot_angle_sweep(runs: dict[str, dict], path: str | os.PathLike) -> Path:
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(6, 3.8))
    for name, metrics in runs.items():
        sweep = metrics.get("angle_sweep")
        if sweep:
            ax.plot([float(a) for a in sweep], [100 * v for v in sweep.values()], marker="o", label=name)
    ax.set_xlabel("rotation angle about a random axis (degrees)")
    ax.set_ylabel("accuracy (%)")
    ax.set_ylim(0, 102)
    ax.grid(alpha=0.3)
    ax.legend()
    return save_figure(fig, path)


# the curves a run's metrics hold, as (metrics key, x-axis label, log x): the compare job overlays the same
CURVES = {
    "angle_sweep": ("rotation angle about a random axis (degrees)", False),
    "noise_sweep": ("Gaussian noise σ (RMS radii), uniform random poses", True),
    "outlier_sweep": ("share of points replaced by stray points, uniform random poses", False),
    "point_count_sweep": ("points per cloud (random subset), uniform random poses", True),
    "visible_sweep": ("share of the surface a single-view scan shows (bin middle), uniform random poses", False),
}


_SHORT = {"noise_sweep": "Gaussian noise σ (RMS radii)", "outlier_sweep": "share of stray points",
          "point_count_sweep": "points per cloud", "visible_sweep": "visible share of the surface (scans)"}


def curve_scale(ax, key: str) -> None:
    """Set the x scale of the curve ``key`` of :data:`CURVES`, the same on a run's page and in a comparison:
    base-2 log for point counts, symmetric log (linear within 0.01) for the other log curves, else linear."""
    if CURVES[key][1] and key == "point_count_sweep":
        ax.set_xscale("log", base=2)
    elif CURVES[key][1]:
        ax.set_xscale("symlog", linthresh=0.01)


def visible_curve(metrics: dict) -> dict[str, float]:
    """The scans' accuracy against visible share as ``{bin middle: accuracy}`` (empty without scans)."""
    bins = (metrics.get("scans") or {}).get("visible_sweep") or {}
    out = {}
    for label, cell in bins.items():
        lo, hi = (float(v) for v in label.split("-"))
        out[f"{(lo + hi) / 2:g}"] = cell["accuracy"]
    return out


def plot_perturbations(metrics: dict, path: str | os.PathLike) -> Path | None:
    """Accuracy against each scanner imperfection the run was measured under, one panel each."""
    curves = {key: metrics.get(key) or {} for key in ("noise_sweep", "outlier_sweep", "point_count_sweep")}
    curves["visible_sweep"] = visible_curve(metrics)
    curves = {k: v for k, v in curves.items() if v}
    if not curves:
        return None
    plt = pyplot()
    fig, axes = plt.subplots(1, len(curves), figsize=(3.3 * len(curves), 3.2), squeeze=False)
    for ax, (key, curve) in zip(axes[0], curves.items()):
        ax.plot([float(x) for x in curve], [100 * v for v in curve.values()], marker="o")
        curve_scale(ax, key)
        ax.set_xlabel(_SHORT[key], fontsize=8)
        ax.set_ylim(0, 102)
        ax.grid(alpha=0.3)
    axes[0][0].set_ylabel("accuracy (%)")
    fig.suptitle(f"{metrics['backbone']['name']}: accuracy under scanner imperfections (uniform random poses)",
                 fontsize=9)
    return save_figure(fig, path)
