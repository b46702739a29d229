"""The backbone contract, its input checks and the shared invariant head.

A backbone maps a padded batch of clouds to invariant features::

    forward(points (B, N, 3) float, mask (B, N) bool | None) -> (B, out_features)

``mask`` is True for real points and False for padding. A backbone built with ``uses_normals``
True also takes ``normals=`` (B, N, 3): unit outward surface normals, which turn with the points
(``n -> Q n`` for any orthogonal Q, reflections included) and carry what a sparse cloud cannot
show, such as the tilt of a thread flank or of a helical tooth. A backbone declares ``symmetry``:
``"E3"`` (invariant to rotations, reflections, translations), ``"SE3"`` (rotations and
translations only: it can tell a part from its mirror image) or ``"none"``. Backbones never read
files and never import Hydra. (docs/design.md, "Backbone contract".)
"""

from __future__ import annotations

import dataclasses
from typing import ClassVar

import torch
from torch import nn

from shapes.errors import ConfigError, InputError

__all__ = ["Backbone", "Classifier", "check_points", "check_normals", "masked_mean", "masked_max", "RENAMED"]

SYMMETRIES = ("E3", "SE3", "none")
# Options that were renamed: old name -> what to write instead (one line, for the user).
RENAMED = {
    "handedness": "symmetry (se3 | e3; handedness: true is symmetry: se3, false is e3)",
    "parity": "symmetry (se3 | e3; parity: full is symmetry: se3, even is e3)",
}


def _shape(x) -> str:
    return str(tuple(x.shape)) if isinstance(x, torch.Tensor) else type(x).__name__


def check_points(points: torch.Tensor, mask: torch.Tensor | None, dtype: torch.dtype | None = None,
                 min_points: int = 1, why: str = "") -> torch.Tensor:
    """Validate a batch at the boundary; return a bool mask (all True when none was given).

    Points must be ``(B, N, 3)``, of a floating dtype (``dtype``, the backbone's, when given) and
    finite at the real points (padding may hold anything); every cloud needs ``min_points`` real
    points (``why`` says what for). Each failure is one :class:`InputError` line.
    """
    if not isinstance(points, torch.Tensor) or points.dim() != 3 or points.shape[-1] != 3:
        raise InputError(f"points should have shape (B, N, 3), got {_shape(points)} instead.")
    if not points.is_floating_point() or (dtype is not None and points.dtype != dtype):
        expected = f"{dtype} like the backbone's weights" if dtype is not None else "a floating dtype"
        raise InputError(f"points should be {expected}, got {points.dtype} instead (convert one to the other).")
    if mask is None:
        mask = torch.ones(points.shape[:2], dtype=torch.bool, device=points.device)
    elif not isinstance(mask, torch.Tensor) or mask.shape != points.shape[:2]:
        raise InputError(f"mask should have shape (B, N) = {tuple(points.shape[:2])}, got {_shape(mask)} instead.")
    elif mask.is_floating_point() or mask.is_complex():
        raise InputError(f"mask should be bool (True at real points), got {mask.dtype} instead.")
    mask = mask.to(torch.bool)
    if not bool(torch.isfinite(points[mask]).all()):
        raise InputError("points should be finite at the real points (mask True), got NaN or inf instead.")
    fewest = int(mask.sum(1).min()) if mask.numel() else 0
    if fewest < min_points:
        raise InputError(f"{why or 'the backbone'} needs clouds of at least {min_points} points, got {fewest}.")
    return mask


def check_normals(normals: torch.Tensor | None, points: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Validate normals for a backbone that needs them: the points' shape, a floating dtype (cast to
    the points'), finite at the real points."""
    if normals is None:
        raise InputError("this backbone was built with normals: true and needs normals (B, N, 3) "
                         "beside the points; got none (retrain with normals: false for bare points).")
    if not isinstance(normals, torch.Tensor) or normals.shape != points.shape:
        raise InputError(f"normals should have the points' shape {tuple(points.shape)}, got {_shape(normals)} instead.")
    if not normals.is_floating_point():
        raise InputError(f"normals should be a floating dtype, got {normals.dtype} instead.")
    if not bool(torch.isfinite(normals[mask]).all()):
        raise InputError("normals should be finite at the real points (mask True), got NaN or inf instead.")
    return normals.to(points.dtype)


def masked_mean(x: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Mean over dim 1 of ``x (B, N, ...)`` counting only points where ``mask (B, N)`` is True."""
    m = mask.to(x.dtype).reshape(mask.shape + (1,) * (x.dim() - 2))
    return (x * m).sum(1) / m.sum(1).clamp_min(1.0)


def masked_max(x: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Max over dim 1 of ``x (B, N, ...)`` ignoring padded points."""
    m = mask.reshape(mask.shape + (1,) * (x.dim() - 2))
    return x.masked_fill(~m, torch.finfo(x.dtype).min).amax(1)


class Backbone(nn.Module):
    """Base of every backbone: holds its config dataclass and declares its symmetry.

    A subclass validates its options in its ``Config.__post_init__`` (with :mod:`shapes._checks`), so a
    bad option fails when the backbone is built, before any work.
    """

    name: ClassVar[str] = ""
    Config: ClassVar[type] = object

    def __init__(self, **kwargs):
        super().__init__()
        fields = {f.name for f in dataclasses.fields(self.Config)}
        for old in sorted(set(kwargs) - fields):
            if old in RENAMED:
                raise ConfigError(f"backbone option '{old}' is now {RENAMED[old]}.")
        unknown = sorted(set(kwargs) - fields)
        if unknown:
            raise ConfigError(
                f"backbone '{self.name}' has no option(s) {unknown}; expected some of {sorted(fields)}."
            )
        self.config = self.Config(**kwargs)
        self.symmetry = "none"
        self.out_features = 0
        self.uses_normals = False  # True: forward takes normals= as well

    @property
    def min_points(self) -> int:
        """Real points every cloud needs (a kNN backbone: ``k + 1``)."""
        k, radius = getattr(self.config, "k", None), getattr(self.config, "radius", None)
        return k + 1 if k is not None and radius is None else 1

    def check_inputs(self, points, mask, normals=None):
        """The contract's checks: ``(mask, normals)`` validated (normals None unless the backbone takes them)."""
        weight = next(self.parameters(), None)
        k = getattr(self.config, "k", None)
        why = f"k = {k} neighbours" if self.min_points > 1 else ""
        mask = check_points(points, mask, None if weight is None else weight.dtype, self.min_points, why)
        return mask, (check_normals(normals, points, mask) if self.uses_normals else None)

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
