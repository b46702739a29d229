"""The backbone contract and the shared invariant head.

A backbone maps a padded batch of clouds to invariant features::

    forward(points (B, N, 3) float, mask (B, N) bool | None) -> (B, out_features)

``mask`` is True for real points and False for padding. A backbone built with ``uses_normals``
True also takes ``normals=`` (B, N, 3): unit outward surface normals, which turn with the points
(``n -> Q n`` for any orthogonal Q, reflections included) and carry what a sparse cloud cannot
show, such as the tilt of a thread flank or of a helical tooth. A backbone declares ``symmetry``:
``"E3"`` (invariant to rotations, reflections, translations), ``"SE3"`` (rotations and
translations only: it can tell a part from its mirror image) or ``"none"``. Backbones never read
files and never import Hydra.
"""

from __future__ import annotations

import dataclasses
from typing import ClassVar

import torch
from torch import nn

from shapes.errors import ConfigError, InputError
from shapes.geometry import SmoothNeighbours, knn_graph, radius_graph, smooth_graph

__all__ = ["Backbone", "Classifier", "check_points", "check_normals", "masked_mean", "masked_max", "neighbourhood",
           "check_flag"]

SYMMETRIES = ("E3", "SE3", "none")


def check_points(points: torch.Tensor, mask: torch.Tensor | None) -> torch.Tensor:
    """Validate a batch at the boundary; return a bool mask (all True when none was given)."""
    if not isinstance(points, torch.Tensor) or points.dim() != 3 or points.shape[-1] != 3:
        shape = tuple(points.shape) if isinstance(points, torch.Tensor) else type(points).__name__
        raise InputError(f"points should have shape (B, N, 3), got {shape} instead.")
    if mask is None:
        return torch.ones(points.shape[:2], dtype=torch.bool, device=points.device)
    if mask.shape != points.shape[:2]:
        raise InputError(
            f"mask should have shape (B, N) = {tuple(points.shape[:2])}, got {tuple(mask.shape)} instead."
        )
    return mask.to(torch.bool)


def check_normals(normals: torch.Tensor | None, points: torch.Tensor) -> torch.Tensor:
    """Validate normals for a backbone that needs them; same shape and dtype as ``points``."""
    if normals is None:
        raise InputError("this backbone was built with normals: true and needs normals (B, N, 3) "
                         "beside the points; got none (retrain with normals: false for bare points).")
    if not isinstance(normals, torch.Tensor) or normals.shape != points.shape:
        shape = tuple(normals.shape) if isinstance(normals, torch.Tensor) else type(normals).__name__
        raise InputError(f"normals should have the points' shape {tuple(points.shape)}, got {shape} instead.")
    return normals.to(points.dtype)


def masked_mean(x: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Mean over dim 1 of ``x (B, N, ...)`` counting only points where ``mask (B, N)`` is True."""
    m = mask.to(x.dtype).reshape(mask.shape + (1,) * (x.dim() - 2))
    return (x * m).sum(1) / m.sum(1).clamp_min(1.0)


def masked_max(x: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Max over dim 1 of ``x (B, N, ...)`` ignoring padded points."""
    m = mask.reshape(mask.shape + (1,) * (x.dim() - 2))
    return x.masked_fill(~m, torch.finfo(x.dtype).min).amax(1)


def masked_centroid(points: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Centroid (B, 1, 3) of the real points; subtracting it makes any backbone translation invariant."""
    return masked_mean(points, mask).unsqueeze(1)


def neighbourhood(points: torch.Tensor, k: int, mask: torch.Tensor, radius: float | None,
                  smooth: bool) -> SmoothNeighbours:
    """The neighbour graph every backbone aggregates over, with a weight per edge.

    ``smooth=True``: :func:`shapes.geometry.smooth_graph`, the ``k`` nearest senders tapered to
    weight 0 at the ``(k+1)``-th one's distance (and at ``radius``), so the weighted neighbourhood is
    continuous in the points and blind to how tied distances were ordered. ``smooth=False``: the
    plain kNN (or radius) graph with weight 1 on every valid slot, as before the option existed
    (``scale`` is then NaN: there is none).
    """
    if smooth:
        return smooth_graph(points, k, mask=mask, radius=radius)
    nb = knn_graph(points, k, mask=mask) if radius is None else radius_graph(points, radius, k, mask=mask)
    scale = points.new_full(points.shape[:2], float("nan"))
    return SmoothNeighbours(nb.index, nb.valid, nb.valid.to(points.dtype), scale)


def check_flag(value, backbone: str, option: str) -> None:
    """ConfigError unless ``value`` is a bool (YAML ``true``/``false``), naming what was found."""
    if not isinstance(value, bool):
        raise ConfigError(f"{backbone} option '{option}' should be true or false, got {value!r}.")


class Backbone(nn.Module):
    """Base of every backbone: holds its config dataclass and declares its symmetry."""

    name: ClassVar[str] = ""
    Config: ClassVar[type] = object

    def __init__(self, **kwargs):
        super().__init__()
        fields = {f.name for f in dataclasses.fields(self.Config)}
        unknown = sorted(set(kwargs) - fields)
        if unknown:
            raise ConfigError(
                f"backbone '{self.name}' has no option(s) {unknown}; expected some of {sorted(fields)}."
            )
        self.config = self.Config(**kwargs)
        self.symmetry = "none"
        self.out_features = 0
        self.uses_normals = False  # True: forward takes normals= as well

    def config_dict(self) -> dict:
        """Plain-python options that rebuild this backbone: ``type(self)(**config_dict())``."""
        return dataclasses.asdict(self.config)

    def extra_repr(self) -> str:
        return f"symmetry={self.symmetry!r}, out_features={self.out_features}"


class Classifier(nn.Module):
    """Backbone + the shared head: an MLP on invariant features, so the logits are invariant too.

    Shape:
        points (B, N, 3), mask (B, N), normals (B, N, 3) -> logits (B, num_classes); normals are
        passed on only to a backbone that uses them (others ignore them).
    """

    def __init__(self, backbone: Backbone, num_classes: int, hidden: int = 128, dropout: float = 0.1):
        super().__init__()
        if num_classes < 2:
            raise ConfigError(f"a classifier needs at least 2 classes, got {num_classes}.")
        self.backbone = backbone
        self.head = nn.Sequential(
            nn.LayerNorm(backbone.out_features),
            nn.Linear(backbone.out_features, hidden),
            nn.SiLU(),
            nn.Dropout(dropout),
            nn.Linear(hidden, num_classes),
        )

    @property
    def symmetry(self) -> str:
        return self.backbone.symmetry

    @property
    def uses_normals(self) -> bool:
        return self.backbone.uses_normals

    def forward(self, points: torch.Tensor, mask: torch.Tensor | None = None,
                normals: torch.Tensor | None = None) -> torch.Tensor:
        if self.backbone.uses_normals:
            return self.head(self.backbone(points, mask, normals=normals))
        return self.head(self.backbone(points, mask))
