"""The export job: a trained run as one TorchScript file that a program with torch alone can load.

``export_run(run, out)`` rebuilds the run's classifier from its checkpoint and traces it
(``torch.jit.trace``) for one cloud of exactly ``points`` points, ``(1, N, 3)`` float32, plus the
normals ``(1, N, 3)`` when the backbone reads them. The file returns the logits ``(1, classes)``.
It centres each cloud on its centroid and scales it to unit RMS radius itself, as the shards and
``shapes predict`` do, so a cloud may come in any unit and any place. ``shapes`` is not needed to
load or run it: ``torch.jit.load(path)`` is enough. The archive also holds ``shapes.json``
(class names, mirror twins, the point count, the inputs, the backbone and its symmetry), read with
``torch.jit.load(path, _extra_files={"shapes.json": ""})``.

The trace is taken on a cloud laid on a lattice, where many neighbour distances tie, so the
neighbour search records its tie-breaking steps (on a cloud without ties they run on nothing and
change nothing). Before the file is renamed into place it is loaded back and compared with the
eager network on that cloud, on the same lattice turned and moved, and on a random cloud: a
difference in the logits above :data:`TOLERANCE` refuses the export with one line.

Only TorchScript is offered. ONNX was tried (onnx 1.23 installs with pip, torch 2.13): the
TorchScript-based ONNX exporter cannot translate the neighbour search, whose distance kernel writes
into a buffer (``out=``), and the newer one goes through ``torch.export``, which refuses the
branches that depend on values (the tie-breaking, the smallest cloud of a batch). For the same
reason the file is a TorchScript trace although torch now marks ``torch.jit`` as deprecated.
"""

from __future__ import annotations

import json
import os
import tempfile
import warnings
from pathlib import Path

import torch
from torch import nn

from shapes._atomic import atomic_path
from shapes._runtime import set_threads, versions
from shapes.backbones import Classifier
from shapes.errors import ConfigError, DataError
from shapes.run import find_checkpoint, load_classifier

__all__ = ["export_run", "FORMATS", "EXPORTED", "METADATA", "TOLERANCE", "lattice_cloud"]

FORMATS = ("torchscript",)
EXPORTED = "classifier.torchscript.pt"  # written in the run folder unless another path is given
METADATA = "shapes.json"  # the extra file inside the archive
TOLERANCE = 1e-5  # largest difference in the logits between the file and the eager network


class _Normalised(nn.Module):
    """The classifier behind the clean-up every cloud gets: centroid to 0, RMS radius to 1."""

    def __init__(self, model: nn.Module, uses_normals: bool):
        super().__init__()
        self.model = model
        self.uses_normals = uses_normals

    def forward(self, points: torch.Tensor, normals: torch.Tensor | None = None) -> torch.Tensor:
        x = points - points.mean(1, keepdim=True)  # (B, N, 3)
        scale = x.square().sum(-1).mean(1).sqrt()  # (B,) RMS radius
        x = x / scale[:, None, None]
        return self.model(x, None, normals if self.uses_normals else None)


def lattice_cloud(n: int, generator: torch.Generator | None = None) -> tuple[torch.Tensor, torch.Tensor]:
    """``n`` points of the integer lattice nearest the origin, as ``(1, n, 3)`` float32, with unit
    ``(1, n, 3)`` normals pointing away from the origin (random where a point is at the origin).

    Coordinates are small integers, so every squared distance is exact and equal distances tie
    exactly, as they do on a scanner's regular grid.
    """
    side = 1
    while (2 * side + 1) ** 3 < n:
        side += 1
    r = torch.arange(-side, side + 1, dtype=torch.float32)
    grid = torch.cartesian_prod(r, r, r)  # (M, 3)
    order = torch.argsort(grid.square().sum(-1), stable=True)
    points = grid[order[:n]]
    normals = torch.nn.functional.normalize(points, dim=-1)
    still = points.square().sum(-1) == 0
    if still.any():
        normals[still] = torch.nn.functional.normalize(torch.randn(int(still.sum()), 3, generator=generator), dim=-1)
    return points[None], normals[None]


def _check_clouds(n: int, uses_normals: bool) -> list[tuple[torch.Tensor, ...]]:
    gen = torch.Generator().manual_seed(0)
    points, normals = lattice_cloud(n, gen)
    q, _ = torch.linalg.qr(torch.randn(3, 3, generator=gen, dtype=torch.float64))
    turned = (points.double() @ q.T * 7.5 + torch.tensor([40.0, -3.0, 12.0], dtype=torch.float64)).float()
    random = torch.randn(1, n, 3, generator=gen) * 20.0
    clouds = [(points, normals), (turned, (normals.double() @ q.T).float()),
              (random, torch.nn.functional.normalize(torch.randn(1, n, 3, generator=gen), dim=-1))]
    return [c if uses_normals else c[:1] for c in clouds]


def _output_path(run_dir: Path, out: str | os.PathLike | None) -> Path:
    path = Path(out) if out is not None else run_dir / EXPORTED
    if path.is_dir():
        raise ConfigError(f"export.out '{path}' is a folder; expected a file path for the exported model.")
    parent = path.parent if str(path.parent) else Path(".")
    existing = next((p for p in (parent, *parent.parents) if p.exists()), Path("."))
    if not existing.is_dir():
        raise ConfigError(f"export.out '{path}' cannot be written: '{existing}' is a file, not a folder.")
    try:  # a file made and removed where the first missing folder would go: permissions, read-only
        with tempfile.TemporaryFile(dir=existing):
            pass
    except OSError as exc:
        raise ConfigError(f"export.out '{path}' cannot be written: {exc.strerror or exc} in '{existing}'.") from None
    return path


def export_run(run: str | os.PathLike, out: str | os.PathLike | None = None, *, format: str = "torchscript",
               points: int | None = None, threads: int | None = None) -> dict:
    """Write the run's classifier as a file ``torch.jit.load`` opens without ``shapes``.

    Parameters
    ----------
    run : a run folder or its checkpoint file.
    out : the file to write; None: ``<run folder>/classifier.torchscript.pt``.
    format : ``"torchscript"`` (the only one; see the module's docstring for ONNX).
    points : points per cloud the file takes; None: the run's (its training clouds').
    threads : torch threads while tracing and checking; None keeps torch's default.

    Returns
    -------
    dict with ``path`` (the file written), ``metadata`` (as stored in the file) and ``max_difference``
    (the largest difference in the logits found by the checks).

    Raises
    ------
    ConfigError
        An unknown format, a bad point count, or an output path that cannot be written.
    DataError
        No readable checkpoint, or a traced file that disagrees with the eager network.
    """
    if format not in FORMATS:
        raise ConfigError(f"export.format should be one of {', '.join(FORMATS)}, got {format!r} "
                          "(ONNX is not offered: torch's exporter cannot translate the neighbour search).")
    set_threads(threads)
    ckpt = find_checkpoint(run)
    path = _output_path(ckpt.parent, out)
    model, meta = load_classifier(ckpt)
    if not isinstance(model, Classifier):
        raise ConfigError(f"run '{ckpt.parent}' holds the {meta.backbone.name} baseline, not a torch network; "
                          "only runs of a trained backbone can be exported as TorchScript.")
    uses_normals = bool(model.uses_normals)
    n = int(meta.data.points) if points is None else points
    k = meta.backbone.options.get("k")
    fewest = max(int(k) + 2 if isinstance(k, int) else 2, 2)  # the neighbourhoods take k + 1 others
    if isinstance(n, bool) or not isinstance(n, int) or n < fewest:
        raise ConfigError(f"export.points should be an integer of at least {fewest} (the backbone's k = {k} "
                          f"neighbours and one more), got {n!r}.")
    wrapped = _Normalised(model, uses_normals).eval()
    clouds = _check_clouds(n, uses_normals)
    with torch.no_grad(), warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the tracer's notes on shapes taken as constants: N is fixed
        traced = torch.jit.trace(wrapped, clouds[0], check_trace=False)
    metadata = {
        "format": 1,
        "inputs": ["points", "normals"] if uses_normals else ["points"],
        "points": n,
        "input_shape": [1, n, 3],
        "dtype": "float32",
        "normalised_inside": "each cloud is centred on its centroid and scaled to unit RMS radius",
        "output": "logits (1, classes); softmax gives probabilities",
        "classes": list(meta.classes),
        "twins": dict(meta.twins),
        "handed": dict(meta.handed),
        "backbone": meta.backbone.name,
        "symmetry": meta.backbone.symmetry,
        "normals": ("unit surface normals; their sign is ignored" if uses_normals
                    and not meta.backbone.options.get("signed_normals", True)
                    else "unit outward surface normals" if uses_normals else None),
        "epoch": meta.epoch,
        "val_accuracy": meta.val_accuracy,
        "torch": str(torch.__version__),
        "shapes": versions().get("shapes"),
    }
    worst = 0.0
    try:
        with atomic_path(path) as tmp, warnings.catch_warnings():
            warnings.simplefilter("ignore", DeprecationWarning)  # torch.jit's notice: see the module's docstring
            torch.jit.save(traced, str(tmp), _extra_files={METADATA: json.dumps(metadata, indent=2)})
            loaded = torch.jit.load(str(tmp))
            with torch.no_grad():
                for cloud in clouds:
                    diff = float((loaded(*cloud) - wrapped(*cloud)).abs().max())
                    worst = max(worst, diff)
                    if not diff <= TOLERANCE:
                        raise DataError(f"the traced model disagrees with the run's network by {diff:.3g} in the "
                                        f"logits (more than {TOLERANCE:g}) on a check cloud of {n} points; nothing "
                                        "was written.")
    except OSError as exc:  # disk full, a folder removed meanwhile
        raise DataError(f"cannot write '{path}': {exc.strerror or exc}.") from None
    return {"path": str(path), "metadata": metadata, "max_difference": worst}
