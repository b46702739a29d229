"""Real Wigner-D matrices: how the real harmonics of degree ``l`` move under an orthogonal matrix.

``D = wigner_d(l, R)`` is the real orthogonal ``(2l+1, 2l+1)`` matrix with
``Y_l(R v) = D Y_l(v)`` for every ``v``; hence ``D(R1 R2) = D(R1) D(R2)``, ``D(R^T) = D(R)^T``,
and ``D_1(R)`` is ``R`` with rows and columns in the order ``(y, z, x)``.

Method: ``v -> Y_l(R v)`` is again a combination of degree-``l`` harmonics, so ``D`` is read off
by projecting it onto ``Y_l`` with a quadrature rule that integrates products of degree ``<= 2l``
exactly on the sphere (Gauss-Legendre in ``cos theta`` times uniform azimuths)::

    D = sum_i w_i Y_l(R v_i) Y_l(v_i)^T

Exact up to rounding (no Euler angles, no singular configurations), batched, and differentiable
in ``R`` (``D`` is a polynomial of degree ``l`` in the entries of ``R``). It also holds for improper
matrices: ``D_l(-I) = (-1)^l I``.
"""

from __future__ import annotations

import functools

import numpy as np
import torch

from shapes.geometry._checks import check_degree, check_matrices
from shapes.geometry._harmonics import L_MAX, spherical_harmonics

__all__ = ["wigner_d", "wigner_d_list"]

_YZX = [1, 2, 0]  # degree-1 harmonics are (y, z, x)


def _check_l(l, name: str = "l") -> int:
    return check_degree(l, name, L_MAX)


@functools.lru_cache(maxsize=None)
def _quadrature(l: int) -> tuple[np.ndarray, np.ndarray]:
    """Nodes ``(n, 3)`` and weights ``(n,)`` exact for spherical polynomials of degree ``<= 2l``."""
    nodes, weights = np.polynomial.legendre.leggauss(l + 1)  # exact in cos(theta) to degree 2l+1
    n_phi = 2 * l + 1  # uniform azimuths integrate e^{i M phi} exactly for |M| <= 2l
    phi = 2 * np.pi * (np.arange(n_phi) + 0.5) / n_phi
    ct, ph = np.meshgrid(nodes, phi, indexing="ij")
    st = np.sqrt(1 - ct * ct)
    pts = np.stack([st * np.cos(ph), st * np.sin(ph), ct], -1).reshape(-1, 3)
    w = np.repeat(weights, n_phi) * (2 * np.pi / n_phi)
    return pts, w


@functools.lru_cache(maxsize=None)
def _projector(l_top: int) -> tuple[np.ndarray, list[np.ndarray]]:
    """Quadrature nodes for degree ``l_top`` and, per degree ``l <= l_top``, ``w_i Y_l(v_i)`` ``(n, 2l+1)``."""
    pts, w = _quadrature(l_top)
    ys = spherical_harmonics(l_top, torch.from_numpy(pts))
    return pts, [w[:, None] * y.numpy() for y in ys]


def _from_harmonics(l_top: int, R: torch.Tensor, degrees) -> list[torch.Tensor]:
    pts, proj = _projector(l_top)
    nodes = torch.as_tensor(pts, dtype=R.dtype, device=R.device)
    moved = nodes @ R.transpose(-1, -2)  # (..., n, 3)
    # normalize=False: solid harmonics, so D is a polynomial in R (smooth gradients; |R v| = 1 anyway).
    ys = spherical_harmonics(l_top, moved, normalize=False)
    out = []
    for l in degrees:
        p = torch.as_tensor(proj[l], dtype=R.dtype, device=R.device)  # (n, 2l+1)
        out.append(ys[l].transpose(-1, -2) @ p)  # (..., 2l+1, 2l+1)
    return out


def wigner_d(l: int, rotations: torch.Tensor) -> torch.Tensor:
    """Real Wigner-D matrices of degree ``l``.

    Parameters
    ----------
    l : int
        Degree in ``[0, L_MAX]``.
    rotations : (..., 3, 3) float
        Orthogonal matrices (rotations, or improper ones).

    Returns
    -------
    (..., 2l+1, 2l+1) float
        ``D`` with ``Y_l(R v) = D Y_l(v)``.
    """
    l = _check_l(l)
    R = check_matrices(rotations)
    if l == 0:
        return torch.ones(R.shape[:-2] + (1, 1), dtype=R.dtype, device=R.device)
    if l == 1:
        return R[..., _YZX, :][..., :, _YZX]
    return _from_harmonics(l, R, [l])[0]


def wigner_d_list(l_max: int, rotations: torch.Tensor) -> list[torch.Tensor]:
    """``[wigner_d(l, rotations) for l in 0..l_max]``, sharing one evaluation of the harmonics."""
    l_max = _check_l(l_max, "l_max")
    R = check_matrices(rotations)
    out = [torch.ones(R.shape[:-2] + (1, 1), dtype=R.dtype, device=R.device)]
    if l_max >= 1:
        out.append(R[..., _YZX, :][..., :, _YZX])
    if l_max >= 2:
        out += _from_harmonics(l_max, R, range(2, l_max + 1))
    return out
