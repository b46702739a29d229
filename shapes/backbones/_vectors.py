"""Vector algebra shared by the backbones: dot, cross and triple products, norms, the cloud's moments.

Every function works on the last axis of ``(..., 3)`` tensors and broadcasts like ``a * b``. Dot,
cross and triple products keep their value when the three components are permuted cyclically, so
they serve vectors stored as ``(x, y, z)`` and degree-1 features stored as ``(y, z, x)`` alike
(docs/design.md, "Spherical harmonics"). Under an orthogonal ``Q``: ``dot(Qa, Qb) = dot(a, b)``,
``cross(Qa, Qb) = det(Q) Q cross(a, b)`` (a pseudo-vector), ``triple(Qa, Qb, Qc) = det(Q) triple(a, b, c)``
(a pseudo-scalar), and the moment turns as ``Q M Q^T`` (docs/design.md, "Parity and handedness").
"""

from __future__ import annotations

import torch

from shapes.backbones._base import masked_mean

__all__ = ["dot", "cross", "triple", "norm", "det3", "rms_radius", "cloud_moment", "anisotropy"]

TINY = 1e-24  # far below any real squared length: keeps an empty or one-point cloud finite


def dot(a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    """``a . b`` over the last axis: ``(..., 3) x (..., 3) -> (...)``."""
    return (a * b).sum(-1)


def cross(a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    """``a x b`` over the last axis, written out by components (several times faster than
    ``torch.linalg.cross`` on CPU, and it broadcasts)."""
    a1, a2, a3 = a.unbind(-1)
    b1, b2, b3 = b.unbind(-1)
    return torch.stack([a2 * b3 - a3 * b2, a3 * b1 - a1 * b3, a1 * b2 - a2 * b1], -1)


def triple(a: torch.Tensor, b: torch.Tensor, c: torch.Tensor) -> torch.Tensor:
    """``det[a, b, c] = (a x b) . c``: a pseudo-scalar, ``(...)``."""
    return dot(cross(a, b), c)


def norm(v: torch.Tensor, eps: float = 1e-12, dim: int = -1) -> torch.Tensor:
    """``sqrt(|v|^2 + eps)`` along ``dim``: a length whose gradient is finite at zero. ``eps`` is the
    caller's floor: small for a length that is only read, larger for one that is divided by."""
    return torch.sqrt(v.square().sum(dim) + eps)


def det3(m: torch.Tensor) -> torch.Tensor:
    """Determinant of ``(..., 3, 3)`` as the triple product of its rows: a polynomial, so its gradient
    is finite at singular matrices."""
    return triple(m[..., 0, :], m[..., 1, :], m[..., 2, :])


def rms_radius(centred: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """``sqrt(mean |y|^2)`` over the real points of centred clouds ``(B, N, 3)`` -> ``(B,)``."""
    return torch.sqrt(masked_mean(centred.square().sum(-1), mask) + TINY)


def cloud_moment(centred: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """The cloud's normalised second moment ``M = 3 mean(y y^T) / mean |y|^2`` -> ``(B, 3, 3)``.

    Over the real points of centred clouds; trace 3, ``M = I`` for an isotropic cloud, free of the
    cloud's size. It turns as ``Q M Q^T`` under any orthogonal ``Q`` and has no sign to lose, so
    ``M v`` is a vector when ``v`` is one (and a pseudo-vector when ``v`` is one).
    """
    outer = centred.unsqueeze(-1) * centred.unsqueeze(-2)  # (B, N, 3, 3)
    m = masked_mean(outer.flatten(-2), mask).unflatten(-1, (3, 3))  # (B, 3, 3)
    trace = m.diagonal(dim1=-2, dim2=-1).sum(-1).clamp_min(TINY)  # (B,)
    return 3.0 * m / trace[:, None, None]


def anisotropy(moment: torch.Tensor) -> torch.Tensor:
    """``tr (M - I)^3 = sum (eig M - 1)^3`` of a normalised moment ``(B, 3, 3)`` -> ``(B,)``: > 0 for a rod,
    < 0 for a disc, 0 for a ball; no eigendecomposition."""
    shifted = moment - torch.eye(3, dtype=moment.dtype, device=moment.device)
    return torch.einsum("bij,bjk,bki->b", shifted, shifted, shifted)
