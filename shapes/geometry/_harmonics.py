"""Real spherical harmonics by recurrence, batched and differentiable.

Convention (docs/design.md, "Spherical harmonics"): orthonormal on the unit sphere, order ``m = -l..l`` stored at ``m + l``.
From the complex ``Y_l^m`` with the Condon-Shortley phase (as ``scipy.special.sph_harm_y``
returns them)::

    m > 0:  sqrt(2) (-1)^m Re Y_l^m
    m = 0:  Y_l^0
    m < 0:  sqrt(2) (-1)^m Im Y_l^|m|

so degree 1 is ``sqrt(3 / 4 pi) * (y, z, x) / r``. Written as polynomials,
``Y_lm = sqrt(2) Pbar_l^|m|(z, r^2) * (C_m | S_|m|)`` where ``C_m + i S_m = (x + i y)^m`` and
``Pbar`` is the normalised associated Legendre polynomial divided by ``sin^m``; both follow
three-term recurrences whose coefficients are computed once in float64. No per-(l, m) closed forms.
"""

from __future__ import annotations

import functools
import math

import torch

from shapes.errors import InputError
from shapes.geometry._checks import check_degree, shape_of

__all__ = ["L_MAX", "spherical_harmonics", "harmonics_dim"]

# Highest degree served. The normalised recurrence has no overflow or cancellation problem far
# beyond this; 12 keeps the float64 error below 1e-13 against scipy (tested) and covers every
# backbone we plan (they use l <= 6).
L_MAX = 12


def harmonics_dim(l_max: int) -> int:
    """Number of components of degrees ``0..l_max`` together: ``(l_max + 1)^2``."""
    return (l_max + 1) ** 2


@functools.lru_cache(maxsize=None)
def _coefficients(l_max: int) -> dict:
    """Recurrence constants in float64 (Python floats).

    ``Pbar_m^m = start[m]``, ``Pbar_{m+1}^m = lift[m] z Pbar_m^m``, and for ``l >= m + 2``
    ``Pbar_l^m = a[l, m] z Pbar_{l-1}^m - b[l, m] r^2 Pbar_{l-2}^m``, with ``Pbar_l^m`` normalised
    so that ``sqrt(2) Pbar_l^m C_m`` (m > 0) and ``Pbar_l^0`` are orthonormal on the sphere.
    """
    start, lift, a, b = {}, {}, {}, {}
    for m in range(l_max + 1):
        # K_mm (2m-1)!!  with  K_lm = sqrt((2l+1)/(4 pi) (l-m)!/(l+m)!), built as a running product
        # so that no factorial is formed: (2m-1)!!^2 / (2m)! = prod_{k=1..m} (2k-1)/(2k).
        s = 1.0 / (4 * math.pi)
        for k in range(1, m + 1):
            s *= (2 * k - 1) / (2 * k)
        start[m] = math.sqrt((2 * m + 1) * s)
        lift[m] = math.sqrt(2 * m + 3)
        for l in range(m + 2, l_max + 1):
            a[l, m] = math.sqrt((4 * l * l - 1) / (l * l - m * m))
            b[l, m] = math.sqrt(((l - 1) ** 2 - m * m) * (2 * l + 1) / ((2 * l - 3) * (l * l - m * m)))
    return {"start": start, "lift": lift, "a": a, "b": b}


def _check_l_max(l_max) -> int:
    return check_degree(l_max, "l_max", L_MAX)


def spherical_harmonics(l_max: int, vectors: torch.Tensor, normalize: bool = True) -> list[torch.Tensor]:
    """Real spherical harmonics of degrees ``0..l_max`` of a batch of vectors.

    Parameters
    ----------
    l_max : int
        Highest degree, ``0 <= l_max <= L_MAX``.
    vectors : (..., 3) float
        Directions (any length). float32 or float64; the result has the same dtype and device.
    normalize : bool
        True (default): ``Y_l(v / |v|)``, the harmonics of the direction. A zero vector gives
        the degree-0 constant ``1 / sqrt(4 pi)`` and zeros for ``l > 0``, with a finite (zero)
        gradient. False: the solid harmonics ``|v|^l Y_l(v / |v|)``, homogeneous polynomials of
        degree ``l`` in ``(x, y, z)``, smooth everywhere (zero at the origin for ``l > 0``).

    Returns
    -------
    list of (..., 2l + 1) float
        Entry ``l`` holds ``Y_{l,m}`` for ``m = -l..l`` at position ``m + l``.

    Raises
    ------
    InputError
        ``vectors`` is not a floating ``(..., 3)`` tensor, or ``l_max`` is out of range.
    """
    l_max = _check_l_max(l_max)
    if not isinstance(vectors, torch.Tensor) or vectors.dim() < 1 or vectors.shape[-1] != 3:
        raise InputError(f"vectors should have shape (..., 3), got {shape_of(vectors)} instead.")
    if not vectors.is_floating_point():
        raise InputError(f"vectors should be float32 or float64, got {vectors.dtype} instead.")

    shape = vectors.shape[:-1]
    flat = vectors.reshape(-1, 3)  # (n, 3)
    if torch.is_grad_enabled() and vectors.requires_grad:
        # Autograd path: build each degree with one stack (differentiable, more memory).
        x, y, z, r2 = _prepare(flat, normalize)
        parts = _components(l_max, x, y, z, r2)
        out = [
            torch.stack([_alone(p, x) if t is None else p * t for p, t in ps], -1)
            for ps in parts
        ]
    else:
        # No-grad path: blocks of vectors written into preallocated outputs, so intermediates
        # stay cache-sized (about 2x faster at l_max = 6 and far less peak memory).
        n = flat.shape[0]
        out = [flat.new_empty((n, 2 * l + 1)) for l in range(l_max + 1)]
        for begin in range(0, n, _BLOCK):
            x, y, z, r2 = _prepare(flat[begin : begin + _BLOCK], normalize)
            for l, ps in enumerate(_components(l_max, x, y, z, r2)):
                block = out[l][begin : begin + _BLOCK]
                for col, (p, t) in enumerate(ps):
                    if t is None and isinstance(p, float):
                        block[:, col].fill_(p)
                    elif t is None:
                        block[:, col].copy_(p)
                    else:
                        torch.mul(t, p, out=block[:, col])
    return [o.reshape(shape + (o.shape[-1],)) for o in out]  # (..., 2l+1)


# Vectors per block on the no-grad path: intermediates of 64K floats fit in L2 cache.
_BLOCK = 1 << 16


def _alone(p, like: torch.Tensor) -> torch.Tensor:
    """An m = 0 component as a tensor (``Y_00`` is a float constant)."""
    return torch.full_like(like, p) if isinstance(p, float) else p


def _prepare(vectors: torch.Tensor, normalize: bool):
    """Coordinates ``x, y, z (n,)`` and ``r^2 (n,)`` fed to the polynomial recurrences."""
    if normalize:
        sq = (vectors * vectors).sum(-1, keepdim=True)
        nonzero = sq > torch.finfo(vectors.dtype).tiny
        # where() on both sides keeps the gradient finite for zero vectors (it is zero there).
        norm = torch.sqrt(torch.where(nonzero, sq, torch.ones_like(sq)))
        unit = torch.where(nonzero, vectors / norm, torch.zeros_like(vectors))
        x, y, z = unit.unbind(-1)
        # r^2 = 1 on the sphere and 0 for a zero vector: the solid harmonics of ``unit`` then give
        # exactly Y_l(v / |v|), and zeros for l > 0 at the origin.
        r2 = nonzero.squeeze(-1).to(vectors.dtype)
    else:
        x, y, z = vectors.unbind(-1)
        r2 = x * x + y * y + z * z
    return x, y, z, r2


def _components(l_max: int, x, y, z, r2) -> list[list]:
    """Per degree, the ``2l + 1`` components as factor pairs ``(p, t)``, component ``= p * t``.

    ``p`` is ``Pbar_l^|m|`` (a float when it is constant), ``t`` is ``S_|m|``, ``C_m``, or None for
    ``m = 0`` (then the component is ``p`` itself). ``sqrt(2)`` is folded into the starting values
    for ``m > 0``, so each component costs one product, written straight into the output.
    """
    co = _coefficients(l_max)
    sqrt2 = math.sqrt(2.0)
    # cos_m[m] + i sin_m[m] = (x + i y)^m, m >= 1.
    cos_m, sin_m = [None, x], [None, y]
    for m in range(2, l_max + 1):
        cos_m.append(x * cos_m[m - 1] - y * sin_m[m - 1])
        sin_m.append(x * sin_m[m - 1] + y * cos_m[m - 1])
    # pbar[l][m] for 0 <= m <= l: a float for l == m (a constant), a tensor otherwise.
    pbar: list[list] = [[None] * (l + 1) for l in range(l_max + 1)]
    for m in range(l_max + 1):
        first = co["start"][m] * (sqrt2 if m else 1.0)
        pbar[m][m] = first
        if m + 1 <= l_max:
            pbar[m + 1][m] = (co["lift"][m] * first) * z
        for l in range(m + 2, l_max + 1):
            older = pbar[l - 2][m]
            older = (co["b"][l, m] * older) * r2 if l - 2 == m else co["b"][l, m] * r2 * older
            pbar[l][m] = co["a"][l, m] * z * pbar[l - 1][m] - older
    parts = []
    for l in range(l_max + 1):
        ps = [(pbar[l][-m], sin_m[-m]) for m in range(-l, 0)]
        ps.append((pbar[l][0], None))
        ps += [(pbar[l][m], cos_m[m]) for m in range(1, l + 1)]
        parts.append(ps)
    return parts
