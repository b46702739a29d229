"""One round of the vector-gated backbone: normalise, send messages along the edges, update the points.

Features are the degree <= 1 dicts of :mod:`._features` (scalars, vectors and, with ``symmetry: se3``,
pseudo-scalars and pseudo-vectors); each block unpacks them into ``s (B, N, S)``, ``v (B, N, V, 3)``,
``p (B, N, V)``, ``a (B, N, V, 3)`` and packs its result the same way. Every operation keeps parity:
maps that touch vectors mix channels only and have no bias; parity-odd quantities are multiplied
only by parity-even weights, or by odd ones when the result is meant to flip (odd x odd = even).
"""

from __future__ import annotations

import torch
from torch import nn
from torch.nn import functional as F

from shapes.backbones._base import masked_mean
from shapes.backbones._equivariant import ChannelMix
from shapes.backbones._features import pack, unpack
from shapes.backbones._vectors import cross, dot, norm
from shapes.geometry import gather_neighbours

__all__ = ["FeatureNorm", "Message", "Update", "VectorGateLayer", "readout", "EPS"]

# Added under square roots so that norms and unit vectors stay differentiable at zero length.
EPS = 1e-8


def vector_norm(v: torch.Tensor) -> torch.Tensor:
    """Length of each vector channel ``v (..., C, 3) -> (..., C)``, smooth at zero."""
    return norm(v, eps=EPS)


class VectorNorm(nn.Module):
    """Equivariant normalisation: divide vectors ``(..., C, 3)`` by their RMS length over channels.

    With ``companion`` (the point's polar vectors, for pseudo-vectors) the RMS is floored by
    ``OddNorm.FLOOR`` times the companion's mean square, for the reason given at :class:`OddNorm`:
    on two mirror planes of a part every pseudo-vector is 0 by symmetry, and the plain ``EPS`` floor
    multiplied the rounding left there by up to 1e4.
    """

    def __init__(self, channels: int):
        super().__init__()
        self.gain = nn.Parameter(torch.ones(channels))

    def forward(self, v: torch.Tensor, companion: torch.Tensor | None = None) -> torch.Tensor:
        square = (v * v).sum(-1).mean(-1, keepdim=True) + EPS  # (..., 1)
        if companion is not None:
            square = square + OddNorm.FLOOR * (companion * companion).sum(-1).mean(-1, keepdim=True)
        return v * (self.gain / torch.sqrt(square)).unsqueeze(-1)


class OddNorm(nn.Module):
    """RMS normalisation of pseudo-scalars ``(..., C)``: no bias and no centring, so the sign flips.

    The RMS is floored by ``FLOOR`` times the mean square of the point's scalars ``s`` (the other
    degree-0 quantities, invariant and even, so the sign of ``p`` still flips with the hand;
    pseudo-vectors are floored by the polar vectors the same way, see :class:`VectorNorm`)::

        p / sqrt(mean p^2 + FLOOR mean s^2 + 1e-6)

    Why: at a point on a mirror plane of the part (a box, a cylinder, any mirror-symmetric patch) every
    pseudo-scalar is 0 by symmetry and what is left is rounding. With only the absolute 1e-6 floor each
    norm multiplied that rounding by up to 1000, and a network normalises them three times: on a box
    lattice the float64 features moved by 1e-7 under rotation (measured). Floored against the scalars
    the gain is at most ``FLOOR ** -0.5`` = 10 per norm relative to the scalar scale, as in the
    harmonic backbone's EquivariantNorm.
    """

    FLOOR = 1e-2

    def __init__(self, channels: int):
        super().__init__()
        self.gain = nn.Parameter(torch.ones(channels))

    def forward(self, p: torch.Tensor, s: torch.Tensor) -> torch.Tensor:
        rms = torch.sqrt((p * p).mean(-1, keepdim=True) + self.FLOOR * (s * s).mean(-1, keepdim=True) + 1e-6)
        return p * (self.gain / rms)


class FeatureNorm(nn.Module):
    """Normalise every kind of channel: LayerNorm on scalars, RMS over channels on the others."""

    def __init__(self, config):
        super().__init__()
        self.handed = config.symmetry == "se3"
        self.s = nn.LayerNorm(config.scalars)
        self.v = VectorNorm(config.vectors)
        if self.handed:
            self.p = OddNorm(config.vectors)
            self.a = VectorNorm(config.vectors)

    def forward(self, x: dict) -> dict:
        s, v, p, a = unpack(x)
        if not self.handed:
            return pack(self.s(s), self.v(v))
        return pack(self.s(s), self.v(v), self.p(p, s), self.a(a, v))


class Message(nn.Module):
    """Messages on the edges, built from invariants, averaged over each receiver's valid neighbours.

    Parity-even edge invariants: the radial basis of the length, the receiver's and the sender's
    scalars, ``v . u`` at both ends with the unit edge direction ``u``, and the channel-wise inner
    products ``v_i . v_j``. Parity-odd ones (handed only): the receiver's ``a . u`` (its
    pseudo-vectors hold cross products, so these are triple products ``(v_a x v_b) . u``), the
    sender's pseudo-scalars (the receiver's own enter at the update) and, for a few mixed channels
    ``q``, the twist ``(q_i x q_j) . u`` of the vectors along the edge. The edge MLP sees the odd ones
    only through products of two odd linear maps, so its hidden layer stays even and still knows
    their relative signs.

    Messages: scalars; vectors along the edge (``r_ij`` times an even weight) and the sender's vectors
    times a per-channel weight; pseudo-scalars (odd invariants times even weights); pseudo-vectors
    along the edge (``r_ij`` times an odd weight). Only the polar vectors travel along the edges, the
    costliest tensors here being (B, N, k, V, 3); pseudo-vectors are rebuilt at each point from cross
    products of what arrived.

    Shape:
        features (s (B, N, S), v (B, N, V, 3), p (B, N, V), a (B, N, V, 3)) -> the same types and shapes.
    """

    def __init__(self, config):
        super().__init__()
        S, V, R = config.scalars, config.vectors, config.num_radial
        self.S, self.V, self.handed = S, V, config.symmetry == "se3"
        self.H = H = S  # edge hidden width: as wide as the scalars it feeds
        self.receiver = nn.Linear(S, H)
        self.sender = nn.Linear(S, H, bias=False)  # applied before the gather: k times cheaper
        self.even = nn.Linear(R + 3 * V + (V if self.handed else 0), H, bias=False)
        # The scalar message is linear in the hidden layer, so it is applied after the average.
        self.scalar = nn.Linear(H, S)
        if self.handed:
            # no bias on anything odd: a bias is parity even
            self.W = min(4, V)  # channels whose twist about the edges is measured
            self.twist = ChannelMix(V, self.W)
            self.odd = nn.Linear(2 * V + self.W, 4 * V, bias=False)
            self.coef = nn.Linear(H, 3 * V)
        else:
            self.coef = nn.Linear(H, 2 * V)

    def forward(self, features: dict, geom) -> dict:
        V, H = self.V, self.H
        x = unpack(features)
        X = torch.cat([x.v, x.a], -2) if self.handed else x.v  # (B, N, C, 3): vectors [, pseudo]
        sj = gather_neighbours(self.sender(x.s), geom.index)  # (B, N, k, H)
        vj = gather_neighbours(x.v, geom.index)  # (B, N, k, V, 3)
        rel = geom.rel  # (B, N, k, 3)
        Xi_u = (X @ rel.transpose(-1, -2)).transpose(-1, -2) * geom.inv_len  # (B, N, k, C)
        vj_u = (vj * rel.unsqueeze(-2)).sum(-1) * geom.inv_len  # (B, N, k, V)
        vivj = (vj * x.v.unsqueeze(2)).sum(-1)  # (B, N, k, V)
        even = [geom.rbf, Xi_u[..., :V], vj_u, vivj]
        if self.handed:
            pj = gather_neighbours(x.p, geom.index)  # (B, N, k, V)
            q = self.twist(x.v)  # (B, N, W, 3): a few mixed vector channels
            qj = gather_neighbours(q, geom.index)  # (B, N, k, W, 3)
            twist = dot(cross(q.unsqueeze(2), qj), rel.unsqueeze(-2)) * geom.inv_len  # (B, N, k, W)
            odd = self.odd(torch.cat([Xi_u[..., V:], pj, twist], -1))  # (B, N, k, 4V), parity odd
            o1, o2, op, cu_a = odd.split([V, V, V, V], -1)
            even.append(o1 * o2)  # odd x odd = even
        pre = self.even(torch.cat(even, -1)) + self.receiver(x.s).unsqueeze(2) + sj  # (B, N, k, H)
        h = F.silu(pre)  # (B, N, k, H), parity even
        w = geom.weight.unsqueeze(-1)  # (B, N, k, 1): masked mean with the envelope
        ms = self.scalar((h * w).sum(2))  # (B, N, S)
        coef = self.coef(h) * w  # (B, N, k, 2V | 3V), parity even
        if self.handed:
            cu_v, cX, gp = coef.split([V, V, V], -1)
            cu = torch.cat([cu_v, cu_a * w], -1)  # (B, N, k, 2V): even weights give v, odd give a
        else:
            cu, cX = coef.split([V, V], -1)
        along = cu.transpose(-1, -2) @ rel  # (B, N, C, 3): sum_j w_ij r_ij per channel
        mv = along[..., :V, :] + (vj * cX.unsqueeze(-1)).sum(2)  # (B, N, V, 3)
        if not self.handed:
            return pack(ms, mv)
        mp = (op * gp).sum(2)  # (B, N, V): odd x even
        return pack(ms, mv, mp, along[..., V:, :])


class Update(nn.Module):
    """Point update: mix vector channels, gate them by a sigmoid of scalars, residual on every kind.

    With handedness, cross products between mixed channel pairs couple the kinds: two vectors give a
    pseudo-vector, a vector and a pseudo-vector give a vector (two pseudo-vectors would give a
    pseudo-vector again: the two signs cancel and the cross product brings its own); ``v_t . a_t``
    gives pseudo-scalars. The inputs are the point's own channels, what arrived, the own
    channels mapped by the cloud's moment ``M`` and the cloud's mean of each channel (global
    context: how this point's directions sit against the whole part). Scalars
    see ``s``, the scalar message, the norms of the new vectors and products of pairs of
    pseudo-scalars; one MLP on them gives the scalar update and the gates.
    """

    def __init__(self, config):
        super().__init__()
        S, V = config.scalars, config.vectors
        self.S, self.V, self.handed = S, V, config.symmetry == "se3"
        n_in = 2 * S + V
        if self.handed:
            self.pair_v = ChannelMix(4 * V, 2 * V)
            self.pair_a = ChannelMix(4 * V, V)
            self.mix_v = ChannelMix(5 * V, V)
            self.mix_a = ChannelMix(5 * V, V)
            self.mix_p = nn.Linear(3 * V, V, bias=False)
            self.odd_pair = nn.Linear(V, 2 * V, bias=False)
            n_in += 2 * V
        else:
            self.mix_v = ChannelMix(4 * V, V)
        self.hidden = nn.Linear(n_in, 2 * S)  # twice as wide as the scalars, as transformer MLPs are
        self.out = nn.Linear(2 * S, S + V + (2 * V if self.handed else 0))

    def forward(self, x: dict, xn: dict, m: dict, geom) -> dict:
        S, V = self.S, self.V
        x, xn, m = unpack(x), unpack(xn), unpack(m)

        def context(v):  # (B, N, C, 3) -> (B, N, 4C, 3): own, arrived, M v, the cloud's mean of v
            return [v, v @ geom.moment, masked_mean(v, geom.mask).unsqueeze(1).expand_as(v)]

        own_v, moment_v, mean_v = context(xn.v)
        vv = torch.cat([own_v, m.v, moment_v, mean_v], -2)  # (B, N, 4V, 3)
        if self.handed:
            own_a, moment_a, mean_a = context(xn.a)
            aa = torch.cat([own_a, m.a, moment_a, mean_a], -2)  # (B, N, 4V, 3)
            w1, w2 = self.pair_v(vv).chunk(2, -2)  # (B, N, V, 3) each
            z = self.pair_a(aa)  # (B, N, V, 3)
            vt = self.mix_v(torch.cat([vv, cross(w2, z)], -2))  # (B, N, V, 3) vector
            at = self.mix_a(torch.cat([aa, cross(w1, w2)], -2))  # (B, N, V, 3) pseudo-vector
            pt = self.mix_p(torch.cat([xn.p, m.p, dot(vt, at)], -1))  # (B, N, V) pseudo-scalar
            q1, q2 = self.odd_pair(pt).chunk(2, -1)
            feats = [xn.s, m.s, vector_norm(vt), vector_norm(at), q1 * q2]
        else:
            vt = self.mix_v(vv)  # (B, N, V, 3)
            feats = [xn.s, m.s, vector_norm(vt)]
        out = self.out(F.silu(self.hidden(torch.cat(feats, -1))))  # (B, N, S + V [+ 2V])
        s = x.s + out[..., :S]
        v = x.v + torch.sigmoid(out[..., S : S + V]).unsqueeze(-1) * vt
        if not self.handed:
            return pack(s, v)
        ga, gp = out[..., S + V :].chunk(2, -1)
        a = x.a + torch.sigmoid(ga).unsqueeze(-1) * at
        p = x.p + torch.sigmoid(gp) * pt  # odd x even: the sign of p_t survives
        return pack(s, v, p, a)


class VectorGateLayer(nn.Module):
    """One round: normalise, send messages along the edges, update the points (pre-norm residual)."""

    def __init__(self, config):
        super().__init__()
        self.norm = FeatureNorm(config)
        self.message = Message(config)
        self.update = Update(config)

    def forward(self, x: dict, geom) -> dict:
        xn = self.norm(x)
        return self.update(x, xn, self.message(xn, geom), geom)


def readout(features: dict) -> torch.Tensor:
    """Invariant per-point features ``(B, N, F/2)``: scalars, vector norms and, if handed,
    pseudo-vector norms and the pseudo-scalars themselves (not squared: their sign is the handedness)."""
    s, v, p, a = unpack(features)
    parts = [s, vector_norm(v)]
    if p is not None:
        parts += [vector_norm(a), p]
    return torch.cat(parts, -1)

