"""Equivariant layers shared by the handed backbones, on the feature dicts of :mod:`._features`.

Channel mixing per type (:class:`EquivariantLinear`, :class:`ChannelMix`), a norm that keeps every
type (:class:`EquivariantNorm`), a gated point-wise MLP (:class:`GatedFeedForward`), the invariants of
a cloud's mean vectors (:class:`GlobalVectorReadout`) and the two attention softmaxes. Each one
commutes with rotations and keeps parity: it mixes channels, never the ``2l + 1`` components, puts a
bias only on proper scalars and multiplies other types only by proper scalars.
"""

from __future__ import annotations

import math

import torch
from torch import nn

from shapes.backbones._features import SCALAR, type_key
from shapes.backbones._vectors import cross

__all__ = ["ChannelMix", "EquivariantLinear", "EquivariantNorm", "GatedFeedForward", "GlobalVectorReadout",
           "masked_softmax", "weighted_softmax"]


class ChannelMix(nn.Module):
    """Linear map over the channel axis of one type, ``(..., C_in, m) -> (..., C_out, m)``.

    No bias and no mixing of the components: it commutes with every orthogonal map, and a
    pseudo-vector input stays a pseudo-vector (never mix vectors and pseudo-vectors in one map).
    """

    def __init__(self, c_in: int, c_out: int):
        super().__init__()
        self.linear = nn.Linear(c_in, c_out, bias=False)

    def forward(self, v: torch.Tensor) -> torch.Tensor:
        return self.linear(v.transpose(-1, -2)).transpose(-1, -2)  # (..., C_out, m)


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
        self.bias = nn.Parameter(torch.zeros(types_out[SCALAR])) if SCALAR in types_out else None

    def forward(self, x: dict) -> dict:
        out = {}
        for t in self.types_out:
            y = torch.einsum("oc,bncm->bnom", self.weight[type_key(t)], x[t])  # (B, N, C_out, 2l+1)
            if t == SCALAR and self.bias is not None:
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
    (float32 rotation change ~1e-5 instead of ~1e-3, while a helix and its mirror image still differ
    by ~50% at initialisation).
    """

    def __init__(self, types: dict, eps: float = 1e-6, floor: float = 1e-2):
        super().__init__()
        self.types = dict(types)
        self.eps = eps
        self.floor = floor
        self.scale = nn.ParameterDict({type_key(t): nn.Parameter(torch.ones(c)) for t, c in types.items() if t != SCALAR})
        self.scalar = nn.LayerNorm(types[SCALAR], eps=eps) if SCALAR in types else None

    def forward(self, x: dict) -> dict:
        _check_types(x, self.types)
        square_sum, count = {}, {}
        for (l, _), v in x.items():
            square_sum[l] = square_sum.get(l, 0) + v.square().sum((-2, -1), keepdim=True)  # (B, N, 1, 1)
            count[l] = count.get(l, 0) + v.shape[-2] * v.shape[-1]
        out = {}
        for t, v in x.items():
            if t == SCALAR:
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
        assert SCALAR in types, "gates are computed from proper scalars"
        self.types = dict(types)
        self.gated = [t for t in types if t != SCALAR]
        self.num_gates = sum(types[t] for t in self.gated)
        wide = dict(types)
        wide[SCALAR] = types[SCALAR] + self.num_gates  # the scalar block also emits one gate per gated channel
        self.expand = EquivariantLinear(types, wide)
        self.contract = EquivariantLinear(types, types)

    def forward(self, x: dict) -> dict:
        y = self.expand(x)
        c0 = self.types[SCALAR]
        scalars, gates = y[SCALAR][:, :, :c0], torch.sigmoid(y[SCALAR][:, :, c0:])  # (B, N, C, 1)
        h = {SCALAR: nn.functional.silu(scalars)}
        start = 0
        for t in self.gated:
            c = self.types[t]
            h[t] = y[t] * gates[:, :, start : start + c]
            start += c
        return self.contract(h)


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
            parts.append((cross(a, b) * c).sum(-1) / scale**1.5)
        return torch.cat(parts, -1)  # (B, width)
