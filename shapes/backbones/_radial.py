"""Radial pieces shared by the backbones: a Gaussian basis of distances and a smooth cutoff."""

from __future__ import annotations

import math

import torch
from torch import nn

__all__ = ["GaussianBasis", "cosine_cutoff"]


def cosine_cutoff(d: torch.Tensor, cutoff: float) -> torch.Tensor:
    """½(cos(π d / cutoff) + 1) inside the cutoff, 0 outside: smooth, so filters fade to zero."""
    return torch.where(d < cutoff, 0.5 * (torch.cos(math.pi * d / cutoff) + 1.0), torch.zeros_like(d))


class GaussianBasis(nn.Module):
    """exp(−(d − μ_k)² / 2σ²) for ``num`` centres μ_k evenly spaced on [0, cutoff].

    Shape:
        d (...) -> (..., num)
    """

    def __init__(self, num: int, cutoff: float):
        super().__init__()
        self.register_buffer("centres", torch.linspace(0.0, cutoff, num), persistent=False)
        self.width = cutoff / max(num - 1, 1)

    def forward(self, d: torch.Tensor) -> torch.Tensor:
        diff = d.unsqueeze(-1) - self.centres.to(d.dtype)
        return torch.exp(-0.5 * (diff / self.width) ** 2)
