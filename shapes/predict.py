"""The prediction job: name new scans with a trained run, with a confidence and a "not a known part" answer.

Each input file becomes one cloud, made the way the run's training clouds were made (a mesh is
sampled with the sampler settings stored in the checkpoint; a point file is thinned to the
training point count), then normalised to unit RMS radius. The cloud is turned by ``poses``
seeded random poses and the softmax is averaged over them (test-time pose averaging).

"Not a known part" is an open-set threshold on a score: the largest averaged probability. For a
backbone of symmetry ``E3`` a handed class and its mirror twin are one cloud to it, so its
probability is split between the two; there the score of a handed class is the sum of the pair's
probabilities. The threshold is calibrated, at predict time, on the run's validation split with
the same poses: ``threshold = numpy.quantile(val_scores, 1 - accept)`` (numpy's default linear
rule), so about ``accept`` of the validation clouds score at or above it. A scan scoring below it
is reported as unknown, with its nearest class.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import torch

from shapes import _checks as check
from shapes._atomic import write_json
from shapes._runtime import set_threads
from shapes.data import MIN_SCAN_POINTS, NORMALS_K, READ_SUFFIXES, UNITS, CleanSettings, Cloud, CloudRecipe, load_split
from shapes.data import prepare_cloud
from shapes.data._normals import ORIENTATIONS
from shapes.errors import DataError, MeshError, ShapesError
from shapes.geometry import check_regime, random_poses
from shapes.run import RunMeta, find_checkpoint, load_classifier, logits_under_poses
from shapes.seeding import torch_generator

__all__ = ["SUPPORTED", "REGIMES", "UNKNOWN", "HAND_NOTE", "NORMALS_K", "NORMAL_MODES", "Cloud", "find_inputs",
           "read_input", "normals_k", "normals_points", "normals_orientation",
           "pose_averaged", "known_scores", "calibrate", "predict_files", "format_table"]

SUPPORTED = READ_SUFFIXES  # every suffix shapes.data.read_points takes (meshes, E57, PLY, text, NPY, NPZ)
NORMAL_MODES = ("auto", "file", "estimated")
REGIMES = ("cad", "upright", "any")  # a mirror pose would change a handed part into its twin
UNKNOWN = "unknown (not a known part)"
HAND_NOTE = "hand not determinable by this backbone"


def _check_options(poses, regime, accept, batch_size, orientation, units, normals, viewpoint) -> np.ndarray | None:
    """Every option of :func:`predict_files`, checked before any file is read; returns the viewpoint."""
    check.integer("predict.poses", poses, low=1)
    check_regime(regime, REGIMES, "predict.regime")
    check.number("predict.accept", accept, low=0, low_open=True, high=1)
    check.integer("predict.batch_size", batch_size, low=1)
    check.optional(check.choice, "predict.orientation", orientation, options=ORIENTATIONS)
    check.choice("predict.units", units, UNITS)
    check.choice("predict.normals", normals, NORMAL_MODES)
    view = check.optional(check.vector, "predict.viewpoint", viewpoint)
    return None if view is None else np.asarray(view, dtype=np.float64)


def find_inputs(path: str | os.PathLike, exclude: str | os.PathLike | None = None) -> list[Path]:
    """A file → [file]; a folder → every file in it, searched recursively, sorted.

    Hidden files and folders are passed over, and so is ``exclude`` (the results file). Files of an
    unsupported suffix are listed too: reading them gives their own error row. A missing path or a
    folder without any file is a usage error.
    """
    path = Path(path)
    if not path.exists():
        raise MeshError(f"input {path} not found; expected a scan or mesh file or a folder of them.")
    if path.is_file():
        return [path]
    skip = Path(exclude).resolve() if exclude is not None else None
    found = sorted(p for p in path.rglob("*") if p.is_file() and p.resolve() != skip
                   and not any(part.startswith(".") for part in p.relative_to(path).parts))
    if not found:
        raise MeshError(f"folder {path} holds no scan or mesh files; expected files ending in {', '.join(SUPPORTED)}.")
    return found


def _fewest_points(meta: RunMeta) -> tuple[int, str]:
    k = meta.backbone.options.get("k")
    if k is not None and k + 1 > MIN_SCAN_POINTS:
        return k + 1, f"the {meta.backbone.name} backbone compares each point with its k = {k} nearest"
    return MIN_SCAN_POINTS, "fewer points carry too little shape to name a part"


def _recorded_normals(meta: RunMeta | dict) -> dict:
    """The run's ``sampler.normals`` record (a run's record or the plain dict of a checkpoint); ``{}``
    when it has none (runs from before) or it is unreadable."""
    if isinstance(meta, RunMeta):
        sampler = meta.data.sampler
    else:
        sampler = (meta.get("data") or {}).get("sampler") or {}
    recorded = sampler.get("normals") if isinstance(sampler, dict) else None
    return recorded if isinstance(recorded, dict) else {}


def _count(value, low: int) -> int | None:
    """A recorded count when it is an integer >= ``low``, else None."""
    ok = isinstance(value, (int, np.integer)) and not isinstance(value, bool) and value >= low
    return int(value) if ok else None


def normals_k(meta: RunMeta | dict) -> int:
    """Neighbours of the estimated normals: the run's ``sampler.normals.k`` when recorded, else 16."""
    return _count(_recorded_normals(meta).get("k", NORMALS_K), 3) or NORMALS_K


def normals_points(meta: RunMeta) -> int:
    """Points a scan's normals are estimated on: the run's ``sampler.normals.points`` when recorded,
    else the count the run's clouds have (runs from before estimated them after thinning)."""
    return _count(_recorded_normals(meta).get("points"), 16) or int(meta.data.points)


def normals_orientation(meta: RunMeta | dict) -> str:
    """How estimated normals are signed without a sensor position: the run's recorded
    ``sampler.normals.orientation`` (so scan files match the training clouds), else single-view: the
    commonest bare point file is one view of a scanner, and on single-view scans of the demo parts
    that rule agrees with the true outward normal on 96.6% of points, MST propagation on 90.3%."""
    way = _recorded_normals(meta).get("orientation")
    return way if way in ORIENTATIONS else "single-view"


def read_input(path: str | os.PathLike, meta: RunMeta | dict, seed=0, needs_normals: bool = False, *, units: str = "mm",
               clean: CleanSettings | None = None, normals: str = "auto", viewpoint=None,
               orientation: str | None = None) -> Cloud:
    """Read one file into a cloud the run's network can take: :func:`shapes.data.prepare_cloud` with the
    recipe of the run's training clouds (``meta``, the run's record or its plain dict): the point count,
    the sampler's settings, k and the point count of the estimated normals (``sampler.normals.k``, else
    16; ``sampler.normals.points``, else the point count), their sign without a sensor position
    (``orientation``, else the run's ``sampler.normals.orientation``, else single-view), and the fewest
    points the backbone's neighbourhoods take. See there for ``units``, ``clean``, ``normals``,
    ``viewpoint`` and ``seed``.
    """
    meta = meta if isinstance(meta, RunMeta) else RunMeta.from_dict(meta)
    fewest, why = _fewest_points(meta)
    recipe = CloudRecipe(points=int(meta.data.points), sampler=meta.data.sampler, fewest=fewest, why=why,
                         normals_k=normals_k(meta), normals_points=normals_points(meta),
                         orientation=orientation or normals_orientation(meta))
    return prepare_cloud(path, recipe, seed, needs_normals, units=units, clean=clean, normals=normals,
                         viewpoint=viewpoint)


@torch.no_grad()
def pose_averaged(model, points: torch.Tensor, normals: torch.Tensor | None, rotations: torch.Tensor,
                  batch_size: int = 32) -> tuple[torch.Tensor, torch.Tensor]:
    """Softmax averaged over poses, and each pose's vote.

    points : (M, N, 3); normals : (M, N, 3) or None (they turn with their points);
    rotations : (R, 3, 3), the same R poses for every cloud.
    Returns probabilities (M, C), summing to 1 per row, and votes (M, R): each pose's argmax.
    """
    m, r = len(points), len(rotations)
    x = points.repeat_interleave(r, dim=0)  # (M R, N, 3): cloud i under pose j at row i R + j
    n = None if normals is None else normals.repeat_interleave(r, dim=0)
    logits = logits_under_poses(model, x, rotations.repeat(m, 1, 1), batch_size, n).reshape(m, r, -1)  # (M, R, C)
    return torch.softmax(logits.double(), dim=-1).mean(1), logits.argmax(-1)


def known_scores(probs: np.ndarray, twin_index: np.ndarray, merge_twins: bool) -> np.ndarray:
    """The open-set score of each row of ``probs (M, C)``: its largest probability, or for
    ``merge_twins`` (an E3 backbone) the largest of ``p[c] + p[twin(c)]`` over handed ``c``
    and ``p[c]`` over achiral ``c``. Returns (M,)."""
    if not merge_twins:
        return probs.max(axis=1)
    own = np.arange(probs.shape[1])
    pair = probs + np.where(twin_index != own, probs[:, twin_index], 0.0)  # (M, C)
    return pair.max(axis=1)


def calibrate(model, meta: RunMeta, rotations: torch.Tensor, accept: float, data_dir: str | os.PathLike | None = None,
              batch_size: int = 32) -> dict:
    """The open-set threshold from the run's validation split under the given poses.

    ``threshold = numpy.quantile(scores, 1 - accept)``: about ``accept`` of the validation clouds
    score at or above it. Returns the threshold, the rule, the folder and the scores.
    """
    data_dir = Path(data_dir or meta.data.dir)
    try:
        val = load_split(data_dir, "val")
    except DataError as exc:
        raise DataError(f"cannot calibrate the unknown-part threshold: {exc} Point predict.calibration at the "
                        "dataset folder the run was trained on.") from None
    if list(val.meta["classes"]) != list(meta.classes):
        raise DataError(f"the classes in '{data_dir}' differ from the checkpoint's "
                        f"({len(val.meta['classes'])} vs {len(meta.classes)}); calibrate on the run's own dataset.")
    if len(val) == 0:
        raise DataError(f"the validation split of '{data_dir}' is empty; nothing to calibrate the threshold on.")
    normals = torch.tensor(np.asarray(val.normals)) if model.uses_normals else None  # copies of the read-only maps
    probs, _ = pose_averaged(model, torch.tensor(np.asarray(val.points)), normals, rotations, batch_size)
    scores = known_scores(probs.numpy(), meta.twin_index(), model.symmetry == "E3")
    threshold = float(np.quantile(scores, 1.0 - accept))
    return {"value": threshold, "accept": float(accept), "data": str(data_dir), "validation_clouds": int(len(val)),
            "accepted": float((scores >= threshold).mean()),
            "rule": "numpy.quantile(validation scores, 1 - accept); a scan scoring below it is not a known part",
            "scores": scores.tolist()}


def _row(name: str, cloud: Cloud, probs: np.ndarray, votes: np.ndarray, score: float,
         threshold: float, meta: RunMeta, symmetry: str) -> dict:
    classes = list(meta.classes)
    order = np.argsort(-probs, kind="stable")
    top, second = classes[order[0]], classes[order[1]]
    agree = int((votes == order[0]).sum())
    known = bool(score >= threshold)
    notes = []
    if known and meta.twins[top] != top and symmetry == "E3":
        notes.append(f"{HAND_NOTE} ({top} or {meta.twins[top]})")
    return {
        "file": name,
        "answer": top if known else UNKNOWN,
        "known": known,
        "top": {"class": top, "probability": float(probs[order[0]])},
        "runner_up": {"class": second, "probability": float(probs[order[1]])},
        "score": float(score),
        "poses_agreeing": agree,
        "poses": int(len(votes)),
        "poses_agreed": agree == len(votes),
        "notes": notes,
        "source": cloud.source,
        "reading": cloud.notes,
        "cleanup": cloud.cleanup,
        "probabilities": {c: float(p) for c, p in zip(classes, probs)},
    }


def _error_text(exc: BaseException, path: Path, name: str) -> str:
    """One line for a file's error row: the message without the leading 'scan file <path>'."""
    text = " ".join(str(exc).split()) if isinstance(exc, ShapesError) else \
        f"could not be read ({type(exc).__name__}: {' '.join(str(exc).split())[:160]})"
    for prefix in (f"scan file {path}", f"mesh file {path}"):
        if text.startswith(prefix):
            text = text[len(prefix):].lstrip(" ,:")
            break
    return text.replace(str(path), name) or type(exc).__name__


def predict_files(run: str | os.PathLike, inputs: str | os.PathLike, *, poses: int = 8, regime: str = "any",
                  accept: float = 0.95, calibration: str | os.PathLike | None = None, seed: int = 0,
                  batch_size: int = 32, threads: int | None = None, out: str | os.PathLike | None = None,
                  units: str = "mm", clean: CleanSettings | dict | None = None, normals: str = "auto",
                  viewpoint=None, orientation: str | None = None) -> dict:
    """Classify every scan or mesh in ``inputs`` (a file or a folder) with the run's checkpoint.

    Every cloud is scored under the same ``poses`` random poses of ``regime``, drawn from
    ``seed``, so a file's answer depends only on its content, the run and the seed. Every file
    is read and checked before any is scored; a file that cannot be read or used (see
    :func:`read_input` for ``units``, ``clean``, ``normals`` and ``viewpoint``) gets an error row
    and the others are still classified. ``out`` (a JSON file) is written, whole, at the end.

    Returns
    -------
    result : dict
        ``checkpoint``, ``backbone``, ``symmetry``, ``poses``, ``regime``, ``seed``, ``threshold``
        (see :func:`calibrate`, without the scores), ``failed`` (the number of error rows) and
        ``results``: one dict per file with ``answer`` (a class, or ``UNKNOWN``), ``known``, ``top``
        and ``runner_up`` (class and probability), ``score``, ``poses_agreeing`` of ``poses``,
        ``notes``, ``source``, ``cleanup`` and ``probabilities`` — or, for a file that failed,
        ``file`` and ``error`` (one line).

    Raises
    ------
    ShapesError
        A usage error: a bad option, no input, no checkpoint, no calibration data.
    """
    view = _check_options(poses, regime, accept, batch_size, orientation, units, normals, viewpoint)
    settings = clean if isinstance(clean, CleanSettings) else CleanSettings.from_dict(clean)
    set_threads(threads)
    files = find_inputs(inputs, exclude=out)
    ckpt = find_checkpoint(run)
    model, meta = load_classifier(ckpt)
    root = Path(inputs)
    names = [p.relative_to(root).as_posix() if root.is_dir() else p.name for p in files]
    clouds = []
    for path, name in zip(files, names):
        try:
            clouds.append(read_input(path, meta, seed=seed, needs_normals=model.uses_normals, units=units,
                                     clean=settings, normals=normals, viewpoint=view,
                                     orientation=orientation))
        except Exception as exc:  # one bad file never stops the batch; its row says why
            if not isinstance(exc, (ShapesError, OSError, ValueError, MemoryError, EOFError)):
                raise
            clouds.append(_error_text(exc, path, name))
    rotations = random_poses(regime, poses, generator=torch_generator(seed))  # (R, 3, 3)
    threshold = calibrate(model, meta, rotations, accept, calibration, batch_size)
    threshold.pop("scores")
    twin_index, symmetry = meta.twin_index(), model.symmetry
    rows = []
    for path, name, cloud in zip(files, names, clouds):
        if isinstance(cloud, str):
            rows.append({"file": name, "error": cloud})
            continue
        nrm = torch.as_tensor(cloud.normals)[None] if model.uses_normals else None
        probs, votes = pose_averaged(model, torch.as_tensor(cloud.points)[None], nrm, rotations, batch_size)
        probs = probs[0].numpy()
        score = float(known_scores(probs[None], twin_index, symmetry == "E3")[0])
        rows.append(_row(name, cloud, probs, votes[0].numpy(), score, threshold["value"], meta, symmetry))
    result = {"checkpoint": str(ckpt), "backbone": meta.backbone.name, "symmetry": symmetry,
              "classes": list(meta.classes), "poses": poses, "regime": regime, "seed": seed,
              "score": "largest pose-averaged probability" + (
                  "; a handed class counts with its mirror twin (this E3 backbone cannot see hand)"
                  if symmetry == "E3" else ""),
              "reading": {"units": units, "normals": normals,
                          "viewpoint": None if view is None else view.tolist(), "clean": settings.as_dict()},
              "threshold": threshold, "failed": sum(1 for r in rows if "error" in r), "results": rows}
    if out is not None:
        write_json(out, result)  # serialised in full before the file is opened, then renamed into place
    return result


def format_table(result: dict) -> str:
    """A plain-text table of :func:`predict_files`'s result, one row per file."""
    t = result["threshold"]
    lines = [f"run: {result['checkpoint']} ({result['backbone']}, symmetry {result['symmetry']})",
             f"not a known part below score {t['value']:.3f}: accepts {100 * t['accepted']:.0f}% of the "
             f"{t['validation_clouds']} validation clouds (asked {100 * t['accept']:.0f}%); "
             f"{result['poses']} {result['regime']} poses per cloud, seed {result['seed']}"]
    header = ("file", "answer", "p", "runner-up", "p", "score", "poses", "note")
    body = []
    for r in result["results"]:
        if "error" in r:
            body.append(f"error: {r['file']}: {r['error']}")  # one line of its own, in file order
            continue
        answer = r["answer"] if r["known"] else f"{UNKNOWN}, nearest {r['top']['class']}"
        body.append((r["file"], answer, f"{r['top']['probability']:.2f}", r["runner_up"]["class"],
                     f"{r['runner_up']['probability']:.2f}", f"{r['score']:.2f}",
                     f"{r['poses_agreeing']}/{r['poses']}", "; ".join(r["notes"])))
    rows = [row for row in [header, *body] if not isinstance(row, str)]
    widths = [max(len(row[i]) for row in rows) for i in range(len(header))]
    for row in [header, *body]:
        lines.append(row if isinstance(row, str) else "  ".join(c.ljust(w) for c, w in zip(row, widths)).rstrip())
    if result.get("failed"):
        lines.append(f"{result['failed']} of {len(result['results'])} file(s) could not be classified (error rows above)")
    return "\n".join(lines)
