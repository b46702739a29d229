"""Reports: Markdown tables and plots written from ``metrics.json`` results.

Every ``report.md`` gets a ``report.html`` beside it with the same content: one static page, its
plots embedded as base64 PNG and its style inline, so it opens from disk with no network.
"""

from __future__ import annotations

import base64
import html
import os
import re
from pathlib import Path

import numpy as np

from shapes._atomic import atomic_path, write_text

__all__ = ["run_report", "comparison_report", "plot_confusion", "plot_angle_sweep", "plot_reliability",
           "plot_perturbations", "markdown_to_html", "write_report", "pyplot", "save_figure", "pose_matrix_row",
           "perturbation_sections", "twin_warnings", "visible_curve", "CURVES"]

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


def visible_curve(metrics: dict) -> dict[str, float]:
    """The scans' accuracy against visible share as ``{bin middle: accuracy}`` (empty without scans)."""
    bins = (metrics.get("scans") or {}).get("visible_sweep") or {}
    out = {}
    for label, cell in bins.items():
        lo, hi = (float(v) for v in label.split("-"))
        out[f"{(lo + hi) / 2:g}"] = cell["accuracy"]
    return out


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
        label, log_x = CURVES[key]
        ax.plot([float(x) for x in curve], [100 * v for v in curve.values()], marker="o")
        if log_x and key == "point_count_sweep":
            ax.set_xscale("log", base=2)
        elif log_x:
            ax.set_xscale("symlog", linthresh=0.01)
        ax.set_xlabel(_SHORT[key], fontsize=8)
        ax.set_ylim(0, 102)
        ax.grid(alpha=0.3)
    axes[0][0].set_ylabel("accuracy (%)")
    fig.suptitle(f"{metrics['backbone']['name']}: accuracy under scanner imperfections (uniform random poses)",
                 fontsize=9)
    return save_figure(fig, path)


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


# -- the HTML page -------------------------------------------------------------------------

_STYLE = """
body { font-family: sans-serif; max-width: 96rem; margin: 2rem auto; padding: 0 1rem; color: #1b1b1b; line-height: 1.45; }
table { border-collapse: collapse; margin: 0.8rem 0; font-size: 0.9rem; }
th, td { border: 1px solid #c8c8c8; padding: 0.25rem 0.55rem; text-align: left; vertical-align: top; }
td { white-space: nowrap; }
.wide { overflow-x: auto; }
th { background: #eef1f4; }
tr:nth-child(even) td { background: #f8f9fa; }
code { background: #f1f1f1; padding: 0 0.2rem; border-radius: 3px; }
img { max-width: 100%; display: block; margin: 0.8rem 0; }
h1 { font-size: 1.5rem; } h2 { font-size: 1.2rem; margin-top: 2rem; } h3 { font-size: 1.05rem; }
"""

_INLINE = re.compile(r"`([^`]+)`|\*\*([^*]+)\*\*|\*([^*]+)\*|\[([^\]]+)\]\(([^)\s]+)\)")


def _inline(text: str) -> str:
    """Escape ``text`` and turn the inline Markdown the reports use (code, bold, emphasis, links) into HTML."""
    out, last = [], 0
    for m in _INLINE.finditer(text):
        out.append(html.escape(text[last:m.start()]))
        code, bold, em, label, href = m.groups()
        if code is not None:
            out.append(f"<code>{html.escape(code)}</code>")
        elif bold is not None:
            out.append(f"<strong>{_inline(bold)}</strong>")
        elif em is not None:
            out.append(f"<em>{_inline(em)}</em>")
        else:
            if href.endswith(".md") and "://" not in href:
                href = href[:-3] + ".html"  # a report links its sibling reports' pages
            out.append(f'<a href="{html.escape(href)}">{_inline(label)}</a>')
        last = m.end()
    out.append(html.escape(text[last:]))
    return "".join(out)


def _cells(line: str) -> list[str]:
    return [c.strip() for c in line.strip().strip("|").split("|")]


def _image(alt: str, src: str, base: Path) -> str:
    """An ``<img>`` with the PNG inlined as a data URI; a missing file becomes a line of text."""
    path = base / src
    if not path.is_file():
        return f"<p>(plot {html.escape(src)} is missing)</p>"
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{data}">'


def markdown_to_html(text: str, base: str | os.PathLike, title: str | None = None) -> str:
    """One self-contained HTML page from the Markdown the reports write.

    Handles what they use: ``#`` headings, paragraphs, pipe tables (a header row, then a ``|---|``
    row), ``- `` lists, images on a line of their own (embedded from ``base`` as base64 PNG), and
    inline code, bold, emphasis and links (a link to a sibling ``.md`` points at its ``.html``).
    """
    base = Path(base)
    lines = text.splitlines()
    body: list[str] = []
    paragraph: list[str] = []

    def flush() -> None:
        if paragraph:
            body.append(f"<p>{_inline(' '.join(paragraph))}</p>")
            paragraph.clear()

    i = 0
    while i < len(lines):
        line = lines[i].rstrip()
        image = re.fullmatch(r"!\[([^\]]*)\]\(([^)\s]+)\)", line.strip())
        if not line.strip():
            flush()
        elif line.startswith("#"):
            flush()
            level = min(len(line) - len(line.lstrip("#")), 6)
            body.append(f"<h{level}>{_inline(line[level:].strip())}</h{level}>")
        elif image:
            flush()
            body.append(_image(image.group(1), image.group(2), base))
        elif line.startswith("|") and i + 1 < len(lines) and re.fullmatch(r"\|?[\s:|-]+\|?", lines[i + 1].strip()):
            flush()
            rows = ["<tr>" + "".join(f"<th>{_inline(c)}</th>" for c in _cells(line)) + "</tr>"]
            i += 2
            while i < len(lines) and lines[i].strip().startswith("|"):
                rows.append("<tr>" + "".join(f"<td>{_inline(c)}</td>" for c in _cells(lines[i])) + "</tr>")
                i += 1
            body.append('<div class="wide"><table>\n' + "\n".join(rows) + "\n</table></div>")
            continue
        elif line.lstrip().startswith("- "):
            flush()
            items = []
            while i < len(lines) and lines[i].lstrip().startswith("- "):
                items.append(f"<li>{_inline(lines[i].lstrip()[2:].strip())}</li>")
                i += 1
            body.append("<ul>\n" + "\n".join(items) + "\n</ul>")
            continue
        else:
            paragraph.append(line.strip())
        i += 1
    flush()
    if title is None:
        first = next((ln for ln in lines if ln.startswith("# ")), "# report")
        title = re.sub(r"[`*]", "", first[2:]).strip()
    return ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            f"<title>{html.escape(title)}</title>\n<style>{_STYLE}</style>\n</head>\n<body>\n"
            + "\n".join(body) + "\n</body>\n</html>\n")


def write_report(path: str | os.PathLike, text: str) -> Path:
    """Write the Markdown report ``path`` and, beside it, the same content as a static HTML page
    (same name, ``.html``) with its plots embedded. Returns the Markdown path."""
    path = Path(path)
    write_text(path.with_suffix(".html"), markdown_to_html(text, path.parent))
    return write_text(path, text)
