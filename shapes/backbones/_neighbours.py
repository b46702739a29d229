"""The neighbourhood preamble every backbone runs first: checked inputs, centred cloud, kNN graph.

:meth:`Cloud.of` checks a batch against the contract (:meth:`Backbone.check_inputs`), zeroes the
padding (junk there can never leak, not even NaN), centres the real points on their centroid
(docs/design.md, "Translations"), scales the normals to unit length and computes what every
handed backbone reads off the whole cloud: the offsets ``y`` in units of its RMS radius and its
normalised second moment ``M``. :func:`edges` builds the neighbour graph of a cloud once per
forward pass with what all layers share about it (docs/design.md, "Neighbourhoods and reach").
"""

from __future__ import annotations

from typing import NamedTuple

import torch

from shapes.backbones._base import masked_mean
from shapes.backbones._vectors import TINY, cloud_moment, norm, rms_radius
from shapes.geometry import SmoothNeighbours, knn_graph, radius_graph, relative_vectors, smooth_graph

__all__ = ["Cloud", "Edges", "edges", "neighbourhood"]


class Cloud(NamedTuple):
    """A checked, centred batch.

    points (B, N, 3) centred on the real points' centroid, 0 at padding; mask (B, N) bool; normals
    (B, N, 3) unit, 0 at padding, or None; y (B, N, 3) the points over the cloud's RMS radius;
    moment (B, 3, 3) the normalised second moment ``3 mean(y y^T) / mean|y|^2`` (trace 3).
    """

    points: torch.Tensor
    mask: torch.Tensor
    normals: torch.Tensor | None
    y: torch.Tensor
    moment: torch.Tensor

    @classmethod
    def of(cls, backbone, points: torch.Tensor, mask: torch.Tensor | None = None,
           normals: torch.Tensor | None = None) -> "Cloud":
        mask, normals = backbone.check_inputs(points, mask, normals)
        real = mask.unsqueeze(-1)
        points = points.masked_fill(~real, 0.0)
        points = torch.where(real, points - masked_mean(points, mask).unsqueeze(1), points)  # (B, N, 3)
        if normals is not None:
            normals = normals.masked_fill(~real, 0.0)
            normals = normals / norm(normals, eps=TINY).unsqueeze(-1)  # a zero normal stays 0
        y = points / rms_radius(points, mask)[:, None, None]
        return cls(points, mask, normals, y, cloud_moment(points, mask))

    def in_harmonic_order(self) -> "Cloud":
        """The same cloud with every vector in the order of ``Y_1``, ``(y, z, x)`` (docs/design.md,
        "Spherical harmonics"), the moment permuted to match: degree-1 features then need no reordering."""
        order = [1, 2, 0]
        normals = None if self.normals is None else self.normals[..., order]
        return Cloud(self.points[..., order], self.mask, normals, self.y[..., order],
                     self.moment[..., order, :][..., :, order])


class Edges(NamedTuple):
    """The neighbour graph of a cloud and what every layer shares about it.

    index (B, N, k) senders of each receiver; valid (B, N, k) real edges; taper (B, N, k) each edge's
    neighbourhood weight (:func:`shapes.geometry.smooth_graph`, 0 at the ``(k+1)``-th neighbour's
    distance; 1 on valid slots without smoothing; 0 on invalid ones); share (B, N, k) the taper over
    the receiver's total taper (floored at 1), so a sum over ``k`` is a weighted mean; vectors
    (B, N, k, 3) ``x_j - x_i``; length (B, N, k) their lengths (0 on invalid slots, which are self-loops).
    """

    index: torch.Tensor
    valid: torch.Tensor
    taper: torch.Tensor
    share: torch.Tensor
    vectors: torch.Tensor
    length: torch.Tensor

    def mean(self, x: torch.Tensor) -> torch.Tensor:
        """Weighted mean over the neighbours of a per-edge ``x (B, N, k, ...)`` -> ``(B, N, ...)``."""
        return (x * self.share.reshape(self.share.shape + (1,) * (x.dim() - 3))).sum(2)


def neighbourhood(points: torch.Tensor, k: int, mask: torch.Tensor, radius: float | None,
                  smooth: bool) -> SmoothNeighbours:
    """The ``k`` nearest senders (within ``radius``, when given) with a weight per edge.

    ``smooth=True``: :func:`shapes.geometry.smooth_graph`, tapered to weight 0 at the ``(k+1)``-th
    neighbour's distance (and at ``radius``), so the weighted neighbourhood is continuous in the points
    and blind to how tied distances were ordered. ``smooth=False``: the plain kNN (or radius) graph
    with weight 1 on every valid slot (``scale`` is then NaN: there is none).
    """
    if smooth:
        return smooth_graph(points, k, mask=mask, radius=radius)
    nb = knn_graph(points, k, mask=mask) if radius is None else radius_graph(points, radius, k, mask=mask)
    scale = points.new_full(points.shape[:2], float("nan"))
    return SmoothNeighbours(nb.index, nb.valid, nb.valid.to(points.dtype), scale)


def edges(cloud: Cloud, k: int, radius: float | None = None, smooth: bool = True) -> Edges:
    """The neighbour graph of ``cloud`` (:func:`neighbourhood`) and its edge vectors and lengths."""
    nb = neighbourhood(cloud.points, k, cloud.mask, radius, smooth)
    taper = nb.weight.to(cloud.points.dtype)  # 0 on invalid slots (padding has none)
    share = taper / taper.sum(-1, keepdim=True).clamp_min(1.0)
    vectors = relative_vectors(cloud.points, nb.index)  # (B, N, k, 3), sender - receiver
    length = norm(vectors) * nb.valid
    return Edges(nb.index, nb.valid, taper, share, vectors, length)
