"""The Markdown of the reports: one evaluated run's page and the page comparing several runs, with
their tables and sections; the plots come from ``_plots``, the HTML page beside each from ``_html``."""

from __future__ import annotations

import os
from pathlib import Path

from shapes.report._html import write_report
from shapes.report._plots import plot_angle_sweep, plot_confusion, plot_perturbations, plot_reliability

__all__ = ["run_report", "comparison_report", "pose_matrix_row", "perturbation_sections", "twin_warnings",
           "REGIME_NOTES"]

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


def _num(v, digits: int = 3) -> str:
    return "–" if v is None else f"{v:.{digits}f}"


def regime_table(metrics: dict) -> str:
    rows = ["| test poses | accuracy | balanced | handed classes | achiral classes | calibration error | "
            "pose consistency |", "|---|---|---|---|---|---|---|"]
    for regime, m in metrics["regimes"].items():
        rows.append(f"| {regime} ({REGIME_NOTES.get(regime, '')}) | {_pct(m['accuracy'])} | "
                    f"{_pct(m['balanced_accuracy'])} | {_pct(m['handed_accuracy'])} | {_pct(m['achiral_accuracy'])} | "
                    f"{_num(m.get('ece'))} | {_pct(m.get('pose_consistency'))} |")
    return "\n".join(rows)


def hand_note(metrics: dict) -> str:
    """One sentence on whether the run tells a handed part from its mirror twin, from the numbers."""
    mirrored = metrics["regimes"].get("mirrored", {})
    handed = mirrored.get("handed_accuracy")
    reflection = metrics.get("invariance", {}).get("reflection")
    if handed is None or reflection is None:
        return ""
    hand = metrics.get("hand") or {}
    pair = ""
    if hand.get("handed_clouds"):
        pair = (f" Each of the {hand['handed_clouds']} handed test clouds beside its own mirror image: the mirror image "
                f"got the same answer as the part in {_pct(hand['same_answer'])} of them and the mirror twin of that "
                f"answer in {_pct(hand['twin_answer'])}.")
    if reflection < 1e-3:
        return (f"**Blind to hand.** Its outputs change by {_sci(reflection)} under a reflection, so it answers a "
                "mirror image exactly as the part itself: a mirrored handed part is named as the original, not as "
                f"its twin (the handed classes score {_pct(handed)} under mirrored test poses)." + pair)
    return (f"**Sees hand.** Its outputs change by {_sci(reflection)} under a reflection; under mirrored test poses "
            f"the handed classes (which must be named as their twin) score {_pct(handed)}." + pair)


def cost_line(metrics: dict) -> str:
    """Training wall time, threads, parameters and inference throughput of a run, as one sentence."""
    c = metrics.get("cost")
    if not c:
        return ""
    secs = "–" if c.get("train_seconds") is None else f"{c['train_seconds']:.0f} s"
    threads = c.get("train_threads") or "torch's default"
    rate = "–" if c.get("parts_per_second") is None else f"{c['parts_per_second']:.0f}"
    epochs = c.get("train_epochs")
    return (f"Cost: training {secs} of wall time ({epochs or '–'} epoch{'' if epochs == 1 else 's'}, threads: {threads}"
            + (f", budget {c['max_minutes']:g} min" if c.get("max_minutes") else "")
            + f"); {c['parameters']:,} learned numbers; inference {rate} parts/s "
            f"({c['eval_threads']} threads, batches of {c['inference_batch_size']}).")


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
    if any("reliability" in m for m in metrics["regimes"].values()):
        pngs.append(plot_reliability(metrics, out_dir / "reliability.png").name)
    inv = metrics["invariance"]
    text = [f"# Evaluation: `{name}` backbone (declared symmetry {metrics['backbone']['symmetry']})", "",
            f"Checkpoint `{metrics['checkpoint']}`, test data `{metrics['data']}`: {metrics['test_clouds']} clouds, "
            f"{metrics['repeats']} random poses each per regime.", "", regime_table(metrics), "",
            "*calibration error*: expected calibration error of the top class's probability "
            "(10 equal-width confidence bins); *pose consistency*: share of test clouds given the same answer "
            "under every one of their random poses.", "",
            "Measured invariance (largest change of the logits, relative to the largest logit): "
            f"rotations {_sci(inv['rotation'])}, reflections {_sci(inv['reflection'])}, "
            f"translations {_sci(inv['translation'])}.", ""]
    for line in (hand_note(metrics), cost_line(metrics)):
        if line:
            text += [line, ""]
    text += twin_warnings(metrics) + pose_matrix_row(metrics)
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
    text += perturbation_sections(metrics, out_dir)
    text += [f"![confusion {p}]({p})" for p in pngs]
    return write_report(out_dir / "report.md", "\n".join(text) + "\n")


# -- the train x test pose matrix, robustness curves and the twin check of a run -----------------


def pose_matrix_row(metrics: dict) -> list[str]:
    """This run's row of the train x test pose matrix, as report lines."""
    trained = (metrics.get("train") or {}).get("poses")
    regimes = list(metrics["regimes"])
    head = "| train poses ↓, test poses → | " + " | ".join(regimes) + " |"
    row = (f"| {trained or 'no poses (a model of distances)'} | "
           + " | ".join(_pct(metrics["regimes"][r]["accuracy"]) for r in regimes) + " |")
    return ["## Train × test poses", "",
            f"This run was trained with `train.poses={trained}`; its accuracy under each test regime is one row of "
            "the train × test pose matrix. A sweep over the training regimes "
            "(`shapes train -m train.poses=cad,upright,any`) evaluated and then compared with `shapes compare` "
            "fills the whole matrix.", "", head, "|---|" + "---|" * len(regimes), row, ""]


def twin_warnings(metrics: dict) -> list[str]:
    """Where the mirror-twin map came from, and the geometry's disagreements with it, as report lines."""
    check = metrics.get("twin_check")
    if not check:
        return []
    lines = ["## Mirror twins", "", f"Mirror-twin map: {check.get('source', 'declared')}."]
    if check.get("unpaired"):
        lines[-1] += (" Handed classes whose mirror twin is not in the catalog: "
                      + ", ".join(f"`{c}`" for c in check["unpaired"])
                      + "; their mirror images must be called *not a known part*.")
    unknown = metrics.get("unknown_mirror") or {}
    if unknown.get("clouds"):
        lines[-1] += (f" Of their {unknown['clouds']} mirror images (uniform random poses), "
                      f"{_pct(unknown['named_as_itself'])} were named as the part itself and "
                      f"{_pct(unknown['rejected'])} fell below the confidence that accepts "
                      f"{_pct(unknown['accept'])} of the known test parts.")
    lines.append("")
    for warning in check.get("warnings") or ():
        lines += [f"**Warning:** {warning}", ""]
    return lines


def perturbation_sections(metrics: dict, out_dir: str | os.PathLike) -> list[str]:
    """Report lines for the stray-point and point-count curves, and their plot beside the noise curve."""
    name = metrics["backbone"]["name"]
    text = []
    if metrics.get("outlier_sweep"):
        text += ["## Accuracy under stray points (uniform random poses)", "",
                 "A share of each cloud's points replaced by points drawn uniformly in its bounding box (normals "
                 "pointing anywhere), the cloud then centred and scaled again; no clean-up.", "",
                 _sweep_table({name: {"outlier_sweep": {f"{100 * float(p):g}%": v
                                                        for p, v in metrics["outlier_sweep"].items()}}},
                              "outlier_sweep", ""), ""]
    if metrics.get("point_count_sweep") is not None and "point_count_range" in metrics:
        rng = metrics["point_count_range"]
        text += ["## Accuracy against point count (uniform random poses)", "",
                 f"Each cloud cut to a random subset of its points, centred and scaled again; {rng['note']}.", ""]
        if metrics["point_count_sweep"]:
            text += [_sweep_table({name: metrics}, "point_count_sweep", "N="), ""]
    png = plot_perturbations(metrics, Path(out_dir) / "perturbations.png")
    if png is not None:
        text += ["![accuracy under scanner imperfections](perturbations.png)", ""]
    return text


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
    return write_report(out_dir / "report.md", "\n".join(text) + "\n")
