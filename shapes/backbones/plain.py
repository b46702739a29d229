"""A baseline that sees raw coordinates: a shared per-point MLP and max pooling.

It is translation invariant (coordinates are taken relative to the centroid) but not rotation
invariant: a part it learnt upright is a stranger to it upside down. It is here to show, by
measurement, what rotation awareness buys.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import nn

from shapes.backbones._base import Backbone, check_points, masked_centroid, masked_max, masked_mean
from shapes.errors import ConfigError

__all__ = ["PlainBackbone", "PlainConfig"]


@dataclass
class PlainConfig:
    hidden: int = 128  # width of the per-point MLP; wide enough to fit 14 classes in aligned poses
    layers: int = 3  # depth of the per-point MLP; more adds cost but little accuracy on rigid parts


class PlainBackbone(Backbone):
    """Per-point MLP on centred coordinates, then masked max and mean pooling.

    Shape:
        points (B, N, 3), mask (B, N) -> features (B, 2 * hidden)
    """

    name = "plain"
    Config = PlainConfig

    def __init__(self, **kwargs):
        super().__init__(**kwargs)
        c = self.config
        if c.hidden < 1 or c.layers < 1:
            raise ConfigError(f"plain needs hidden >= 1 and layers >= 1, got hidden={c.hidden}, layers={c.layers}.")
        widths = [3] + [c.hidden] * c.layers
        blocks = []
        for a, b in zip(widths[:-1], widths[1:]):
            blocks += [nn.Linear(a, b), nn.SiLU()]
        self.mlp = nn.Sequential(*blocks)
        self.symmetry = "none"
        self.out_features = 2 * c.hidden

    def forward(self, points: torch.Tensor, mask: torch.Tensor | None = None) -> torch.Tensor:
        mask = check_points(points, mask)
        x = self.mlp(points - masked_centroid(points, mask))  # (B, N, hidden)
        return torch.cat([masked_max(x, mask), masked_mean(x, mask)], dim=-1)  # (B, 2*hidden)
