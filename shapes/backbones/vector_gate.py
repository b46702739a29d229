"""Vector-gated graph network: scalar and vector channels per point, messages on a neighbour graph.

Each point carries scalar channels ``s (B, N, S)`` and vector channels ``v (B, N, V, 3)``. With
``handedness`` it also carries pseudo-scalars ``p (B, N, V)`` and pseudo-vectors
``a (B, N, V, 3)``. Under an orthogonal map ``x -> Q x`` (det Q = +-1) the channels transform as::

    s -> s,   v -> Q v,   p -> det(Q) p,   a -> det(Q) Q a

Every operation keeps that parity: linear maps that touch vectors mix channels only (never x, y, z)
and have no bias; parity-odd quantities are multiplied only by parity-even weights, or by odd ones
when the result is meant to flip (odd x odd = even); the cross product of two vectors is a
pseudo-vector and a triple product is a pseudo-scalar. Rotations (det Q = +1) therefore leave every
readout feature unchanged. A reflection flips the sign of the pseudo-scalars in the readout, which is
how the network tells a left-hand part from its right-hand twin. With ``handedness=False`` nothing
parity-odd is ever formed, so the features are invariant to reflections as well (symmetry ``E3``).

Points rotate as ``points @ R.T`` (column-vector convention, ``x' = R x``), and vector channels
rotate the same way: ``v @ R.T``.

The construction follows the published idea of vector-valued features handled by linear maps, norms
and inner products (E(n)-equivariant graph networks, geometric vector perceptrons, vector neurons),
extended with cross and triple products so that handedness is not lost.
"""

from __future__ import annotations

import dataclasses
import math
from typing import NamedTuple

import torch
from torch import nn
from torch.nn import functional as F

from shapes.backbones._base import Backbone, check_normals, check_points, masked_max, masked_mean, neighbourhood
from shapes.errors import ConfigError, InputError
from shapes.geometry import gather_neighbours, relative_vectors

__all__ = ["VectorGateBackbone", "VectorGateConfig", "PointFeatures"]

# With cutoff=None, lengths are divided by this many mean neighbour distances of the cloud: the
# k-th neighbour of a surface sample lies at about 1.5 mean neighbour distances, so 3 keeps nearly
# every kNN edge inside the envelope while still letting the far ones fade out smoothly.
_RELATIVE_CUTOFF = 3.0
# Added under square roots so that norms and unit vectors stay differentiable at zero length.
_EPS = 1e-8
# Floor of the lengths that cosines and normalised triple products divide by. The embedding's vectors
# are in units of L (a few neighbour distances); where one vanishes by symmetry (the mean edge vector
# inside a flat lattice patch) what is left is rounding, and dividing by a floor of 1e-4 L (_EPS)
# multiplied it by ~1e4. 1e-3 L keeps that gain 10x lower (measured, float64, box lattice, handedness
# off: features moved by 2e-12 under rotation, 2e-13 with this floor) and is far below real curvature.
_DIRECTION_EPS = 1e-6


@dataclasses.dataclass
class VectorGateConfig:
    scalars: int = 32  # scalar channels per point: enough for ~20 part classes, cheap on CPU
    vectors: int = 8  # vector channels (as many pseudo channels when handed); 16 cost 1.5x, no gain seen
    layers: int = 2  # rounds: pseudo-scalars exist from the embedding on, and the cloud's moment and
    # mean vectors give global context, so 2 rounds did as well as 3 in a 10-minute budget (measured)
    k: int = 12  # neighbours: at 512 points a patch that resolves coil hand; 16 costs 1.3x per edge set
    radius: float | None = None  # None: kNN graph (adapts to point density); a float: ball query
    num_radial: int = 8  # Gaussian radial basis functions: smooth resolution of the edge length
    cutoff: float | None = None  # None: lengths in units of the cloud's mean neighbour distance
    handedness: bool = True  # keep cross/triple products so mirror twins can be told apart
    normals: bool = False  # also take unit outward surface normals (B, N, 3): they show the tilt of
    # thread flanks and helical teeth that a few hundred points cannot (False: bare points suffice)
    signed_normals: bool = False  # False: a normal counts as an axis (n and -n alike; see Embedding), so a
    # scan whose estimated normals came out turned inward reads as the same part, not as its mirror twin
    smooth_neighbours: bool = True  # taper the k neighbours to weight 0 at the (k+1)-th one's distance (and at
    # radius): scans lie on a lattice, neighbours tie, and a hard kNN set let rounding pick which tied point
    # counted (logits moved 4e-2 under rotation in float32); False: the old hard graph


class PointFeatures(NamedTuple):
    """Per-point features after one layer; ``p`` and ``a`` are None without handedness.

    s : (B, N, S) scalars, v : (B, N, V, 3) vectors, p : (B, N, V) pseudo-scalars,
    a : (B, N, V, 3) pseudo-vectors.
    """

    s: torch.Tensor
    v: torch.Tensor
    p: torch.Tensor | None
    a: torch.Tensor | None


class EdgeGeometry(NamedTuple):
    """What every layer needs about the graph, built once per forward pass and shared by all layers.

    index (B, N, k) senders; mean (B, N, k) each edge's neighbourhood weight (the taper of
    :func:`shapes.geometry.smooth_graph`, or 1 on valid edges with ``smooth_neighbours: false``) over
    the receiver's total weight (floored at 1), 0 on missing or padded edges, so a sum over k is a
    weighted mean; weight (B, N, k) ``mean`` times the
    smooth envelope; rel (B, N, k, 3) edge vectors sender - receiver in units of ``L``; inv_len
    (B, N, k, 1) 1 / length, floored; rbf (B, N, k, R) radial basis of the length; moment
    (B, 1, 3, 3) three times the cloud's second moment ``mean (x - c)(x - c)^T`` over its mean square
    radius (I for a round cloud). It turns as ``Q M Q^T`` under any orthogonal Q and has no sign to
    lose, so ``M v`` is a vector (and ``M a`` a pseudo-vector) that tells each point how its
    directions sit against the part's long and short axes; mask (B, N) real points.
    """

    index: torch.Tensor
    mean: torch.Tensor
    weight: torch.Tensor
    rel: torch.Tensor
    inv_len: torch.Tensor
    rbf: torch.Tensor
    moment: torch.Tensor
    mask: torch.Tensor


# ---------------------------------------------------------------------------------------------
# free functions


def smooth_cutoff(x: torch.Tensor) -> torch.Tensor:
    """Cosine envelope on scaled lengths ``x``: 1 at 0, falls to 0 at 1 with zero slope, 0 beyond."""
    return 0.5 * (torch.cos(math.pi * x.clamp(max=1.0)) + 1.0)


def radial_basis(x: torch.Tensor, num: int) -> torch.Tensor:
    """Gaussians centred evenly on [0, 1] of scaled lengths ``x (...)``, times the envelope -> (..., num)."""
    centres = torch.linspace(0.0, 1.0, num, dtype=x.dtype, device=x.device)
    width = 1.0 / num
    return torch.exp(-(((x.unsqueeze(-1) - centres) / width) ** 2)) * smooth_cutoff(x).unsqueeze(-1)


def vector_norm(v: torch.Tensor) -> torch.Tensor:
    """Length of each vector channel ``v (..., C, 3) -> (..., C)``, smooth at zero."""
    return torch.sqrt((v * v).sum(-1) + _EPS)


def _direction_norm(v: torch.Tensor) -> torch.Tensor:
    """Length of each vector ``(..., C, 3) -> (...)`` floored at ``sqrt(_DIRECTION_EPS)``, for dividing by."""
    return torch.sqrt((v * v).sum(-1) + _DIRECTION_EPS)


def dot(a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    """Channel-wise inner product ``(..., C, 3) x (..., C, 3) -> (..., C)``; broadcasts."""
    return (a * b).sum(-1)


def cross(a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    """Channel-wise cross product over the last axis, ``a x b``; broadcasts like ``a * b``.

    Written out by components: on CPU it is several times faster than ``torch.linalg.cross``.
    """
    a1, a2, a3 = a.unbind(-1)
    b1, b2, b3 = b.unbind(-1)
    return torch.stack([a2 * b3 - a3 * b2, a3 * b1 - a1 * b3, a1 * b2 - a2 * b1], -1)


def edge_geometry(points: torch.Tensor, mask: torch.Tensor, config: VectorGateConfig) -> EdgeGeometry:
    """Build the neighbour graph of centred ``points (B, N, 3)`` and its geometry.

    Lengths are divided by a unit ``L``: the absolute ``cutoff`` if one is given, else
    ``_RELATIVE_CUTOFF`` mean neighbour distances of each cloud. That mean is an invariant, so every
    symmetry is kept, and the same weights serve any point count and any unit of length.
    """
    graph = neighbourhood(points, config.k, mask, config.radius, config.smooth_neighbours)
    taper = graph.weight * mask.unsqueeze(-1)  # (B, N, k): taper (or 1) on valid edges, 0 elsewhere
    rel = relative_vectors(points, graph.index)  # (B, N, k, 3) sender - receiver; 0 on invalid slots
    dist = torch.sqrt((rel * rel).sum(-1))  # (B, N, k)
    if config.cutoff is None:
        mean_dist = (dist * taper).sum((1, 2)) / taper.sum((1, 2)).clamp_min(1.0)  # (B,)
        unit_len = (_RELATIVE_CUTOFF * mean_dist).clamp_min(_EPS).reshape(-1, 1, 1)  # (B, 1, 1)
    else:
        unit_len = points.new_full((points.shape[0], 1, 1), float(config.cutoff))
    x = dist / unit_len  # (B, N, k) lengths in units of L
    mean = taper / taper.sum(-1, keepdim=True).clamp_min(1.0)  # (B, N, k)
    return EdgeGeometry(
        index=graph.index,
        mean=mean,
        weight=mean * smooth_cutoff(x),
        rel=rel / unit_len.unsqueeze(-1),
        # floored so that duplicate points (length 0) give direction terms of 0, not noise / 0
        inv_len=torch.rsqrt(x * x + 1e-6).unsqueeze(-1),
        rbf=radial_basis(x, config.num_radial),
        moment=_moment(points, mask),
        mask=mask,
    )


def _cloud_mean(v: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Mean over the real points of ``v (B, N, C, 3)`` -> (B, C, 3): a vector per cloud and channel."""
    return masked_mean(v, mask)


def _moment(centred: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """``3 mean(y y^T) / mean(|y|^2)`` over the real points of centred clouds -> (B, 1, 3, 3)."""
    outer = centred.unsqueeze(-1) * centred.unsqueeze(-2)  # (B, N, 3, 3)
    m = masked_mean(outer.flatten(-2), mask).unflatten(-1, (3, 3))  # (B, 3, 3)
    trace = m.diagonal(dim1=-2, dim2=-1).sum(-1).clamp_min(_EPS)  # (B,)
    return (3.0 * m / trace[:, None, None]).unsqueeze(1)  # (B, 1, 3, 3)


# ---------------------------------------------------------------------------------------------
# blocks


class ChannelMix(nn.Module):
    """Linear map over the channel axis of vectors, ``(..., C_in, 3) -> (..., C_out, 3)``.

    No bias and no mixing of x, y, z: it commutes with every orthogonal map, and a pseudo-vector
    input stays a pseudo-vector (never mix vectors and pseudo-vectors in one map).
    """

    def __init__(self, c_in: int, c_out: int):
        super().__init__()
        self.linear = nn.Linear(c_in, c_out, bias=False)

    def forward(self, v: torch.Tensor) -> torch.Tensor:
        return self.linear(v.transpose(-1, -2)).transpose(-1, -2)  # (..., C_out, 3)


class VectorNorm(nn.Module):
    """Equivariant normalisation: divide vectors ``(..., C, 3)`` by their RMS length over channels.

    With ``companion`` (the point's polar vectors, for pseudo-vectors) the RMS is floored by
    ``OddNorm.FLOOR`` times the companion's mean square, for the reason given at :class:`OddNorm`:
    on two mirror planes of a part every pseudo-vector is 0 by symmetry, and the plain ``_EPS`` floor
    multiplied the rounding left there by up to 1e4.
    """

    def __init__(self, channels: int):
        super().__init__()
        self.gain = nn.Parameter(torch.ones(channels))

    def forward(self, v: torch.Tensor, companion: torch.Tensor | None = None) -> torch.Tensor:
        square = (v * v).sum(-1).mean(-1, keepdim=True) + _EPS  # (..., 1)
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

    def __init__(self, config: VectorGateConfig):
        super().__init__()
        self.handed = config.handedness
        self.s = nn.LayerNorm(config.scalars)
        self.v = VectorNorm(config.vectors)
        if self.handed:
            self.p = OddNorm(config.vectors)
            self.a = VectorNorm(config.vectors)

    def forward(self, x: PointFeatures) -> PointFeatures:
        if not self.handed:
            return PointFeatures(self.s(x.s), self.v(x.v), None, None)
        return PointFeatures(self.s(x.s), self.v(x.v), self.p(x.p, x.s), self.a(x.a, x.v))


def _det(a: torch.Tensor, b: torch.Tensor, c: torch.Tensor) -> torch.Tensor:
    """Normalised triple product ``det[a, b, c] / (|a| |b| |c|)`` of ``(..., 3)`` vectors -> (...)."""
    n = _direction_norm(torch.stack([a, b, c], -2)).prod(-1)  # (...)
    return dot(cross(a, b), c) / n


def _twist(c1: torch.Tensor, c3: torch.Tensor, mask: torch.Tensor, geom: EdgeGeometry) -> torch.Tensor:
    """How the local vectors turn about the edges: ``mean_j det[c_i, c_j, r_ij]`` -> (B, N, 2).

    Zero on a plane or an untwisted cylinder, of one sign along a right-hand helical surface
    (thread flanks, coils) and of the other on its mirror image. Divided by the cloud's mean
    ``|c|^2`` so that flat patches give small values rather than amplified noise.
    """
    c = torch.stack([c1, c3], -2)  # (B, N, 2, 3)
    cj = gather_neighbours(c, geom.index)  # (B, N, k, 2, 3)
    twist = (dot(cross(c.unsqueeze(2), cj), geom.rel.unsqueeze(-2)) * geom.mean.unsqueeze(-1)).sum(2)  # (B, N, 2)
    scale = masked_mean((c * c).sum(-1), mask).clamp_min(_EPS)  # (B, 2)
    return twist / scale.unsqueeze(1)


def _global_chirality(c2: torch.Tensor, geom: EdgeGeometry) -> torch.Tensor:
    """``det[y, M y, M^2 y]`` for each point's offset ``y`` from the centroid -> (B, N, 1).

    In the frame of M's axes it is ``y1 y2 y3`` times a product of eigenvalue gaps: its cloud mean
    is a third moment that flips sign under any reflection and vanishes for mirror-symmetric parts.
    """
    my = c2 @ geom.moment[:, 0]  # (B, N, 3)
    mmy = my @ geom.moment[:, 0]  # (B, N, 3)
    return dot(cross(c2, my), mmy).unsqueeze(-1)


class Embedding(nn.Module):
    """Initial features from each point's neighbourhood and its offset from the centroid.

    Four vectors per point: ``c1`` the mean edge vector to its neighbours (it points into the
    local curvature), ``c2`` the offset from the centroid over the cloud's RMS radius,
    ``c3 = C c2`` with ``C = mean_j r_ij r_ij^T`` the local second moment (how the patch spreads
    along the centroid direction), and ``c4 = M c1`` with ``M`` the cloud's normalised second moment
    (the local curvature direction against the part's axes). Scalars: their lengths, the cosines of
    neighbouring pairs and the mean and spread of the neighbour distances. Pseudo-vectors: cross
    products of neighbouring pairs. Pseudo-scalars, the first handed quantities: the normalised
    triple products ``det[c_a, c_b, c_c] / (|c_a| |c_b| |c_c|)`` of neighbouring triples, the helix
    terms ``det[c2, c3, M c3]`` and ``det[c2, c3, M^2 c3]``, the twist of ``c1`` and ``c3`` about the
    edges and the global chirality ``det[c2, M c2, M^2 c2]``.
    (A triple product of ``c1``, ``c2`` and a plain edge average would vanish: ``c1`` is that average.)

    With normals ``n`` (a polar vector: ``n -> Q n``), also the vector ``n``, the scalars ``n . c1``
    and ``n . c2`` (normalised), the pseudo-vectors ``n x M n`` and ``n x c2`` and the pseudo-scalars
    ``det[c2, n, M n]``, ``det[c2, n, M^2 n]`` and the normals' twist about the edges
    ``mean_j det[n_i, n_j, r_ij]``. On a helicoid (a thread flank, a helical tooth, a coil) the normal
    leans along the axis in step with the turn, so ``det[y, n, M n]`` keeps one sign over the whole
    surface, the sign of the hand times that of the part's axial stretch, which ``M`` gives as well;
    on flats and plain cylinders it vanishes.

    With ``signed_normals=False`` (the default) every term is even in each point's normal, so turning
    any normal around (``n -> -n``, point by point) changes nothing: a scan's normals estimated from
    its points have a direction but an unreliable sign (single-view signs came out reversed on about
    one scan in nine of the demo parts, noisy scanners included), and a reversed field of normals
    reads like the mirror image in the odd terms above. The terms that are odd in ``n`` are then
    multiplied by ``n . c2 / |c2|`` (the normal's lean away from the centroid), which makes them
    even: ``w n``, ``w (n . c1)``, ``w (n x c2)`` and ``det[w_i n_i, w_j n_j, r_ij]`` for
    ``w = n . c2 / |c2|``; the terms even already (``n x M n``, ``det[c2, n, M n]``, ...) stay.
    """

    def __init__(self, config: VectorGateConfig):
        super().__init__()
        S, V = config.scalars, config.vectors
        self.handed, self.normals, self.signed = config.handedness, config.normals, config.signed_normals
        extra = 1 if config.normals else 0
        self.scalar = nn.Linear(10 + 2 * extra, S)
        self.vector = ChannelMix(4 + extra, V)
        if self.handed:
            self.pseudo_vector = ChannelMix(4 + 2 * extra, V)
            self.pseudo_scalar = nn.Linear(9 + 3 * extra, V, bias=False)  # no bias: a bias is parity even

    def forward(self, centred: torch.Tensor, mask: torch.Tensor, geom: EdgeGeometry,
                normals: torch.Tensor | None = None) -> PointFeatures:
        rms = torch.sqrt(masked_mean((centred * centred).sum(-1, keepdim=True), mask) + _EPS)  # (B, 1)
        c2 = centred / rms.unsqueeze(1)  # (B, N, 3)
        rel, mean = geom.rel, geom.mean.unsqueeze(-1)  # (B, N, k, 3) in units of L, (B, N, k, 1)
        c1 = (rel * mean).sum(2)  # (B, N, 3)
        along = (rel * c2.unsqueeze(2)).sum(-1, keepdim=True)  # (B, N, k, 1)
        c3 = (rel * along * mean).sum(2)  # (B, N, 3)
        M = geom.moment[:, 0]  # (B, 3, 3), symmetric
        c4, c5 = c1 @ M, c3 @ M  # (B, N, 3) each
        c = torch.stack([c1, c2, c3, c4], -2)  # (B, N, 4, 3): channel, xyz
        n = vector_norm(c)  # (B, N, 4)
        nd = _direction_norm(c)  # (B, N, 4): the lengths that divide, floored higher (see _DIRECTION_EPS)
        cos = dot(c, c.roll(-1, -2)) / (nd * nd.roll(-1, -1))  # (B, N, 4): c1.c2, c2.c3, c3.c4, c4.c1
        dist = torch.sqrt((rel * rel).sum(-1, keepdim=True) + _EPS)  # (B, N, k, 1)
        mean_d = (dist * mean).sum(2)  # (B, N, 1)
        spread = torch.sqrt((((dist - mean_d.unsqueeze(2)) ** 2) * mean).sum(2) + _EPS)  # (B, N, 1)
        scalars = [n, cos, mean_d, spread]
        if self.normals:
            u = normals  # (B, N, 3) unit normals, outward (signed) or of either sign
            facing = dot(u.unsqueeze(-2), c[..., :2, :]) / nd[..., :2]  # (B, N, 2): n.c1, n.c2 (normalised)
            # w u: the normal made even in its sign, weighted by its lean away from the centroid
            su = u if self.signed else u * facing[..., 1:]  # (B, N, 3)
            scalars.append(facing if self.signed else facing * facing[..., 1:])  # (B, N, 2)
            c = torch.cat([c, su.unsqueeze(-2)], -2)  # (B, N, 5, 3)
        s = self.scalar(torch.cat(scalars, -1))  # (B, N, S)
        v = self.vector(c)  # (B, N, V, 3)
        if not self.handed:
            return PointFeatures(s, v, None, None)
        c = c[..., :4, :]  # the four geometric vectors; the normal's odd terms follow below
        axial = cross(c, c.roll(-1, -2))  # (B, N, 4, 3): c1 x c2, c2 x c3, c3 x c4, c4 x c1
        triple = dot(axial, c.roll(-2, -2)) / (nd * nd.roll(-1, -1) * nd.roll(-2, -1))  # (B, N, 4)
        # det[y, C y, M C y]: along a helix C y follows the local tangent t and this is about
        # det[y, t, axis] (t . axis), whose sign is the hand of the helix (springs, helical teeth)
        helix = torch.stack([_det(c2, c3, c5), _det(c2, c3, c5 @ M)], -1)  # (B, N, 2)
        odd = [triple, helix, _twist(c1, c3, mask, geom), _global_chirality(c2, geom)]
        if self.normals:
            mu = u @ M  # (B, N, 3)
            axial = torch.cat([axial, torch.stack([cross(u, mu), cross(su, c2)], -2)], -2)  # (B, N, 6, 3)
            uj = gather_neighbours(su, geom.index)  # (B, N, k, 3)
            twist_n = (dot(cross(su.unsqueeze(2), uj), geom.rel) * geom.mean).sum(2, keepdim=True)  # (B, N, 1)
            odd += [dot(c2, cross(u, mu)).unsqueeze(-1), dot(c2, cross(u, mu @ M)).unsqueeze(-1), twist_n]
        a = self.pseudo_vector(axial)  # (B, N, V, 3)
        p = self.pseudo_scalar(torch.cat(odd, -1))  # (B, N, V)
        return PointFeatures(s, v, p, a)


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
        PointFeatures (s (B, N, S), v (B, N, V, 3), p (B, N, V), a (B, N, V, 3)) -> the same shapes.
    """

    def __init__(self, config: VectorGateConfig):
        super().__init__()
        S, V, R = config.scalars, config.vectors, config.num_radial
        self.S, self.V, self.handed = S, V, config.handedness
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

    def forward(self, x: PointFeatures, geom: EdgeGeometry) -> PointFeatures:
        V, H = self.V, self.H
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
            return PointFeatures(ms, mv, None, None)
        mp = (op * gp).sum(2)  # (B, N, V): odd x even
        return PointFeatures(ms, mv, mp, along[..., V:, :])


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

    def __init__(self, config: VectorGateConfig):
        super().__init__()
        S, V = config.scalars, config.vectors
        self.S, self.V, self.handed = S, V, config.handedness
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

    def forward(self, x: PointFeatures, xn: PointFeatures, m: PointFeatures, geom: EdgeGeometry) -> PointFeatures:
        S, V = self.S, self.V

        def context(v):  # (B, N, C, 3) -> (B, N, 4C, 3): own, arrived, M v, the cloud's mean of v
            return [v, v @ geom.moment, _cloud_mean(v, geom.mask).unsqueeze(1).expand_as(v)]

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
            return PointFeatures(s, v, None, None)
        ga, gp = out[..., S + V :].chunk(2, -1)
        a = x.a + torch.sigmoid(ga).unsqueeze(-1) * at
        p = x.p + torch.sigmoid(gp) * pt  # odd x even: the sign of p_t survives
        return PointFeatures(s, v, p, a)


class VectorGateLayer(nn.Module):
    """One round: normalise, send messages along the edges, update the points (pre-norm residual)."""

    def __init__(self, config: VectorGateConfig):
        super().__init__()
        self.norm = FeatureNorm(config)
        self.message = Message(config)
        self.update = Update(config)

    def forward(self, x: PointFeatures, geom: EdgeGeometry) -> PointFeatures:
        xn = self.norm(x)
        return self.update(x, xn, self.message(xn, geom), geom)


# ---------------------------------------------------------------------------------------------
# the backbone


def _check_config(c: VectorGateConfig) -> None:
    """Raise ConfigError for options out of range, naming the option and the value found."""
    for field in ("scalars", "vectors", "layers", "k", "num_radial"):
        value = getattr(c, field)
        if isinstance(value, bool) or not isinstance(value, int) or value < 1:
            raise ConfigError(f"vector_gate option '{field}' should be a positive integer, got {value!r}.")
    for field in ("radius", "cutoff"):
        value = getattr(c, field)
        if value is not None and (
            isinstance(value, bool) or not isinstance(value, (int, float)) or not value > 0 or math.isinf(value)
        ):
            raise ConfigError(f"vector_gate option '{field}' should be a positive number or None, got {value!r}.")
    for field in ("handedness", "normals", "signed_normals", "smooth_neighbours"):
        if not isinstance(getattr(c, field), bool):
            raise ConfigError(f"vector_gate option '{field}' should be true or false, got {getattr(c, field)!r}.")


def readout(x: PointFeatures) -> torch.Tensor:
    """Invariant per-point features ``(B, N, F/2)``: scalars, vector norms and, if handed,
    pseudo-vector norms and the pseudo-scalars themselves (not squared: their sign is the handedness)."""
    parts = [x.s, vector_norm(x.v)]
    if x.p is not None:
        parts += [vector_norm(x.a), x.p]
    return torch.cat(parts, -1)


class VectorGateBackbone(Backbone):
    """Vector-gated message passing on a kNN (or radius) graph; invariant features by mean + max pooling.

    ``symmetry`` is ``"SE3"`` with handedness (invariant to rotations and translations; a mirror image
    gives other features) and ``"E3"`` without (reflections too). ``out_features = 2 (S + V)``, or
    ``2 (S + 3V)`` with handedness.

    Shape:
        points (B, N, 3), mask (B, N) bool | None[, normals (B, N, 3) with ``normals=True``]
        -> (B, out_features)
    """

    name = "vector_gate"
    Config = VectorGateConfig

    def __init__(self, **kwargs):
        super().__init__(**kwargs)
        c = self.config
        _check_config(c)
        self.symmetry = "SE3" if c.handedness else "E3"
        self.uses_normals = c.normals
        self.embed = Embedding(c)
        self.layers = nn.ModuleList(VectorGateLayer(c) for _ in range(c.layers))
        self.final_norm = FeatureNorm(c)
        self.out_features = 2 * (c.scalars + c.vectors + (2 * c.vectors if c.handedness else 0))

    def _features(self, points: torch.Tensor, mask: torch.Tensor,
                  normals: torch.Tensor | None = None) -> list[PointFeatures]:
        k = self.config.k
        if self.config.radius is None:
            fewest = int(mask.sum(1).min()) if mask.numel() else 0
            if fewest <= k:
                raise InputError(f"k = {k} neighbours needs clouds of at least {k + 1} points, got {fewest}.")
        points = torch.where(mask.unsqueeze(-1), points, torch.zeros_like(points))  # junk can't leak
        centred = points - masked_mean(points, mask).unsqueeze(1)  # (B, N, 3): translation invariant
        geom = edge_geometry(centred, mask, self.config)
        if normals is not None:
            normals = torch.where(mask.unsqueeze(-1), normals, torch.zeros_like(normals))
        x = self.embed(centred, mask, geom, normals)
        out = [x]
        for layer in self.layers:
            x = layer(x, geom)
            out.append(x)
        return out

    def _normals(self, normals: torch.Tensor | None, points: torch.Tensor) -> torch.Tensor | None:
        return check_normals(normals, points) if self.uses_normals else None

    def forward_features(self, points: torch.Tensor, mask: torch.Tensor | None = None,
                         normals: torch.Tensor | None = None) -> list[PointFeatures]:
        """Per-point features after the embedding and after every layer (``layers + 1`` entries).

        Under ``points @ Q.T + t`` with Q orthogonal: ``s`` is unchanged, ``v -> v @ Q.T``,
        ``p -> det(Q) p``, ``a -> det(Q) a @ Q.T``. Values at padded points are meaningless.
        """
        return self._features(points, check_points(points, mask), self._normals(normals, points))

    def forward(self, points: torch.Tensor, mask: torch.Tensor | None = None,
                normals: torch.Tensor | None = None) -> torch.Tensor:
        mask = check_points(points, mask)
        features = self._features(points, mask, self._normals(normals, points))
        per_point = readout(self.final_norm(features[-1]))  # (B, N, F/2)
        return torch.cat([masked_mean(per_point, mask), masked_max(per_point, mask)], -1)
