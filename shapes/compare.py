"""The comparison job: several evaluated runs side by side, seeds of one configuration pooled.

``compare_runs`` reads the ``metrics.json`` that ``shapes eval`` wrote in each run folder (a folder
of runs, such as a sweep, stands for every run under it), groups the runs whose configuration
differs only in the seed, and writes ``compare.md``, ``compare.html``, ``compare.json`` and the
overlaid curves (accuracy against rotation angle and against sensor noise) as PNG. Each number is
the mean over the group's seeds ± their sample standard deviation (``ddof=1``); a group of one run
shows its value alone.
"""

from __future__ import annotations

import json
import math
import os
import statistics
from pathlib import Path

from shapes import _checks as check
from shapes._atomic import write_json
from shapes.errors import ConfigError, DataError
from shapes.data import read_meta
from shapes.geometry import POSE_REGIMES, check_regime
from shapes.run import CHECKPOINT, HISTORY, METRICS, read_metrics
from shapes.report import CURVES, REGIME_NOTES, curve_scale, pyplot, save_figure, visible_curve, write_report

__all__ = ["find_runs", "load_run_metrics", "group_runs", "summarize", "compare_runs", "pose_matrix"]

# the run markers: a folder holding one of these is a run; any other folder is searched for runs
_RUN_FILES = (METRICS, CHECKPOINT, HISTORY)
# settings that do not make a different configuration: the seed is what a group pools over, the
# rest change speed, not the model
_NOT_CONFIG = ("seed", "threads", "device")


def find_runs(paths) -> list[Path]:
    """Run folders named by ``paths``: a run folder itself, or every run folder under a folder."""
    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    if not paths:
        raise ConfigError("no runs to compare; name run folders or a folder of runs: shapes compare RUN_DIR...")
    found: list[Path] = []
    for raw in paths:
        path = Path(raw)
        if path.is_file() and path.name in _RUN_FILES:
            path = path.parent
        if not path.is_dir():
            raise DataError(f"'{raw}' is not a run folder; expected a folder written by `shapes train` "
                            "(or a folder of them, such as a sweep).")
        if any((path / f).is_file() for f in _RUN_FILES):
            runs = [path]
        else:
            runs = sorted({p.parent for f in _RUN_FILES for p in path.rglob(f)})
            if not runs:
                raise DataError(f"no run folders under '{raw}'; expected folders written by `shapes train` "
                                f"and evaluated by `shapes eval` (each with a {METRICS}).")
        found += [r for r in runs if r.resolve() not in {f.resolve() for f in found}]
    return found


def load_run_metrics(run: Path) -> dict:
    """``run/metrics.json``, checked: present, readable, with today's pose-regime names and a cost record."""
    path = Path(run) / METRICS
    if not path.is_file():
        raise DataError(f"run folder '{run}' has no {METRICS}; evaluate it first: shapes eval run={run}")
    try:
        metrics = read_metrics(Path(run))
    except (OSError, ValueError) as exc:
        raise DataError(f"'{path}' cannot be read as JSON ({' '.join(str(exc).split())[:160]}); "
                        f"re-run shapes eval run={run}") from None
    if not isinstance(metrics, dict) or not isinstance(metrics.get("regimes"), dict) or "backbone" not in metrics:
        raise DataError(f"'{path}' is not a metrics file written by `shapes eval` (no 'regimes'); "
                        f"re-run shapes eval run={run}")
    for regime in metrics["regimes"]:
        check_regime(regime, POSE_REGIMES, f"'{path}' scores the pose regime")
    train_poses = metrics.get("train", {}).get("poses")
    if train_poses is not None:
        check_regime(train_poses, POSE_REGIMES[:3], f"'{path}' was trained with train.poses")
    if "cost" not in metrics or "classes" not in metrics:
        raise DataError(f"'{path}' was written by an older `shapes eval` (no cost record: wall time, threads, "
                        f"parameters, throughput); re-run shapes eval run={run}")
    metrics["run"] = str(run)
    return metrics


def _check_same_catalog(runs: list[dict]) -> None:
    """Every run must name the same classes with the same mirror twins: else their scores measure
    different tasks."""
    first = runs[0]
    for m in runs[1:]:
        if sorted(m["classes"]) != sorted(first["classes"]):
            only_a = sorted(set(first["classes"]) - set(m["classes"]))
            only_b = sorted(set(m["classes"]) - set(first["classes"]))
            raise DataError(f"runs from different catalogs: '{first['run']}' has {len(first['classes'])} classes, "
                            f"'{m['run']}' has {len(m['classes'])} (only in the first: {only_a[:4]}; only in the "
                            f"second: {only_b[:4]}); compare runs trained on one catalog.")
        twins_a, twins_b = first.get("twins"), m.get("twins")
        if twins_a and twins_b and twins_a != twins_b:
            diff = sorted(c for c in twins_a if twins_a[c] != twins_b.get(c))
            raise DataError(f"runs from different catalogs: '{first['run']}' and '{m['run']}' declare different "
                            f"mirror twins (e.g. {diff[0]}: {twins_a[diff[0]]} vs {twins_b.get(diff[0])}); "
                            "compare runs trained on one catalog.")


def _data_recipe(data) -> object:
    """What a run's dataset stands for in its configuration: the catalog and the sampler's settings
    (``meta.json``), so that datasets drawn from one recipe under different seeds (as each seed of
    ``shapes demo`` draws its own) pool as seeds of one configuration; the folder's path where its
    ``meta.json`` cannot be read (moved or deleted since)."""
    try:
        meta = read_meta(data)
    except (DataError, TypeError, OSError):
        return data
    return {"catalog": meta.get("catalog"), "sampler": meta.get("sampler")}


def _config_key(m: dict) -> dict:
    train = {k: v for k, v in (m.get("train") or {}).items() if k not in _NOT_CONFIG}
    return {"backbone": m["backbone"]["name"], "options": m["backbone"].get("options", {}), "train": train,
            "data": _data_recipe(m.get("data"))}


def group_runs(runs: list[dict]) -> dict[str, list[dict]]:
    """Runs whose configuration differs only in seed, threads or device, under one readable label:
    the backbone's name, plus what tells it apart from other groups of the same backbone."""
    groups: dict[str, list[dict]] = {}
    keys: dict[str, dict] = {}
    for m in runs:
        key = _config_key(m)
        text = json.dumps(key, sort_keys=True, default=str)
        groups.setdefault(text, []).append(m)
        keys[text] = key
    labels: dict[str, list[dict]] = {}
    for text, members in groups.items():
        key = keys[text]
        rivals = [keys[t] for t in groups if t != text and keys[t]["backbone"] == key["backbone"]]
        label = key["backbone"]
        if rivals:
            differ = []
            for section in ("options", "train"):
                for k, v in sorted(key[section].items()):
                    if any(r[section].get(k) != v for r in rivals):
                        differ.append(f"{k}={v}")
            if any(r["data"] != key["data"] for r in rivals):
                differ.append(f"data={Path(str(members[0].get('data'))).name}")
            label += " (" + ", ".join(differ[:4]) + ")" if differ else f" #{len(labels) + 1}"
        base, n = label, 1
        while label in labels:  # two configurations told apart by something the label leaves out
            n += 1
            label = f"{base} #{n}"
        labels[label] = members
    return labels


def summarize(values) -> dict:
    """Mean, sample standard deviation (``ddof=1``; None for fewer than 2 values) and count of the
    values that are not None."""
    vals = [float(v) for v in values if v is not None and not (isinstance(v, float) and math.isnan(v))]
    if not vals:
        return {"mean": None, "sd": None, "n": 0}
    return {"mean": statistics.fmean(vals), "sd": statistics.stdev(vals) if len(vals) >= 2 else None,
            "n": len(vals)}


def _fmt(s: dict, kind: str) -> str:
    if s["mean"] is None:
        return "–"
    scale, unit, digits = {"pct": (100, "%", 1), "num": (1, "", 3), "sci": (1, "", None),
                           "int": (1, "", 0), "rate": (1, "", 0), "sec": (1, "", 1)}[kind]
    if digits is None:
        body = f"{s['mean']:.1e}" + (f" ± {s['sd']:.1e}" if s["sd"] is not None else "")
        return body
    mean = f"{scale * s['mean']:,.{digits}f}"
    return mean + (f" ± {scale * s['sd']:,.{digits}f}" if s["sd"] is not None else "") + unit


def _row_stats(members: list[dict], regimes: list[str]) -> dict:
    def get(path):
        out = []
        for m in members:
            v = m
            for p in path:
                v = v.get(p) if isinstance(v, dict) else None
            out.append(v)
        return out

    stats = {f"accuracy_{r}": summarize(get(("regimes", r, "accuracy"))) for r in regimes}
    stats.update({
        "handed_mirrored": summarize(get(("regimes", "mirrored", "handed_accuracy"))),
        "mirror_twin_answer": summarize(get(("hand", "twin_answer"))),
        "ece_any": summarize(get(("regimes", "any", "ece"))),
        "pose_consistency_any": summarize(get(("regimes", "any", "pose_consistency"))),
        "rotation_change": summarize(get(("invariance", "rotation"))),
        "reflection_change": summarize(get(("invariance", "reflection"))),
        "train_seconds": summarize(get(("cost", "train_seconds"))),
        "parameters": summarize(get(("cost", "parameters"))),
        "parts_per_second": summarize(get(("cost", "parts_per_second"))),
    })
    return stats


def _curve(members: list[dict], key: str) -> dict[str, dict]:
    if key == "visible_sweep":  # kept per visible-share bin under the scans' record
        members = [{key: visible_curve(m)} for m in members]
    points = [p for p in (members[0].get(key) or {})]
    return {p: summarize([(m.get(key) or {}).get(p) for m in members]) for p in points}


def _threads(members: list[dict]) -> str:
    seen = sorted({str(m["cost"].get("train_threads") or "default") for m in members})
    return "/".join(seen)


def _plot_curves(groups: dict[str, dict], key: str, xlabel: str, path: Path) -> Path | None:
    plt = pyplot()
    curves = {label: g["curves"][key] for label, g in groups.items() if g["curves"].get(key)}
    if not curves:
        return None
    fig, ax = plt.subplots(figsize=(6.4, 4.0))
    for label, curve in curves.items():
        xs = [float(x) for x in curve]
        mean = [100 * (s["mean"] if s["mean"] is not None else math.nan) for s in curve.values()]
        sd = [100 * (s["sd"] or 0.0) for s in curve.values()]
        line, = ax.plot(xs, mean, marker="o", label=f"{label} (n={max(s['n'] for s in curve.values())})")
        if any(sd):
            ax.fill_between(xs, [m - d for m, d in zip(mean, sd)], [m + d for m, d in zip(mean, sd)],
                            color=line.get_color(), alpha=0.15, lw=0)
    ax.set_xlabel(xlabel)
    ax.set_ylabel("accuracy (%), mean ± sd over seeds")
    ax.set_ylim(0, 102)
    curve_scale(ax, key)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    return save_figure(fig, path)


# the overlaid curves: plot name (compare_<name>.png) -> metrics key; the axes are report.CURVES'
_PLOTS = {"angle": "angle_sweep", "noise": "noise_sweep", "outliers": "outlier_sweep",
          "points": "point_count_sweep", "visible": "visible_sweep"}
_PLOT_TEXT = {
    "angle": ("Accuracy against rotation angle", "Each cloud turned by a fixed angle about a random axis."),
    "noise": ("Accuracy under sensor noise", "Gaussian noise of σ RMS radii on every point, under uniform random "
              "poses."),
    "outliers": ("Accuracy under stray points", "A share of each cloud's points replaced by points drawn uniformly "
                 "in its bounding box, under uniform random poses; no clean-up."),
    "points": ("Accuracy against point count", "Each cloud cut to a random subset of that many of its points, "
               "under uniform random poses (counts up to the test clouds' own)."),
    "visible": ("Accuracy against the visible share of the surface", "The test split's single-view scans, "
                "binned by the share of the part's surface each shows (x: the bin's middle), under uniform random "
                "poses."),
}


def pose_matrix(runs: list[dict], regimes: list[str]) -> dict[str, dict]:
    """The train x test pose matrix of each configuration: label (the configuration less its
    ``train.poses``) -> training regime -> ``{"runs": n, test regime: accuracy summary}``.

    The rows come from each run's recorded ``train.poses`` (``none`` for a model of distances, the D2
    baseline); a sweep over ``train.poses`` fills several rows of one configuration.
    """
    bare = [{**m, "train": {k: v for k, v in (m.get("train") or {}).items() if k != "poses"},
             "_poses": str((m.get("train") or {}).get("poses") or "none")} for m in runs]
    order = {p: i for i, p in enumerate(POSE_REGIMES)}
    matrix = {}
    for label, members in group_runs(bare).items():
        rows = {}
        for trained in sorted({m["_poses"] for m in members}, key=lambda p: order.get(p, len(order))):
            sel = [m for m in members if m["_poses"] == trained]
            rows[trained] = {"runs": len(sel), **{r: summarize([m["regimes"][r]["accuracy"] for m in sel])
                                                  for r in regimes}}
        matrix[label] = rows
    return matrix


def compare_runs(paths, out: str | os.PathLike, *, poses=None) -> Path:
    """Compare the evaluated runs named by ``paths``; write the comparison to the folder ``out``.

    Returns the path of ``compare.md``. ``poses`` (default: every regime the runs share) picks the
    accuracy columns.
    """
    runs = [load_run_metrics(r) for r in find_runs(paths)]
    _check_same_catalog(runs)
    shared = [r for r in POSE_REGIMES if all(r in m["regimes"] for m in runs)]
    if poses is None:
        regimes = shared
    else:
        regimes = check.listed("compare.poses", poses, lambda n, v: check_regime(v, POSE_REGIMES, n), one_as_list=True)
        missing = [r for r in regimes if r not in shared]
        if missing:
            lacking = next(m["run"] for m in runs if any(r not in m["regimes"] for r in missing))
            raise DataError(f"compare.poses asks for {missing}, but '{lacking}' was not scored under it; "
                            f"re-run shapes eval run={lacking} eval.poses=[{','.join(regimes)}]")
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    grouped = group_runs(runs)
    groups = {}
    for label, members in grouped.items():
        groups[label] = {
            "backbone": members[0]["backbone"]["name"], "symmetry": members[0]["backbone"].get("symmetry"),
            "runs": [m["run"] for m in members], "seeds": [m.get("train", {}).get("seed") for m in members],
            "train_poses": members[0].get("train", {}).get("poses"), "threads": _threads(members),
            "stats": _row_stats(members, regimes),
            "curves": {key: _curve(members, key) for key in CURVES},
        }
    plots = {name: _plot_curves(groups, key, CURVES[key][0], out / f"compare_{name}.png")
             for name, key in _PLOTS.items()}
    result = {"format": 1, "regimes": regimes, "classes": runs[0]["classes"],
              "statistic": "mean ± sample standard deviation (ddof=1) over the runs of one configuration",
              "groups": groups, "pose_matrix": pose_matrix(runs, regimes),
              "plots": {k: p.name for k, p in plots.items() if p}}
    write_json(out / "compare.json", result)
    return write_report(out / "compare.md", _markdown(result, runs))


def _markdown(result: dict, runs: list[dict]) -> str:
    regimes, groups = result["regimes"], result["groups"]
    head = (["configuration", "runs", "train poses", "symmetry"] + [f"{r}" for r in regimes]
            + ["handed, mirrored", "mirror image named as twin", "calibration error (any)", "pose consistency (any)", "rotation change",
               "reflection change", "training wall time (s)", "threads", "parameters", "inference parts/s"])
    rows = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    for label, g in groups.items():
        s = g["stats"]
        cells = ([f"`{label}`", str(len(g["runs"])), str(g["train_poses"] or "–"), str(g["symmetry"] or "–")]
                 + [_fmt(s[f"accuracy_{r}"], "pct") for r in regimes]
                 + [_fmt(s["handed_mirrored"], "pct"), _fmt(s["mirror_twin_answer"], "pct"), _fmt(s["ece_any"], "num"),
                    _fmt(s["pose_consistency_any"], "pct"), _fmt(s["rotation_change"], "sci"),
                    _fmt(s["reflection_change"], "sci"), _fmt(s["train_seconds"], "sec"), g["threads"],
                    _fmt(s["parameters"], "int"), _fmt(s["parts_per_second"], "rate")])
        rows.append("| " + " | ".join(cells) + " |")
    n_handed = sum(1 for v in (runs[0].get("handed") or {}).values() if v)
    text = [f"# Comparison of {len(runs)} runs in {len(groups)} configurations", "",
            f"{len(result['classes'])} classes ({n_handed} handed). Accuracy on held-out part instances under each "
            "test-pose regime (" + "; ".join(f"{r}: {REGIME_NOTES.get(r, '')}" for r in regimes) + "). "
            "Each cell is the mean over the runs of one configuration (same backbone and options, same training "
            "settings and data, different seeds) ± the sample standard deviation; a single run shows its value.",
            "", "\n".join(rows), "",
            "*handed, mirrored*: accuracy on the handed classes under mirror images, where the twin must be named "
            "(a model blind to hand names the part itself); *mirror image named as twin*: share of handed test clouds whose mirror image gets the twin of the part's own answer (0 for a model blind to hand); *calibration error*: expected calibration error of the "
            "top class's probability under uniform random poses; *pose consistency*: share of test clouds given "
            "the same answer under every random pose; *rotation/reflection change*: the largest change of the "
            "outputs under random rotations / reflections, relative to their largest magnitude; *training wall "
            "time*: from each run's train_history.json; *threads*: train.threads (default: torch's own); "
            "*parameters*: numbers the model learned; *inference parts/s*: test clouds classified per second "
            "during evaluation.", ""]
    text += _matrix_markdown(result["pose_matrix"], regimes)
    for name, (title, note) in _PLOT_TEXT.items():
        if result["plots"].get(name):
            text += [f"## {title}", "", note + " The band is ± one standard deviation over seeds.", "",
                     f"![{title.lower()}]({result['plots'][name]})", ""]
    text += ["## Runs", "", "| configuration | seed | run folder | test data |", "|---|---|---|---|"]
    for label, g in groups.items():
        for seed, run in zip(g["seeds"], g["runs"]):
            data = next(m.get("data") for m in runs if m["run"] == run)
            text.append(f"| `{label}` | {seed} | `{run}` | `{data}` |")
    return "\n".join(text) + "\n"


def _matrix_markdown(matrix: dict[str, dict], regimes: list[str]) -> list[str]:
    """The train x test pose matrix as one table per configuration (rows: training regime)."""
    if not matrix:
        return []
    several = any(len(rows) > 1 for rows in matrix.values())
    text = ["## Train × test poses", "",
            "Accuracy of each configuration by the regime it was trained with (rows, from each run's "
            "`train.poses`) and the regime it was tested under (columns), mean ± sd over seeds. "
            + ("" if several else "Every configuration here was trained with one regime: a sweep "
               "(`shapes train -m train.poses=cad,upright,any`) fills the other rows."), ""]
    for label, rows in matrix.items():
        text += [f"**`{label}`**", "", "| train poses ↓, test poses → | runs | " + " | ".join(regimes) + " |",
                 "|---|---|" + "---|" * len(regimes)]
        for trained, cells in rows.items():
            text.append(f"| {trained} | {cells['runs']} | " + " | ".join(_fmt(cells[r], "pct") for r in regimes) + " |")
        text.append("")
    return text
