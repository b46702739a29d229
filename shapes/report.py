"""Reports: Markdown tables and plots written from ``metrics.json`` results."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from shapes._atomic import atomic_path, write_text

__all__ = ["run_report", "comparison_report", "plot_confusion", "plot_angle_sweep"]

REGIME_NOTES = {
    "cad": "as modelled in CAD",
    "upright": "turned about the vertical axis, as on a conveyor",
    "any": "uniform random rotation",
    "mirrored": "reflected then rotated; scored against the mirror twin",
}


def _pct(v) -> str:
    return "–" if v is None else f"{100 * v:.1f}%"


def _sci(v) -> str:
    return "–" if v is None else f"{v:.1e}"


def regime_table(metrics: dict) -> str:
    rows = ["| test poses | accuracy | balanced | handed classes | achiral classes |",
            "|---|---|---|---|---|"]
    for regime, m in metrics["regimes"].items():
        rows.append(f"| {regime} ({REGIME_NOTES.get(regime, '')}) | {_pct(m['accuracy'])} | "
                    f"{_pct(m['balanced_accuracy'])} | {_pct(m['handed_accuracy'])} | {_pct(m['achiral_accuracy'])} |")
    return "\n".join(rows)


def scans_table(runs: dict[str, dict]) -> str:
    """Accuracy on the test split's single-view scans alone, per run; empty when there are none."""
    named = {n: m["scans"] for n, m in runs.items() if m.get("scans", {}).get("count")}
    if not named:
        return ""
    bins = sorted({b for sc in named.values() for b in sc["visible_sweep"]})
    rows = ["| backbone | scans | any | mirrored | handed (any / mirrored) | " + " | ".join(f"visible {b}" for b in bins) + " |",
            "|---|---|---|---|---|" + "---|" * len(bins)]
    for n, sc in named.items():
        a, m = sc["any"], sc["mirrored"]
        rows.append(f"| {n} | {sc['count']} | {_pct(a['accuracy'])} | {_pct(m['accuracy'])} | "
                    f"{_pct(a['handed_accuracy'])} / {_pct(m['handed_accuracy'])} | "
                    + " | ".join(_pct(sc["visible_sweep"].get(b, {}).get("accuracy")) for b in bins) + " |")
    return "\n".join(rows)


def per_class_table(metrics: dict) -> str:
    regimes = list(metrics["regimes"])
    rows = ["| class | " + " | ".join(regimes) + " |", "|---|" + "---|" * len(regimes)]
    for name in metrics["classes"]:
        rows.append(f"| {name} | " + " | ".join(_pct(metrics["regimes"][r]["per_class"][name]) for r in regimes) + " |")
    return "\n".join(rows)


def plot_confusion(metrics: dict, regime: str, path: str | os.PathLike) -> Path:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

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
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=110)
    plt.close(fig)
    return Path(path)


def plot_angle_sweep(runs: dict[str, dict], path: str | os.PathLike) -> Path:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

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
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=110)
    plt.close(fig)
    return Path(path)


def _sweep_table(runs: dict[str, dict], key: str, label: str) -> str:
    names = [n for n, m in runs.items() if m.get(key)]
    if not names:
        return ""
    points = list(runs[names[0]][key])
    rows = [f"| backbone | " + " | ".join(f"{label}{p}" for p in points) + " |", "|---|" + "---|" * len(points)]
    for n in names:
        rows.append(f"| {n} | " + " | ".join(_pct(runs[n][key][p]) for p in points) + " |")
    return "\n".join(rows)


def run_report(metrics: dict, out_dir: str | os.PathLike) -> Path:
    """``report.md`` and ``confusion_<regime>.png`` for one evaluated run."""
    out_dir = Path(out_dir)
    name = metrics["backbone"]["name"]
    pngs = []
    for regime in ("any", "mirrored"):
        if regime in metrics["regimes"]:
            pngs.append(plot_confusion(metrics, regime, out_dir / f"confusion_{regime}.png").name)
    inv = metrics["invariance"]
    text = [f"# Evaluation: `{name}` backbone (declared symmetry {metrics['backbone']['symmetry']})", "",
            f"Checkpoint `{metrics['checkpoint']}`, test data `{metrics['data']}`: {metrics['test_clouds']} clouds, "
            f"{metrics['repeats']} random poses each per regime.", "", regime_table(metrics), "",
            "Measured invariance (largest change of the logits, relative to the largest logit): "
            f"rotations {_sci(inv['rotation'])}, reflections {_sci(inv['reflection'])}, "
            f"translations {_sci(inv['translation'])}.", ""]
    scans = scans_table({name: metrics})
    if scans:
        text += ["## Single-view scans", "", "The test split's virtual scans alone (one view each, normals as the "
                 "dataset made them), under uniform random poses and mirrored; the last columns bin them by the "
                 "share of the part's surface they show (random poses).", "", scans, ""]
    text += ["## Per class", "", per_class_table(metrics), ""]
    if metrics.get("angle_sweep"):
        text += ["## Accuracy against rotation angle", "", _sweep_table({name: metrics}, "angle_sweep", ""), ""]
    if metrics.get("noise_sweep"):
        text += ["## Accuracy under sensor noise (uniform random poses; σ in RMS radii)", "",
                 _sweep_table({name: metrics}, "noise_sweep", "σ="), ""]
    text += [f"![confusion {p}]({p})" for p in pngs]
    return write_text(out_dir / "report.md", "\n".join(text) + "\n")


def comparison_report(runs: dict[str, dict], out_dir: str | os.PathLike, *, title: str, preamble: str = "") -> Path:
    """One report comparing several evaluated backbones side by side."""
    out_dir = Path(out_dir)
    regimes = list(next(iter(runs.values()))["regimes"])
    head = "| backbone | symmetry | " + " | ".join(regimes) + " | handed classes under mirror | rotation change | reflection change |"
    rows = [head, "|---|---|" + "---|" * len(regimes) + "---|---|---|"]
    for name, m in runs.items():
        mirror = m["regimes"].get("mirrored", {})
        rows.append(f"| {name} | {m['backbone']['symmetry']} | "
                    + " | ".join(_pct(m["regimes"][r]["accuracy"]) for r in regimes)
                    + f" | {_pct(mirror.get('handed_accuracy'))} | {_sci(m['invariance']['rotation'])} | "
                    f"{_sci(m['invariance']['reflection'])} |")
    plot_angle_sweep(runs, out_dir / "angle_sweep.png")
    text = [f"# {title}", "", preamble, "", "Accuracy on held-out part instances under each test-pose regime:", "",
            "\n".join(rows), "",
            "*rotation change*: the largest change of the logits under random rotations (relative); "
            "*reflection change*: the same under mirror images. An E3 model shows round-off for both and "
            "cannot tell mirror twins apart; an SE3 model must change under reflections.", ""]
    scans = scans_table(runs)
    if scans:
        text += ["## Single-view scans", "", "The test split's virtual scans alone, under uniform random poses and "
                 "mirrored, and against the share of the surface they show:", "", scans, ""]
    text += ["## Accuracy against rotation angle", "", _sweep_table(runs, "angle_sweep", ""), "",
             "![accuracy against angle](angle_sweep.png)", "",
             "## Accuracy under sensor noise (uniform random poses; σ in RMS radii)", "",
             _sweep_table(runs, "noise_sweep", "σ="), "", "## Per-run reports", ""]
    text += [f"- `{n}`: [{n}/report.md]({n}/report.md)" for n in runs]
    return write_text(out_dir / "report.md", "\n".join(text) + "\n")
