"""Descriptors made from surface normals, and the rule that reads a normal as an axis.

A normal ``n`` is a polar vector (``n -> Q n`` for every orthogonal ``Q``). Estimated from a scan's
points it has a reliable line and an unreliable sign (docs/design.md, "Normals as axes"), and a
field of reversed normals reads like the mirror image in every term odd in ``n``. So with
``signed_normals: false`` each term odd in a point's own normal is multiplied by its lean
``w = n . y / |y|`` (:func:`lean`; ``y`` the point's offset from the centroid), which makes it even:
``w n``, ``w (n . c)``, ``w (n x c)`` (:func:`as_axis`). Terms even already, such as the chirality
``det[y, n, M n]`` (:func:`chirality`) and ``n^T M n``, are kept as they are. ``w`` is a proper
scalar, so the parity of every term is unchanged, and ``n -> -n`` at any subset of points changes
nothing, exactly.
"""

from __future__ import annotations

from typing import NamedTuple

import torch

from shapes.backbones._base import masked_mean
from shapes.backbones._neighbours import Cloud, Edges
from shapes.backbones._vectors import anisotropy, dot, norm, triple
from shapes.geometry import gather_neighbours

__all__ = ["lean", "as_axis", "chirality", "NormalInputs", "normal_inputs", "NORMAL_SCALARS", "NORMAL_VECTORS",
           "NORMAL_PSEUDO"]

# Floor of |y|^2 in the lean: a point at the centroid has no direction to lean along.
LEAN_EPS = 1e-6
NORMAL_SCALARS, NORMAL_VECTORS, NORMAL_PSEUDO = 5, 4, 3  # widths of the three parts of NormalInputs


def lean(normals: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    """``w = n . y / |y|`` per point ``(B, N)``: how far the normal leans away from the centroid; odd in ``n``."""
    return dot(normals, y) / norm(y, eps=LEAN_EPS)


def as_axis(w: torch.Tensor, signed: bool, *odd: torch.Tensor) -> tuple:
    """The terms ``odd`` (each odd in the point's normal, ``(B, N, ...)``) as they are when ``signed``,
    else each times the lean ``w (B, N)``: even in the normal's sign."""
    if signed:
        return odd
    return tuple(t * w.reshape(w.shape + (1,) * (t.dim() - 2)) for t in odd)


def chirality(y: torch.Tensor, normals: torch.Tensor, moment: torch.Tensor) -> torch.Tensor:
    """``det[y, n, M n]`` per point ``(B, N)``: a pseudo-scalar, even in ``n``. On a helicoid (a thread
    flank, a helical tooth) the normal leans along the axis in step with the turn, so it keeps one
    sign over the surface: the hand's times that of the part's axial stretch; 0 on flats and cylinders."""
    return triple(y, normals, normals @ moment)


class NormalInputs(NamedTuple):
    """Per-point inputs made from the surface normals (see :func:`normal_inputs`).

    scalars (B, N, NORMAL_SCALARS) proper scalars; vectors (B, N, NORMAL_VECTORS, 3) polar vectors in
    ``x, y, z`` order; pseudo (B, N, NORMAL_PSEUDO) pseudo-scalars (negated by reflections).
    """

    scalars: torch.Tensor
    vectors: torch.Tensor
    pseudo: torch.Tensor


def normal_inputs(cloud: Cloud, edges: Edges, signed: bool = True) -> NormalInputs:
    """Exactly equivariant per-point quantities of the points and their normals (``cloud.normals``).

    With ``y`` a point's offset from the centroid in RMS radii, ``n`` its unit normal, ``M`` the cloud's
    normalised second moment and means over the neighbours ``j`` of a point:

    - scalars: the lean ``n . y / |y|``, ``n^T M n`` (normal along the long axes), ``mean_j n . n_j``
      (1 on a flat, less on a bend), ``n . mean_j r_ij / mean_j |r_ij|`` (groove or ridge) and the
      cloud's anisotropy ``a = tr (M - I)^3`` (> 0 for a rod, < 0 for a disc);
    - vectors: ``n``, ``M n``, ``y`` and ``mean_j n_j``;
    - pseudo-scalars: ``chi = det[y, n, M n]``, ``chi a``, and the cloud's ``mean(chi) a`` at every point:
      a helical flank tilts ``n`` about the axis in a sense set by the hand, ``a`` makes the sign the
      same for a long stud and a flat gear.

    Unless ``signed``, the terms odd in ``n`` take the axis reading (:func:`as_axis`): the scalars become
    ``w^2``, ``w n . mean_j r_ij / mean_j |r_ij|`` and ``w n . mean_j w_j n_j``; the vectors ``w n``,
    ``w M n``, ``y`` and ``mean_j w_j n_j``.
    """
    y, normals, mask = cloud.y, cloud.normals, cloud.mask
    aniso = anisotropy(cloud.moment)  # (B,)
    mn = normals @ cloud.moment  # (B, N, 3); M is symmetric, so this is M n per point
    chi = chirality(y, normals, cloud.moment)  # (B, N): det[y, n, M n]
    cloud_chi = masked_mean(chi, mask) * aniso  # (B,)
    nmn = dot(normals, mn)  # (B, N): n^T M n, even in n
    w = lean(normals, y)
    normals, mn, facing = as_axis(w, signed, normals, mn, w)
    mean_nj = edges.mean(gather_neighbours(normals, edges.index))  # (B, N, 3)
    mean_r = edges.mean(edges.vectors)  # (B, N, 3)
    mean_length = edges.mean(edges.length)  # (B, N)
    scalars = torch.stack([facing, nmn, dot(normals, mean_nj), dot(normals, mean_r) / (mean_length + 1e-6),
                           aniso[:, None].expand_as(chi)], -1)  # (B, N, NORMAL_SCALARS)
    vectors = torch.stack([normals, mn, y, mean_nj], -2)  # (B, N, NORMAL_VECTORS, 3)
    pseudo = torch.stack([chi, chi * aniso[:, None], cloud_chi[:, None].expand_as(chi)], -1)  # (B, N, NORMAL_PSEUDO)
    return NormalInputs(scalars, vectors, pseudo)
