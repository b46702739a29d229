"""Equivariant building blocks: feature types with parity, coupling paths, norms, gates, readout.

Feature types
-------------
A feature of type ``(l, p)`` is held per point as a tensor ``(B, N, C, 2l + 1)``: ``C`` channels
of a degree-``l`` quantity with parity ``p = +1`` or ``-1``. Under a proper rotation ``R`` it
becomes ``D_l(R) x``; under the inversion ``x -> -x`` it becomes ``p x``; so under an improper
``Q = -R`` (a reflection is one) it becomes ``p D_l(R) x``. The spherical harmonic ``Y_l`` of a
vector has parity ``(-1)^l``; a type with ``p = (-1)^l`` is *proper* (scalar, vector, ...), one
with ``p = -(-1)^l`` is a *pseudo*-quantity (pseudo-scalar, pseudovector such as a cross product).

Paths
-----
A filter maps a sender feature of type ``(l_in, p_in)`` through the harmonic ``Y_{l_f}`` of the
edge direction to degree ``l_out`` with the coupling coefficients ``C[l_in, l_f -> l_out]``. The
output parity is ``p_in (-1)^{l_f}``: the coupling tensor commutes with rotations and the
inversion acts on each factor separately. From a proper input the output is proper exactly when
``l_in + l_f + l_out`` is even. Parity mode ``"full"`` keeps every path (pseudo-quantities are
tracked as their own types); mode ``"even"`` keeps only the paths between proper types, so no
pseudo-quantity ever appears and every invariant is also reflection-invariant.

Conventions as in docs/design.md ("Rotations", "Spherical harmonics", "Wigner-D", "Parity and
handedness"): ``x' = R x``, real orthonormal harmonics with ``m`` at ``m + l``,
``Y_l(R v) = D_l(R) Y_l(v)``.
"""

from __future__ import annotations

import math
import operator
from typing import Mapping, NamedTuple

import torch
from torch import nn

from shapes.errors import ConfigError

__all__ = [
    "FeatureType",
    "PARITY_MODES",
    "proper_parity",
    "type_key",
    "parse_channels",
    "Path",
    "angular_pairs",
    "layer_paths",
    "coupling_matrix",
    "masked_softmax",
    "weighted_softmax",
    "safe_norm",
    "EquivariantLinear",
    "EquivariantNorm",
    "GatedFeedForward",
    "GlobalVectorReadout",
    "point_invariants",
    "invariant_width",
]

FeatureType = tuple  # (l, p): degree and parity (+1 or -1)
PARITY_MODES = ("full", "even")


def proper_parity(l: int) -> int:
    """Parity of a proper degree-``l`` quantity (of ``Y_l``): ``(-1)^l``."""
    return 1 if l % 2 == 0 else -1


def type_key(t: FeatureType) -> str:
    """A name for a type usable as a module key: ``(1, -1) -> 'l1_odd'``, ``(1, 1) -> 'l1_even'``."""
    l, p = t
    return f"l{l}_{'even' if p > 0 else 'odd'}"


def _as_int(value, what: str) -> int:
    # YAML/Hydra may deliver "2" for a key; a float like 2.5 must not be silently truncated.
    if isinstance(value, str) and value.strip().lstrip("-").isdigit():
        return int(value)
    try:
        if isinstance(value, bool):
            raise TypeError
        return operator.index(value)
    except TypeError:
        raise ConfigError(f"{what} should be an integer, got {value!r} instead.") from None


def parse_channels(channels, l_max: int, option: str = "channels") -> dict[int, int]:
    """Validate a degree -> channel-count map; keys may be ints or digit strings.

    Degree 0 and degree ``l_max`` must be present (the first carries the invariants, the second
    gives ``l_max`` its meaning); intermediate degrees may be left out (no features of that degree).
    """
    if not isinstance(channels, Mapping):
        raise ConfigError(
            f"{option} should be a mapping degree -> channels such as {{0: 16, 1: 8, 2: 4}}, got {channels!r} instead."
        )
    out = {}
    for key, value in channels.items():
        l = _as_int(key, f"{option} key (a degree)")
        c = _as_int(value, f"{option}[{l}] (a channel count)")
        if not 0 <= l <= l_max:
            raise ConfigError(f"{option} has degree {l}, expected degrees 0..l_max = 0..{l_max}.")
        if c < 1:
            raise ConfigError(f"{option}[{l}] should be a positive channel count, got {c}.")
        out[l] = c
    for needed in (0, l_max):
        if needed not in out:
            raise ConfigError(
                f"{option} should give a channel count for degree {needed} (l_max = {l_max}), got degrees {sorted(out)}."
            )
    return dict(sorted(out.items()))


class Path(NamedTuple):
    """One filter path: sender type ``t_in`` through harmonic degree ``l_f`` into type ``t_out``."""

    t_in: FeatureType
    l_f: int
    t_out: FeatureType


def angular_pairs(l_in: int, degrees, parity: str) -> list[tuple[int, int]]:
    """The ``(l_f, l_out)`` pairs a degree-``l_in`` input couples to, in a fixed order.

    Every ``l_out`` in ``degrees`` and every ``l_f`` in the triangle ``|l_in - l_out| <= l_f <= l_in + l_out``;
    in ``"even"`` mode only the pairs with ``l_in + l_f + l_out`` even (proper in, proper out).
    The same list, in the same order, fixes the columns of the shared per-edge angular basis.
    """
    pairs = []
    for l_out in degrees:
        for l_f in range(abs(l_in - l_out), l_in + l_out + 1):
            if parity == "even" and (l_in + l_f + l_out) % 2:
                continue
            pairs.append((l_f, l_out))
    return pairs


def layer_paths(types_in, degrees, parity: str) -> list[Path]:
    """All paths from the given input types, in the order of :func:`angular_pairs` per input type."""
    paths = []
    for t_in in types_in:
        l_in, p_in = t_in
        for l_f, l_out in angular_pairs(l_in, degrees, parity):
            paths.append(Path(t_in, l_f, (l_out, p_in * proper_parity(l_f))))
    return paths


def coupling_matrix(l_in: int, pairs, l_f_max: int, cg, dtype, device) -> torch.Tensor:
    """Dense matrix turning the concatenated harmonics of an edge into its angular basis for ``l_in``.

    ``Y_cat (E, (l_f_max+1)^2) @ M`` gives, for every edge, ``(2 l_in + 1) * W`` numbers, read as
    ``(2 l_in + 1, W)`` with ``W = sum over pairs of (2 l_out + 1)``; block ``(l_f, l_out)`` is
    ``B[m_in, m_out] = sum_{m_f} C[l_in, l_f -> l_out][m_in, m_f, m_out] Y_{l_f, m_f}``.

    Parameters
    ----------
    cg : callable
        ``cg(l1, l2, l3, dtype, device) -> (2l1+1, 2l2+1, 2l3+1)`` coupling coefficients.

    Returns
    -------
    ((l_f_max + 1)^2, (2 l_in + 1) * W) float
    """
    d_in = 2 * l_in + 1
    width = sum(2 * l_out + 1 for _, l_out in pairs)
    m = torch.zeros((l_f_max + 1) ** 2, d_in, width, dtype=dtype, device=device)
    col = 0
    for l_f, l_out in pairs:
        c = cg(l_in, l_f, l_out, dtype=dtype, device=device)  # (2l_in+1, 2l_f+1, 2l_out+1)
        rows = slice(l_f * l_f, (l_f + 1) ** 2)
        m[rows, :, col : col + 2 * l_out + 1] = c.permute(1, 0, 2)
        col += 2 * l_out + 1
    return m.reshape((l_f_max + 1) ** 2, d_in * width)  # (F, (2l_in+1) W)


def masked_softmax(logits: torch.Tensor, valid: torch.Tensor, dim: int) -> torch.Tensor:
    """Softmax over ``dim`` counting only ``valid`` entries; an all-invalid slice gives zeros.

    The maximum is subtracted first (stable for any logit size); invalid entries never reach
    ``exp`` as finite numbers, so neither the value nor the gradient can be NaN.
    """
    z = logits.masked_fill(~valid, -math.inf)
    top = z.amax(dim, keepdim=True).detach()
    top = torch.where(torch.isfinite(top), top, torch.zeros_like(top))
    e = torch.exp(z - top)  # exactly 0 at invalid entries
    return e / e.sum(dim, keepdim=True).clamp_min(torch.finfo(e.dtype).tiny)


def weighted_softmax(logits: torch.Tensor, weight: torch.Tensor, dim: int, own_weight: bool = True) -> torch.Tensor:
    """Softmax over ``dim`` in which entry ``j`` counts ``weight_j >= 0`` times, faded out with the weights.

    ``a_j = w_j exp(l_j) / sum_k w_k exp(l_k) * min(1, sum_k w_k)``: an entry of weight 0 takes no
    part at all (neither in its own share nor in the others' normalisation), so an entry entering
    with weight 0 changes nothing, and the result is continuous in the weights and the logits even
    where every weight goes to 0 (the last factor, 1 unless the total weight is below 1, brings the
    shares down to 0 with it instead of leaving them normalised). Entries of weight 0 get value and
    gradient 0, never NaN; the maximum over the weighted entries is subtracted first for stability.

    ``own_weight=False`` leaves out the leading ``w_j`` (0 still where ``w_j = 0``), for values that
    already carry their weight: ``a_j v_j`` is then the same as with ``own_weight=True`` and ``v_j / w_j``.
    """
    positive = weight > 0
    z = logits.masked_fill(~positive, -math.inf)
    top = z.amax(dim, keepdim=True).detach()
    top = torch.where(torch.isfinite(top), top, torch.zeros_like(top))
    e = torch.exp(z - top)  # exactly 0 where the weight is 0
    we = e * weight
    scale = weight.sum(dim, keepdim=True).clamp(max=1.0) / we.sum(dim, keepdim=True).clamp_min(torch.finfo(e.dtype).tiny)
    return (we if own_weight else e) * scale


def safe_norm(x: torch.Tensor, dim: int = -1, eps: float = 1e-12) -> torch.Tensor:
    """Euclidean norm along ``dim`` with a finite gradient at zero: ``sqrt(|x|^2 + eps)``."""
    return torch.sqrt(x.square().sum(dim) + eps)


def _check_types(features: dict, types) -> None:
    assert set(features) == set(types), f"feature types {sorted(features)} != expected {sorted(types)}"


class EquivariantLinear(nn.Module):
    """Channel mixing per type, ``y_t = W_t x_t``; a bias only on proper scalars (0, +1).

    Mixing channels never mixes the ``2l + 1`` components, so it commutes with every ``D_l`` and
    keeps parity. Types present in ``types_out`` but not in ``types_in`` are not allowed.

    Shape:
        {t: (B, N, C_in[t], 2l+1)} -> {t: (B, N, C_out[t], 2l+1)}
    """

    def __init__(self, types_in: dict, types_out: dict):
        super().__init__()
        missing = set(types_out) - set(types_in)
        assert not missing, f"no input for output types {sorted(missing)}"
        self.types_out = dict(types_out)
        self.weight = nn.ParameterDict()
        for t, c_out in types_out.items():
            c_in = types_in[t]
            self.weight[type_key(t)] = nn.Parameter(torch.randn(c_out, c_in) / math.sqrt(c_in))
        self.bias = nn.Parameter(torch.zeros(types_out[(0, 1)])) if (0, 1) in types_out else None

    def forward(self, x: dict) -> dict:
        out = {}
        for t in self.types_out:
            y = torch.einsum("oc,bncm->bnom", self.weight[type_key(t)], x[t])  # (B, N, C_out, 2l+1)
            if t == (0, 1) and self.bias is not None:
                y = y + self.bias[:, None]
            out[t] = y
        return out


class EquivariantNorm(nn.Module):
    """Layer norm per type that commutes with rotations and keeps parity.

    Proper scalars get an ordinary layer norm over channels (scale and bias). Every other type is
    divided by an invariant RMS and scaled per channel; no bias and no mean subtraction, which
    would break equivariance. The RMS is the type's own, over channels and components, plus a floor
    of ``floor`` times the mean square of its whole degree (both parities)::

        x_t / sqrt(mean_t x^2 + floor * mean_l x^2 + eps)

    Why the floor: pseudo-quantities start small (a pseudovector is a curl-like, second-order
    quantity), so they need their own normalisation to be heard; but where a neighbourhood is
    nearly mirror-symmetric all pseudo channels vanish at once, and a pure per-type RMS would blow
    rounding noise up to O(1) features. ``floor = 1e-2`` caps that gain at 10x the degree's scale
    (float32 rotation error ~1e-5 instead of ~1e-3, while a helix and its mirror image still differ
    by ~50% at initialisation).
    """

    def __init__(self, types: dict, eps: float = 1e-6, floor: float = 1e-2):
        super().__init__()
        self.types = dict(types)
        self.eps = eps
        self.floor = floor
        self.scale = nn.ParameterDict({type_key(t): nn.Parameter(torch.ones(c)) for t, c in types.items() if t != (0, 1)})
        self.scalar = nn.LayerNorm(types[(0, 1)], eps=eps) if (0, 1) in types else None

    def forward(self, x: dict) -> dict:
        _check_types(x, self.types)
        square_sum, count = {}, {}
        for (l, _), v in x.items():
            square_sum[l] = square_sum.get(l, 0) + v.square().sum((-2, -1), keepdim=True)  # (B, N, 1, 1)
            count[l] = count.get(l, 0) + v.shape[-2] * v.shape[-1]
        out = {}
        for t, v in x.items():
            if t == (0, 1):
                out[t] = self.scalar(v.squeeze(-1)).unsqueeze(-1)  # (B, N, C, 1)
            else:
                own = v.square().mean((-2, -1), keepdim=True)  # (B, N, 1, 1)
                rms = torch.sqrt(own + self.floor * square_sum[t[0]] / count[t[0]] + self.eps)
                out[t] = v / rms * self.scale[type_key(t)][:, None]
        return out


class GatedFeedForward(nn.Module):
    """Point-wise equivariant MLP: mix, gate, mix.

    Proper scalars pass through SiLU; every other channel (pseudo-scalars included) is multiplied
    by the sigmoid of its own gate, a proper scalar computed from the proper scalars. A gate is
    an invariant of both rotations and reflections, so gating keeps each type and its parity.

    Shape:
        {t: (B, N, C[t], 2l+1)} -> same
    """

    def __init__(self, types: dict):
        super().__init__()
        assert (0, 1) in types, "gates are computed from proper scalars"
        self.types = dict(types)
        self.gated = [t for t in types if t != (0, 1)]
        self.num_gates = sum(types[t] for t in self.gated)
        wide = dict(types)
        wide[(0, 1)] = types[(0, 1)] + self.num_gates  # the scalar block also emits one gate per gated channel
        self.expand = EquivariantLinear(types, wide)
        self.contract = EquivariantLinear(types, types)

    def forward(self, x: dict) -> dict:
        y = self.expand(x)
        c0 = self.types[(0, 1)]
        scalars, gates = y[(0, 1)][:, :, :c0], torch.sigmoid(y[(0, 1)][:, :, c0:])  # (B, N, C, 1)
        h = {(0, 1): nn.functional.silu(scalars)}
        start = 0
        for t in self.gated:
            c = self.types[t]
            h[t] = y[t] * gates[:, :, start : start + c]
            start += c
        return self.contract(h)


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

    - proper scalars (0, +1) and pseudo-scalars (0, -1) as they are: a pseudo-scalar changes
      sign under a reflection, so keeping it (not its square) keeps handedness visible;
    - the norm of every channel of degree ``l > 0``: rotation- and reflection-invariant;
    - for ``l > 0`` with both parities present, the channel-wise dot product of the proper and the
      pseudo feature divided by ``sqrt(2l + 1)``: a pseudo-scalar available two hops after the input.
    """
    parts = []
    for t in types:
        l, p = t
        v = x[t]
        if l == 0:
            parts.append(v.squeeze(-1))
        else:
            parts.append(safe_norm(v))  # (B, N, C)
            if p == proper_parity(l) and (l, -p) in types:
                c = min(types[t], types[(l, -p)])
                parts.append((v[:, :, :c] * x[(l, -p)][:, :, :c]).sum(-1) / math.sqrt(2 * l + 1))
    return torch.cat(parts, -1)  # (B, N, F)


class GlobalVectorReadout(nn.Module):
    """Invariants of a cloud's mean polar vectors: dot products and, if ``chiral``, triple products.

    Three learned channel mixings ``a = W_a g``, ``b = W_b g``, ``c = W_c g`` of the pooled polar
    vectors ``g (B, C, 3)`` (type ``(1, -1)``: ``g -> Q g`` for every orthogonal ``Q``) give, per
    output channel, the proper scalar ``a . b / s`` and the pseudo-scalar
    ``det[a, b, c] / s^(3/2)`` (``det[Qa, Qb, Qc] = det Q det[a, b, c]``), with
    ``s = mean_C |g|^2 + floor``. Components are stored in the order ``(y, z, x)``, a cyclic
    permutation of ``(x, y, z)``, which leaves cross and triple products unchanged. The floor keeps a
    mirror-symmetric cloud, whose pooled vectors are rounding noise, from amplifying that noise.

    Shape:
        (B, C, 3) -> (B, width) with ``width = C`` (dot products), ``2 C`` if chiral
    """

    def __init__(self, channels: int, chiral: bool, floor: float = 1e-2):
        super().__init__()
        self.chiral = chiral
        self.floor = floor
        self.mix = nn.Linear(channels, 3 * channels, bias=False)  # a bias would not be a vector
        self.width = channels * (2 if chiral else 1)

    def forward(self, g: torch.Tensor) -> torch.Tensor:
        scale = g.square().sum(-1).mean(-1, keepdim=True) + self.floor  # (B, 1)
        a, b, c = self.mix(g.transpose(-1, -2)).transpose(-1, -2).chunk(3, dim=1)  # (B, C, 3) each
        parts = [(a * b).sum(-1) / scale]
        if self.chiral:
            parts.append((torch.linalg.cross(a, b) * c).sum(-1) / scale**1.5)
        return torch.cat(parts, -1)  # (B, width)
