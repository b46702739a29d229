"""A baseline that sees raw coordinates: a shared per-point MLP and max pooling.

It is translation invariant (coordinates are taken relative to the centroid) but not rotation
invariant: a part it learnt upright is a stranger to it upside down. It is here to show, by
measurement, what rotation awareness buys.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import nn

from shapes._checks import integer
from shapes.backbones._base import Backbone, masked_max, masked_mean
from shapes.backbones._neighbours import Cloud

__all__ = ["PlainBackbone", "PlainConfig"]


@dataclass
class PlainConfig:
    hidden: int = 128  # width of the per-point MLP; wide enough to fit 14 classes in aligned poses
    layers: int = 3  # depth of the per-point MLP; more adds cost but little accuracy on rigid parts

    def __post_init__(self):
        self.hidden = integer("backbone.hidden", self.hidden, low=1)
        self.layers = integer("backbone.layers", self.layers, low=1)


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
        widths = [3] + [c.hidden] * c.layers
        blocks = []
        for a, b in zip(widths[:-1], widths[1:]):
            blocks += [nn.Linear(a, b), nn.SiLU()]
        self.mlp = nn.Sequential(*blocks)
        self.symmetry = "none"
        self.out_features = 2 * c.hidden

    def forward(self, points: torch.Tensor, mask: torch.Tensor | None = None) -> torch.Tensor:
        cloud = Cloud.of(self, points, mask)  # centred on the real points: translation invariant
        x = self.mlp(cloud.points)  # (B, N, hidden)
        return torch.cat([masked_max(x, cloud.mask), masked_mean(x, cloud.mask)], dim=-1)  # (B, 2*hidden)
