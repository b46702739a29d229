"""Real Clebsch-Gordan coupling coefficients, exact and cached.

``C = clebsch_gordan(l1, l2, l3)`` has shape ``(2l1+1, 2l2+1, 2l3+1)`` in the real harmonic basis
of :func:`spherical_harmonics` and commutes with rotations (and with reflections, up to the
parity sign ``(-1)^(l1+l2+l3)``)::

    einsum("abc,a,b->c", C, D_l1 @ a, D_l2 @ b) == D_l3 @ einsum("abc,a,b->c", C, a, b)

Construction. The complex table ``<l1 m1 l2 m2 | l3 m3>`` comes from Racah's formula in exact
rational arithmetic; it is carried into the real basis with the unitary ``U_l`` for which
``Y_real = U_l Y_complex``::

    T[a, b, c] = sum conj(U_l1[a, m1]) conj(U_l2[b, m2]) U_l3[c, m3] <l1 m1 l2 m2 | l3 m3>

``T`` is real when ``l1 + l2 + l3`` is even and purely imaginary when it is odd. Sign
convention: ``C = Re T`` (even) or ``C = Im T`` (odd), i.e. ``C = (-i)^((l1+l2+l3) mod 2) T``.

Normalisation: orthonormal columns, ``sum_{a, b} C[a, b, c] C[a, b, c'] = delta(c, c')`` (the
unitary CG matrix stays unitary in the real basis), so the sum of all squares is ``2 l3 + 1``.
Outside the triangle rule ``|l1 - l2| <= l3 <= l1 + l2`` the tensor is all zeros.

Examples, with degree-1 vectors in the ``(y, z, x)`` order: ``1 x 1 -> 1`` is
``+(a x b) / sqrt(2)`` (a pseudo-vector: odd ``l1 + l2 + l3``) and ``1 x 1 -> 0`` is ``-(a . b) / sqrt(3)``.
"""

from __future__ import annotations

import functools
import math
from fractions import Fraction

import numpy as np
import torch

from shapes.geometry._checks import check_degree
from shapes.geometry._harmonics import L_MAX

__all__ = ["clebsch_gordan", "complex_clebsch_gordan", "real_basis_change"]


def _check_degree(l, name: str) -> int:
    return check_degree(l, name, L_MAX)


def complex_clebsch_gordan(j1: int, m1: int, j2: int, m2: int, j3: int, m3: int) -> float:
    """The complex-basis coefficient ``<j1 m1 j2 m2 | j3 m3>`` (Condon-Shortley convention).

    Racah's formula, evaluated exactly with rationals and rounded once at the end. Zero when
    ``m1 + m2 != m3``, when an order exceeds its degree, or outside the triangle rule.
    """
    if m1 + m2 != m3 or abs(m1) > j1 or abs(m2) > j2 or abs(m3) > j3 or not abs(j1 - j2) <= j3 <= j1 + j2:
        return 0.0
    f = math.factorial
    pre = Fraction((2 * j3 + 1) * f(j3 + j1 - j2) * f(j3 - j1 + j2) * f(j1 + j2 - j3), f(j1 + j2 + j3 + 1))
    pre *= f(j3 + m3) * f(j3 - m3) * f(j1 - m1) * f(j1 + m1) * f(j2 - m2) * f(j2 + m2)
    total = Fraction(0)
    for k in range(j1 + j2 + j3 + 1):
        args = (k, j1 + j2 - j3 - k, j1 - m1 - k, j2 + m2 - k, j3 - j2 + m1 + k, j3 - j1 - m2 + k)
        if min(args) < 0:
            continue
        total += Fraction((-1) ** k, math.prod(f(a) for a in args))
    # value = sign(total) * sqrt(pre * total^2), the square root taken once in float64.
    return math.copysign(math.sqrt(float(pre * total * total)), total)


@functools.lru_cache(maxsize=None)
def _real_basis_change(l: int) -> np.ndarray:
    u = np.zeros((2 * l + 1, 2 * l + 1), dtype=np.complex128)
    s = 1 / math.sqrt(2)
    u[l, l] = 1
    for m in range(1, l + 1):
        # Y_{l,m} = ((-1)^m Y^m + Y^-m)/sqrt 2 and Y_{l,-m} = i (Y^-m - (-1)^m Y^m)/sqrt 2
        u[l + m, l + m] = (-1) ** m * s
        u[l + m, l - m] = s
        u[l - m, l - m] = 1j * s
        u[l - m, l + m] = -1j * (-1) ** m * s
    u.setflags(write=False)
    return u


def real_basis_change(l: int) -> np.ndarray:
    """The unitary ``U (2l+1, 2l+1) complex128`` with ``Y_real = U @ Y_complex`` (rows and columns at ``m + l``)."""
    return _real_basis_change(_check_degree(l, "l")).copy()


@functools.lru_cache(maxsize=None)
def _master(l1: int, l2: int, l3: int) -> np.ndarray:
    """float64 master copy of the real coupling tensor (read-only, cached for the process)."""
    shape = (2 * l1 + 1, 2 * l2 + 1, 2 * l3 + 1)
    if not abs(l1 - l2) <= l3 <= l1 + l2:
        out = np.zeros(shape)
        out.setflags(write=False)
        return out
    table = np.zeros(shape)
    for m1 in range(-l1, l1 + 1):
        for m2 in range(-l2, l2 + 1):
            m3 = m1 + m2
            if abs(m3) <= l3:
                table[m1 + l1, m2 + l2, m3 + l3] = complex_clebsch_gordan(l1, m1, l2, m2, l3, m3)
    u1, u2, u3 = (_real_basis_change(l) for l in (l1, l2, l3))
    t = np.einsum("am,bn,cp,mnp->abc", u1.conj(), u2.conj(), u3, table)  # (2l1+1, 2l2+1, 2l3+1)
    odd = (l1 + l2 + l3) % 2 == 1
    out, rest = (t.imag, t.real) if odd else (t.real, t.imag)
    assert np.abs(rest).max() < 1e-12, "the real image of a CG table has a single phase"
    out = np.where(np.abs(out) < 1e-15, 0.0, out)  # exact zeros where the table has them
    out.setflags(write=False)
    return out


def clebsch_gordan(l1: int, l2: int, l3: int, dtype=torch.float64, device=None) -> torch.Tensor:
    """Real coupling tensor ``l1 x l2 -> l3`` (conventions in the module docstring).

    Parameters
    ----------
    l1, l2, l3 : int
        Degrees in ``[0, L_MAX]``.
    dtype, device
        Of the returned tensor; the coefficients are computed once in float64 and cached.

    Returns
    -------
    (2l1+1, 2l2+1, 2l3+1) float
        Zero when the triangle rule ``|l1 - l2| <= l3 <= l1 + l2`` fails.
    """
    l1, l2, l3 = (_check_degree(l, n) for l, n in ((l1, "l1"), (l2, "l2"), (l3, "l3")))
    return torch.tensor(_master(l1, l2, l3), dtype=dtype, device=device)
