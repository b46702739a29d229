"""Radial pieces shared by the backbones: a Gaussian basis of lengths and the cosine cutoff."""

from __future__ import annotations

import math

import torch
from torch import nn

__all__ = ["GaussianBasis", "cosine_cutoff"]


def cosine_cutoff(d: torch.Tensor, cutoff: float | torch.Tensor = 1.0) -> torch.Tensor:
    """``(cos(pi d / cutoff) + 1) / 2`` up to the cutoff, 0 beyond: 1 at 0, falls to 0 with zero slope,
    so a filter (or an edge) fades out smoothly. ``cutoff`` may be a tensor that broadcasts with ``d``."""
    return 0.5 * (torch.cos(math.pi * (d / cutoff).clamp(max=1.0)) + 1.0)


class GaussianBasis(nn.Module):
    """``exp(-(d - mu_k)^2 / 2 width^2)`` for ``num`` centres ``mu_k`` evenly spaced on ``[0, cutoff]``.

    ``width`` defaults to the spacing of the centres. No weights (the centres are a non-persistent
    buffer), so a backbone's state_dict does not depend on it.

    Shape:
        d (...) -> (..., num)
    """

    def __init__(self, num: int, cutoff: float, width: float | None = None):
        super().__init__()
        self.register_buffer("centres", torch.linspace(0.0, cutoff, num), persistent=False)
        self.width = cutoff / max(num - 1, 1) if width is None else width

    def forward(self, d: torch.Tensor) -> torch.Tensor:
        diff = d.unsqueeze(-1) - self.centres.to(d.dtype)
        return torch.exp(-0.5 * (diff / self.width) ** 2)
