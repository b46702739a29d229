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
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch
import trimesh

from shapes._atomic import write_json
from shapes._runtime import set_threads
from shapes.data import MESH_SUFFIXES, MIN_SCAN_POINTS, SCAN_SUFFIXES, load_split, read_mesh, read_scan
from shapes.data import estimate_normals, farthest_point_subsample, normalise, sample_cloud
from shapes.errors import ConfigError, DataError, InputError, MeshError
from shapes.evaluate import find_checkpoint, load_classifier, logits_under_poses
from shapes.geometry import check_regime, random_poses
from shapes.seeding import rng, torch_generator

__all__ = ["SUPPORTED", "REGIMES", "UNKNOWN", "HAND_NOTE", "NORMALS_K", "Cloud", "find_inputs", "read_input",
           "pose_averaged", "known_scores", "calibrate", "predict_files", "format_table"]

# every scan suffix the data readers take, plus .npz holding 'points' (N, 3) and optional 'normals'
SUPPORTED = tuple(sorted(set(SCAN_SUFFIXES) | {".npz"}))
REGIMES = ("cad", "upright", "any")  # a mirror pose would change a handed part into its twin
UNKNOWN = "unknown (not a known part)"
HAND_NOTE = "hand not determinable by this backbone"
NORMALS_K = 16  # neighbourhood of the PCA normals estimated for a point file that has none


@dataclass
class Cloud:
    """One input made ready for the network.

    points : (N, 3) float32, centroid 0 and unit RMS radius
    normals : (N, 3) float32 unit vectors (from the file or estimated), or None when the file has
        none and the backbone takes none
    source : how the cloud was made, for the report
    """

    points: np.ndarray
    normals: np.ndarray | None
    source: str


def _check(value, name: str, ok: bool, expected: str):
    if not ok:
        raise ConfigError(f"predict.{name} should be {expected}, got {value!r} instead.")
    return value


def _check_options(poses, regime, accept, batch_size) -> None:
    _check(poses, "poses", isinstance(poses, int) and not isinstance(poses, bool) and poses >= 1,
           "an integer >= 1")
    check_regime(regime, REGIMES, "predict.regime")
    _check(accept, "accept", isinstance(accept, (int, float)) and not isinstance(accept, bool)
           and 0.0 < accept <= 1.0, "a share in (0, 1]")
    _check(batch_size, "batch_size", isinstance(batch_size, int) and batch_size >= 1, "an integer >= 1")


def find_inputs(path: str | os.PathLike) -> list[Path]:
    """A file → [file]; a folder → its scan and mesh files, searched recursively, sorted.

    Hidden files and files of other suffixes in a folder are passed over; a named file of an
    unsupported suffix is an error.
    """
    path = Path(path)
    if not path.exists():
        raise MeshError(f"input {path} not found; expected a scan or mesh file or a folder of them.")
    if path.is_file():
        if path.suffix.lower() not in SUPPORTED:
            raise MeshError(f"input {path} has unsupported suffix '{path.suffix or '(none)'}'; "
                            f"supported: {', '.join(SUPPORTED)}.")
        return [path]
    found = sorted(p for p in path.rglob("*") if p.is_file() and p.suffix.lower() in SUPPORTED
                   and not any(part.startswith(".") for part in p.relative_to(path).parts))
    if not found:
        raise MeshError(f"folder {path} holds no scan or mesh files; expected files ending in {', '.join(SUPPORTED)}.")
    return found


def _read_npz(path: Path) -> tuple[np.ndarray, np.ndarray | None]:
    try:
        with np.load(path, allow_pickle=False) as arrays:
            data = {k: arrays[k] for k in arrays.files}
    except Exception as exc:
        raise MeshError(f"scan file {path} could not be read as .npz: {str(exc)[:160]}") from exc
    if "points" not in data:
        raise MeshError(f"scan file {path} should hold an array 'points' (N, 3); found {sorted(data) or 'none'}.")
    points, normals = data["points"], data.get("normals")
    for name, array in (("points", points), ("normals", normals)):
        if array is None:
            continue
        if array.ndim != 2 or array.shape[1] != 3 or not np.issubdtype(array.dtype, np.number):
            raise MeshError(f"scan file {path}: '{name}' should be numbers of shape (N, 3), "
                            f"got {array.dtype} of shape {array.shape} instead.")
    if normals is not None and len(normals) != len(points):
        raise MeshError(f"scan file {path}: 'normals' should have one row per point ({len(points)}), "
                        f"got {len(normals)} instead.")
    if not np.isfinite(points).all():
        raise MeshError(f"scan file {path} has NaN or inf point coordinates; expected finite coordinates.")
    return points.astype(np.float64), None if normals is None else normals.astype(np.float64)


def _ply_faces_and_normals(path: Path) -> tuple[bool, np.ndarray | None]:
    """Whether a PLY has faces, and its per-vertex normals (nx, ny, nz) when it is a bare cloud."""
    try:
        loaded = trimesh.load(str(path), file_type="ply", process=False)
    except Exception:
        return False, None  # read_scan parses it again and names the problem
    if isinstance(loaded, trimesh.Trimesh) and len(loaded.faces) > 0:
        return True, None
    vertex = loaded.metadata.get("_ply_raw", {}).get("vertex", {}).get("data", {})
    # ASCII PLY gives a dict of columns, binary PLY a structured array
    names = vertex.dtype.names or () if isinstance(vertex, np.ndarray) else tuple(vertex)
    if all(k in names for k in ("nx", "ny", "nz")):
        return False, np.stack([np.asarray(vertex[k], dtype=np.float64).reshape(-1) for k in ("nx", "ny", "nz")], axis=1)
    return False, None


def _unit_normals(path: Path, normals: np.ndarray) -> np.ndarray:
    length = np.linalg.norm(normals, axis=1, keepdims=True)
    bad = ~(np.isfinite(length[:, 0]) & (length[:, 0] > 1e-12))
    if bad.any():
        raise MeshError(f"scan file {path} has {int(bad.sum())} normal(s) of zero length or NaN "
                        f"(first at row {int(np.flatnonzero(bad)[0])}); expected unit outward normals.")
    return normals / length


def _fewest_points(meta: dict) -> tuple[int, str]:
    k = meta["backbone"]["options"].get("k")
    if k is not None and k + 1 > MIN_SCAN_POINTS:
        return k + 1, f"the {meta['backbone']['name']} backbone compares each point with its k = {k} nearest"
    return MIN_SCAN_POINTS, "fewer points carry too little shape to name a part"


def read_input(path: str | os.PathLike, meta: dict, seed=0, needs_normals: bool = False) -> Cloud:
    """Read one file into a cloud the run's network can take.

    Meshes (STL, OBJ, OFF, GLB, PLY with faces; millimetres, though the unit-RMS normalisation
    makes the unit immaterial) are sampled with the run's sampler: ``meta["data"]["sampler"]``
    gives the mode (a single-view virtual scan when the run was trained on scans only, the full
    surface otherwise), the oversampling before farthest-point thinning and the noise, and
    ``meta["data"]["points"]`` the count. The face normals of the sampled points come along.

    Point files (``.xyz``/``.txt``/``.csv`` rows, ``.npy`` (N, 3), a PLY without faces, optionally
    with ``nx ny nz``, ``.npz`` with ``points`` (N, 3) and optional ``normals`` (N, 3)) are thinned
    by farthest-point subsampling when they hold more points than the training clouds, and kept
    whole when they hold fewer (but at least enough for the backbone's neighbourhoods). When the
    backbone takes normals and a point file has none, they are estimated on the thinned cloud by
    local PCA over ``NORMALS_K`` neighbours, oriented by MST propagation and turned outward (see
    :func:`shapes.data.estimate_normals`); ``source`` says so.
    ``seed`` (None, int or numpy Generator) drives the sampling and the thinning.

    Raises
    ------
    MeshError
        Unreadable file, wrong array shape, too few points, or no normals for a backbone that needs
        them when they cannot be estimated either.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    gen = rng(seed)
    data = meta["data"]
    target = int(data["points"])
    is_mesh, normals = suffix in MESH_SUFFIXES, None
    if suffix == ".ply":
        is_mesh, normals = _ply_faces_and_normals(path)
    if is_mesh:
        sampler = data.get("sampler") or {}
        settings = {"points": target, "oversample": int(sampler.get("oversample", 2)),
                    "noise": float(sampler.get("noise", 0.0))}
        scan = sampler.get("mode") == "scan"
        points, normals, _ = sample_cloud(read_mesh(path), scan, settings, gen)  # as the shards were
        source = f"mesh, {'virtual scan' if scan else 'surface'} of {target} points"
    else:
        if suffix == ".npz":
            if not path.is_file() or path.stat().st_size == 0:
                raise MeshError(f"scan file {path} is missing or empty (0 bytes).")
            points, normals = _read_npz(path)
        else:
            points = read_scan(path, min_points=0)
        fewest, why = _fewest_points(meta)
        if len(points) < fewest:
            raise MeshError(f"scan file {path} has {len(points)} points; need at least {fewest} ({why}).")
        if normals is not None:
            normals = _unit_normals(path, normals)
        source = f"points, {len(points)}"
        if len(points) > target:
            keep = farthest_point_subsample(points, target, seed=gen)
            points, normals = points[keep], None if normals is None else normals[keep]
            source += f" thinned to {target}"
        try:
            points, _, _ = normalise(points)
        except InputError as exc:  # e.g. every point at one spot
            raise MeshError(f"scan file {path}: {exc}") from None
        source += " with normals" if normals is not None else ""
        if needs_normals and normals is None:
            try:
                normals, _ = estimate_normals(points, k=NORMALS_K)
            except InputError as exc:  # e.g. too few points for the neighbourhoods
                raise MeshError(f"scan file {path} has no surface normals and they cannot be estimated ({exc}); "
                                "give a mesh, a PLY with nx ny nz or a .npz with 'normals'.") from None
            source += f", normals estimated (local PCA, k={NORMALS_K}, MST orientation)"
    return Cloud(points.astype(np.float32), None if normals is None else normals.astype(np.float32), source)


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


def _twin_index(meta: dict) -> np.ndarray:
    classes = list(meta["classes"])
    return np.array([classes.index(meta["twins"][c]) for c in classes])


def calibrate(model, meta: dict, rotations: torch.Tensor, accept: float, data_dir: str | os.PathLike | None = None,
              batch_size: int = 32) -> dict:
    """The open-set threshold from the run's validation split under the given poses.

    ``threshold = numpy.quantile(scores, 1 - accept)``: about ``accept`` of the validation clouds
    score at or above it. Returns the threshold, the rule, the folder and the scores.
    """
    data_dir = Path(data_dir or meta["data"]["dir"])
    try:
        val = load_split(data_dir, "val")
    except DataError as exc:
        raise DataError(f"cannot calibrate the unknown-part threshold: {exc} Point predict.calibration at the "
                        "dataset folder the run was trained on.") from None
    if list(val.meta["classes"]) != list(meta["classes"]):
        raise DataError(f"the classes in '{data_dir}' differ from the checkpoint's "
                        f"({len(val.meta['classes'])} vs {len(meta['classes'])}); calibrate on the run's own dataset.")
    if len(val) == 0:
        raise DataError(f"the validation split of '{data_dir}' is empty; nothing to calibrate the threshold on.")
    normals = torch.as_tensor(val.normals) if model.uses_normals else None
    probs, _ = pose_averaged(model, torch.as_tensor(val.points), normals, rotations, batch_size)
    scores = known_scores(probs.numpy(), _twin_index(meta), model.symmetry == "E3")
    threshold = float(np.quantile(scores, 1.0 - accept))
    return {"value": threshold, "accept": float(accept), "data": str(data_dir), "validation_clouds": int(len(val)),
            "accepted": float((scores >= threshold).mean()),
            "rule": "numpy.quantile(validation scores, 1 - accept); a scan scoring below it is not a known part",
            "scores": scores.tolist()}


def _row(path: Path, root: Path, cloud: Cloud, probs: np.ndarray, votes: np.ndarray, score: float,
         threshold: float, meta: dict, symmetry: str) -> dict:
    classes = list(meta["classes"])
    order = np.argsort(-probs, kind="stable")
    top, second = classes[order[0]], classes[order[1]]
    agree = int((votes == order[0]).sum())
    known = bool(score >= threshold)
    notes = []
    if known and meta["twins"][top] != top and symmetry == "E3":
        notes.append(f"{HAND_NOTE} ({top} or {meta['twins'][top]})")
    return {
        "file": path.relative_to(root).as_posix() if root.is_dir() else path.name,
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
        "probabilities": {c: float(p) for c, p in zip(classes, probs)},
    }


def predict_files(run: str | os.PathLike, inputs: str | os.PathLike, *, poses: int = 8, regime: str = "any",
                  accept: float = 0.95, calibration: str | os.PathLike | None = None, seed: int = 0,
                  batch_size: int = 32, threads: int | None = None, out: str | os.PathLike | None = None) -> dict:
    """Classify every scan or mesh in ``inputs`` (a file or a folder) with the run's checkpoint.

    Every cloud is scored under the same ``poses`` random poses of ``regime``, drawn from
    ``seed``, so a file's answer depends only on its content, the run and the seed. Every file
    is read and checked before any is scored; ``out`` (a JSON file) is written, whole, at the end.

    Returns
    -------
    result : dict
        ``checkpoint``, ``backbone``, ``symmetry``, ``poses``, ``regime``, ``seed``, ``threshold``
        (see :func:`calibrate`, without the scores) and ``results``: one dict per file with
        ``answer`` (a class, or ``UNKNOWN``), ``known``, ``top`` and ``runner_up`` (class and
        probability), ``score``, ``poses_agreeing`` of ``poses``, ``notes`` and ``probabilities``.
    """
    _check_options(poses, regime, accept, batch_size)
    set_threads(threads)
    files = find_inputs(inputs)
    ckpt = find_checkpoint(run)
    model, meta = load_classifier(ckpt)
    clouds = [read_input(f, meta, seed=seed, needs_normals=model.uses_normals) for f in files]
    rotations = random_poses(regime, poses, generator=torch_generator(seed))  # (R, 3, 3)
    threshold = calibrate(model, meta, rotations, accept, calibration, batch_size)
    threshold.pop("scores")
    twin_index, symmetry = _twin_index(meta), model.symmetry
    root = Path(inputs)
    rows = []
    for path, cloud in zip(files, clouds):
        normals = torch.as_tensor(cloud.normals)[None] if model.uses_normals else None
        probs, votes = pose_averaged(model, torch.as_tensor(cloud.points)[None], normals, rotations, batch_size)
        probs = probs[0].numpy()
        score = float(known_scores(probs[None], twin_index, symmetry == "E3")[0])
        rows.append(_row(path, root, cloud, probs, votes[0].numpy(), score, threshold["value"], meta, symmetry))
    result = {"checkpoint": str(ckpt), "backbone": meta["backbone"]["name"], "symmetry": symmetry,
              "classes": list(meta["classes"]), "poses": poses, "regime": regime, "seed": seed,
              "score": "largest pose-averaged probability" + (
                  "; a handed class counts with its mirror twin (this E3 backbone cannot see hand)"
                  if symmetry == "E3" else ""),
              "threshold": threshold, "results": rows}
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
        answer = r["answer"] if r["known"] else f"{UNKNOWN}, nearest {r['top']['class']}"
        body.append((r["file"], answer, f"{r['top']['probability']:.2f}", r["runner_up"]["class"],
                     f"{r['runner_up']['probability']:.2f}", f"{r['score']:.2f}",
                     f"{r['poses_agreeing']}/{r['poses']}", "; ".join(r["notes"])))
    widths = [max(len(row[i]) for row in [header, *body]) for i in range(len(header))]
    for row in [header, *body]:
        lines.append("  ".join(cell.ljust(w) for cell, w in zip(row, widths)).rstrip())
    return "\n".join(lines)
