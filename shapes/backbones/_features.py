"""The one vocabulary of equivariant features, shared by every handed backbone.

A feature of type ``(l, p)`` is held per point as a tensor ``(B, N, C, 2l + 1)``: ``C`` channels of
a degree-``l`` quantity with parity ``p = +1`` or ``-1``, the last axis in the order of ``Y_l``
(docs/design.md, "Tensor shapes" and "Spherical harmonics"), so a degree-1 feature stores a vector
as ``(y, z, x)``. A backbone's per-point features are a dict ``{(l, p): tensor}``. Under a rotation
``R`` a feature becomes ``D_l(R) x``; under the inversion ``x -> -x`` it becomes ``p x``; so under
an improper ``Q = -R`` (a reflection is one) it becomes ``p D_l(R) x``. A type with
``p = (-1)^l`` is *proper* (scalar, vector, ...), one with ``p = -(-1)^l`` a *pseudo*-quantity
(pseudo-scalar, pseudo-vector such as a cross product). The four types of degree <= 1 have names:
:data:`SCALAR`, :data:`PSEUDO_SCALAR`, :data:`VECTOR` (a position, a normal) and
:data:`PSEUDO_VECTOR`.

One option switches what a handed backbone may build, ``symmetry`` (:data:`SYMMETRY_OPTIONS`):
``se3`` keeps the parity-odd products (pseudo-quantities reach the readout, so a part and its
mirror image give different features), ``e3`` never forms one (reflection-invariant).
(docs/design.md, "Parity and handedness".)
"""

from __future__ import annotations

import math
from typing import Mapping, NamedTuple

import torch

from shapes._checks import fail, integer
from shapes.backbones._vectors import norm

__all__ = ["FeatureType", "SCALAR", "PSEUDO_SCALAR", "VECTOR", "PSEUDO_VECTOR", "SYMMETRY_OPTIONS", "declared",
           "proper_parity", "type_key", "to_harmonic_order", "parse_channels", "Parts", "pack", "unpack",
           "point_invariants", "invariant_width"]

FeatureType = tuple  # (l, p): degree and parity (+1 or -1)
SCALAR, PSEUDO_SCALAR, VECTOR, PSEUDO_VECTOR = (0, 1), (0, -1), (1, -1), (1, 1)
SYMMETRY_OPTIONS = ("se3", "e3")


def declared(symmetry: str) -> str:
    """The backbone's declared symmetry (``"SE3"``, ``"E3"``) for the option value (``se3``, ``e3``)."""
    return symmetry.upper()


def proper_parity(l: int) -> int:
    """Parity of a proper degree-``l`` quantity (of ``Y_l``): ``(-1)^l``."""
    return 1 if l % 2 == 0 else -1


def type_key(t: FeatureType) -> str:
    """A name for a type usable as a module key: ``(1, -1) -> 'l1_odd'``, ``(1, 1) -> 'l1_even'``."""
    l, p = t
    return f"l{l}_{'even' if p > 0 else 'odd'}"


def to_harmonic_order(v: torch.Tensor) -> torch.Tensor:
    """``(..., 3)`` vectors from ``(x, y, z)`` into the order of ``Y_1``, ``(y, z, x)``: a cyclic
    permutation, so dot, cross and triple products keep their values."""
    return v[..., [1, 2, 0]]


def parse_channels(channels, l_max: int, option: str = "channels") -> dict[int, int]:
    """Validate a degree -> channel-count map; keys may be ints or digit strings (YAML, Hydra).

    Degree 0 and degree ``l_max`` must be present (the first carries the invariants, the second
    gives ``l_max`` its meaning); intermediate degrees may be left out (no features of that degree).
    """
    if not isinstance(channels, Mapping):
        fail(option, "a mapping degree -> channels such as {0: 16, 1: 8, 2: 4}", repr(channels))
    out = {}
    for key, value in channels.items():
        if isinstance(key, str) and key.strip().isdigit():
            key = int(key)
        l = integer(f"{option} key (a degree)", key, low=0, high=l_max)
        out[l] = integer(f"{option}[{l}] (a channel count)", value, low=1)
    for needed in (0, l_max):
        if needed not in out:
            fail(option, f"a map with a channel count for degree {needed} (l_max = {l_max})", f"degrees {sorted(out)}")
    return dict(sorted(out.items()))


def pack(s: torch.Tensor, v: torch.Tensor, p: torch.Tensor | None = None, a: torch.Tensor | None = None) -> dict:
    """Features of degree <= 1 as a dict: scalars ``s (B, N, S)``, vectors ``v (B, N, V, 3)``, and
    when handed pseudo-scalars ``p (B, N, P)`` and pseudo-vectors ``a (B, N, A, 3)``."""
    x = {SCALAR: s.unsqueeze(-1)}
    if p is not None:
        x[PSEUDO_SCALAR] = p.unsqueeze(-1)
    x[VECTOR] = v
    if a is not None:
        x[PSEUDO_VECTOR] = a
    return x


class Parts(NamedTuple):
    """The degree <= 1 features of :func:`pack` by name; ``p`` and ``a`` are None without handedness."""

    s: torch.Tensor
    v: torch.Tensor
    p: torch.Tensor | None
    a: torch.Tensor | None


def unpack(x: dict) -> Parts:
    """The :class:`Parts` of a dict made by :func:`pack`."""
    p = x.get(PSEUDO_SCALAR)
    return Parts(x[SCALAR][..., 0], x[VECTOR], None if p is None else p[..., 0], x.get(PSEUDO_VECTOR))


def invariant_width(types: dict) -> int:
    """Width of :func:`point_invariants` for the given types."""
    width = 0
    for (l, p), c in types.items():
        width += c  # scalars and pseudo-scalars as they are, norms of the rest
        if l > 0 and p == proper_parity(l) and (l, -p) in types:
            width += min(c, types[(l, -p)])
    return width


def point_invariants(x: dict, types: dict) -> torch.Tensor:
    """Per-point invariants ``(B, N, F)`` of a feature dict.

    - proper scalars and pseudo-scalars as they are: a pseudo-scalar changes sign under a
      reflection, so keeping it (not its square) keeps handedness visible;
    - the norm of every channel of degree ``l > 0``: rotation- and reflection-invariant;
    - for ``l > 0`` with both parities present, the channel-wise dot product of the proper and the
      pseudo feature over ``sqrt(2l + 1)``: a pseudo-scalar.
    """
    parts = []
    for t in types:
        l, p = t
        v = x[t]
        if l == 0:
            parts.append(v.squeeze(-1))
        else:
            parts.append(norm(v))  # (B, N, C)
            if p == proper_parity(l) and (l, -p) in types:
                c = min(types[t], types[(l, -p)])
                parts.append((v[:, :, :c] * x[(l, -p)][:, :, :c]).sum(-1) / math.sqrt(2 * l + 1))
    return torch.cat(parts, -1)  # (B, N, F)
