"""Vector-gated graph network: scalar and vector channels per point, messages on a neighbour graph.

Features are the degree <= 1 types of :mod:`._features`: scalars ``(0, +1)`` and vectors ``(1, -1)``
and, with ``symmetry: se3``, pseudo-scalars ``(0, -1)`` and pseudo-vectors ``(1, +1)``, vectors stored
in the order ``(y, z, x)`` (the input is turned into that order once; dot, cross and triple products
do not see a cyclic permutation). Under an orthogonal map ``x -> Q x`` (det Q = +-1)::

    s -> s,   v -> Q v,   p -> det(Q) p,   a -> det(Q) Q a

Every operation keeps that parity (``_vector_gate_layer``): the cross product of two vectors is a
pseudo-vector and a triple product a pseudo-scalar. Rotations therefore leave every readout feature
unchanged, and a reflection flips the sign of the pseudo-scalars in the readout, which is how the
network tells a left-hand part from its right-hand twin (symmetry ``SE3``). With ``symmetry: e3``
nothing parity-odd is ever formed, so the features are invariant to reflections as well (``E3``).

The construction follows the published idea of vector-valued features handled by linear maps, norms
and inner products (E(n)-equivariant graph networks, geometric vector perceptrons, vector neurons),
extended with cross and triple products so that handedness is not lost.
"""

from __future__ import annotations

import dataclasses
from typing import NamedTuple

import torch
from torch import nn

from shapes._checks import boolean, choice, integer, number, optional
from shapes.backbones._base import Backbone, masked_max, masked_mean
from shapes.backbones._equivariant import ChannelMix
from shapes.backbones._features import SYMMETRY_OPTIONS, declared, pack
from shapes.backbones._neighbours import Cloud, edges
from shapes.backbones._normals import as_axis, chirality, lean
from shapes.backbones._radial import GaussianBasis, cosine_cutoff
from shapes.backbones._vector_gate_layer import EPS, FeatureNorm, VectorGateLayer, readout, vector_norm
from shapes.backbones._vectors import cross, dot, norm, triple
from shapes.geometry import gather_neighbours

__all__ = ["VectorGateBackbone", "VectorGateConfig"]

# With cutoff=None, lengths are divided by this many mean neighbour distances of the cloud: the
# k-th neighbour of a surface sample lies at about 1.5 mean neighbour distances, so 3 keeps nearly
# every kNN edge inside the envelope while still letting the far ones fade out smoothly.
_RELATIVE_CUTOFF = 3.0
# Floor of the squared lengths that cosines and normalised triple products divide by. The embedding's
# vectors are in units of L (a few neighbour distances); where one vanishes by symmetry (the mean edge
# vector inside a flat lattice patch) what is left is rounding, and a floor of 1e-8 multiplied it by
# ~1e4. 1e-6 keeps that gain 10x lower (measured, float64, box lattice, symmetry e3: features moved by
# 2e-12 under rotation, 2e-13 with this floor) and is far below real curvature.
_DIRECTION_EPS = 1e-6


@dataclasses.dataclass
class VectorGateConfig:
    scalars: int = 32  # scalar channels per point: enough for ~20 part classes, cheap on CPU
    vectors: int = 8  # vector channels (as many pseudo channels when handed); 16 cost 1.5x, no gain seen
    layers: int = 2  # rounds: pseudo-scalars exist from the embedding on, and the cloud's moment and
    # mean vectors give global context, so 2 rounds did as well as 3 in a 10-minute budget (measured)
    k: int = 12  # neighbours: at 512 points a patch that resolves coil hand; 16 costs 1.3x per edge set
    radius: float | None = None  # None: kNN graph (adapts to point density); a number: ball query
    num_radial: int = 8  # Gaussian radial basis functions: smooth resolution of the edge length
    cutoff: float | None = None  # None: lengths in units of the cloud's mean neighbour distance
    symmetry: str = "se3"  # se3: cross/triple products tell mirror twins apart; e3: reflection-invariant
    normals: bool = True  # take the surface normals the shards carry: they show the tilt of thread flanks
    # and helical teeth that a few hundred points cannot
    signed_normals: bool = False  # False: a normal counts as an axis (n and -n alike; docs/design.md, "Normals
    # as axes"), so a scan whose estimated normals came out turned inward reads as the same part, not its twin
    smooth_neighbours: bool = True  # taper the k neighbours to weight 0 at the (k+1)-th one's distance (and at
    # radius): scans lie on a lattice, neighbours tie, and a hard kNN set let rounding pick which tied point
    # counted (logits moved 4e-2 under rotation in float32); False: the old hard graph

    def __post_init__(self):
        for name in ("scalars", "vectors", "layers", "k", "num_radial"):
            setattr(self, name, integer(f"backbone.{name}", getattr(self, name), low=1))
        for name in ("radius", "cutoff"):
            setattr(self, name, optional(number, f"backbone.{name}", getattr(self, name), low=0, low_open=True))
        self.symmetry = choice("backbone.symmetry", self.symmetry, SYMMETRY_OPTIONS)
        for name in ("normals", "signed_normals", "smooth_neighbours"):
            boolean(f"backbone.{name}", getattr(self, name))


class EdgeGeometry(NamedTuple):
    """What every layer needs about the graph, built once per forward pass and shared by all layers.

    index (B, N, k) senders; mean (B, N, k) each edge's share of its receiver's neighbourhood
    (:class:`._neighbours.Edges`), so a sum over k is a weighted mean; weight (B, N, k) ``mean`` times
    the cosine envelope; rel (B, N, k, 3) edge vectors in units of ``L``; inv_len (B, N, k, 1)
    1 / length, floored; rbf (B, N, k, R) radial basis of the length; moment (B, 1, 3, 3) the cloud's
    normalised second moment ``M`` (docs/design.md, "Normals as axes"): ``M v`` tells each point how
    its directions sit against the part's long and short axes; mask (B, N) real points.
    """

    index: torch.Tensor
    mean: torch.Tensor
    weight: torch.Tensor
    rel: torch.Tensor
    inv_len: torch.Tensor
    rbf: torch.Tensor
    moment: torch.Tensor
    mask: torch.Tensor


def edge_geometry(cloud: Cloud, config: VectorGateConfig, basis: GaussianBasis) -> EdgeGeometry:
    """The neighbour graph of ``cloud`` and its geometry, lengths in units of ``L``: the absolute
    ``cutoff`` if one is given, else ``_RELATIVE_CUTOFF`` mean neighbour distances of each cloud (an
    invariant, so every symmetry is kept and the same weights serve any point count and unit)."""
    graph = edges(cloud, config.k, config.radius, config.smooth_neighbours)
    if config.cutoff is None:
        mean_dist = (graph.length * graph.taper).sum((1, 2)) / graph.taper.sum((1, 2)).clamp_min(1.0)  # (B,)
        unit_len = (_RELATIVE_CUTOFF * mean_dist).clamp_min(EPS).reshape(-1, 1, 1)  # (B, 1, 1)
    else:
        unit_len = cloud.points.new_full((cloud.points.shape[0], 1, 1), float(config.cutoff))
    x = graph.length / unit_len  # (B, N, k) lengths in units of L
    envelope = cosine_cutoff(x)
    return EdgeGeometry(
        index=graph.index,
        mean=graph.share,
        weight=graph.share * envelope,
        rel=graph.vectors / unit_len.unsqueeze(-1),
        # floored so that duplicate points (length 0) give direction terms of 0, not noise / 0
        inv_len=torch.rsqrt(x * x + 1e-6).unsqueeze(-1),
        rbf=basis(x) * envelope.unsqueeze(-1),
        moment=cloud.moment.unsqueeze(1),
        mask=cloud.mask,
    )


def _det(a: torch.Tensor, b: torch.Tensor, c: torch.Tensor) -> torch.Tensor:
    """Normalised triple product ``det[a, b, c] / (|a| |b| |c|)`` of ``(..., 3)`` vectors -> (...)."""
    return triple(a, b, c) / norm(torch.stack([a, b, c], -2), eps=_DIRECTION_EPS).prod(-1)


def _twist(c: torch.Tensor, geom: EdgeGeometry) -> torch.Tensor:
    """How the vectors ``c (B, N, C, 3)`` turn about the edges: ``mean_j det[c_i, c_j, r_ij]`` -> (B, N, C).

    Zero on a plane or an untwisted cylinder, of one sign along a right-hand helical surface (thread
    flanks, coils) and of the other on its mirror image.
    """
    cj = gather_neighbours(c, geom.index)  # (B, N, k, C, 3)
    return (triple(c.unsqueeze(2), cj, geom.rel.unsqueeze(-2)) * geom.mean.unsqueeze(-1)).sum(2)


class Embedding(nn.Module):
    """Initial features from each point's neighbourhood and its offset from the centroid.

    Four vectors per point: ``c1`` the mean edge vector to its neighbours (it points into the local
    curvature), ``c2 = y`` the offset from the centroid over the cloud's RMS radius, ``c3 = C c2`` with
    ``C = mean_j r_ij r_ij^T`` the local second moment, and ``c4 = M c1`` with ``M`` the cloud's
    moment. Scalars: their lengths, the cosines of neighbouring pairs, the mean and spread of the
    neighbour distances. Pseudo-vectors: cross products of neighbouring pairs. Pseudo-scalars: the
    normalised triple products of neighbouring triples, the helix terms ``det[c2, c3, M c3]`` and
    ``det[c2, c3, M^2 c3]``, the twist of ``c1`` and ``c3`` about the edges (over the cloud's mean
    ``|c|^2``) and the global chirality ``det[c2, M c2, M^2 c2]`` (a third moment: it flips sign under
    any reflection and vanishes for mirror-symmetric parts).

    With normals ``n``: the vector ``n``, the scalars ``n . c1`` and ``n . c2`` (normalised), the
    pseudo-vectors ``n x M n`` and ``n x c2`` and the pseudo-scalars ``det[c2, n, M n]``,
    ``det[c2, n, M^2 n]`` and the normals' twist about the edges. Unless ``signed_normals``, the
    terms odd in ``n`` take the axis reading of :mod:`._normals` (times the lean ``w``).
    """

    def __init__(self, config: VectorGateConfig):
        super().__init__()
        S, V = config.scalars, config.vectors
        self.handed, self.normals, self.signed = config.symmetry == "se3", config.normals, config.signed_normals
        extra = 1 if config.normals else 0
        self.scalar = nn.Linear(10 + 2 * extra, S)
        self.vector = ChannelMix(4 + extra, V)
        if self.handed:
            self.pseudo_vector = ChannelMix(4 + 2 * extra, V)
            self.pseudo_scalar = nn.Linear(9 + 3 * extra, V, bias=False)  # no bias: a bias is parity even

    def forward(self, cloud: Cloud, geom: EdgeGeometry) -> dict:
        c2 = cloud.y  # (B, N, 3)
        rel, mean = geom.rel, geom.mean.unsqueeze(-1)  # (B, N, k, 3) in units of L, (B, N, k, 1)
        c1 = (rel * mean).sum(2)  # (B, N, 3)
        along = (rel * c2.unsqueeze(2)).sum(-1, keepdim=True)  # (B, N, k, 1)
        c3 = (rel * along * mean).sum(2)  # (B, N, 3)
        M = cloud.moment  # (B, 3, 3), symmetric
        c4, c5 = c1 @ M, c3 @ M  # (B, N, 3) each
        c = torch.stack([c1, c2, c3, c4], -2)  # (B, N, 4, 3): channel, component
        nd = norm(c, eps=_DIRECTION_EPS)  # (B, N, 4): the lengths that divide, floored higher
        cos = dot(c, c.roll(-1, -2)) / (nd * nd.roll(-1, -1))  # (B, N, 4): c1.c2, c2.c3, c3.c4, c4.c1
        dist = torch.sqrt((rel * rel).sum(-1, keepdim=True) + EPS)  # (B, N, k, 1)
        mean_d = (dist * mean).sum(2)  # (B, N, 1)
        spread = torch.sqrt((((dist - mean_d.unsqueeze(2)) ** 2) * mean).sum(2) + EPS)  # (B, N, 1)
        scalars = [vector_norm(c), cos, mean_d, spread]
        if self.normals:
            u = cloud.normals  # (B, N, 3) unit normals, outward (signed) or of either sign
            w = lean(u, c2)  # (B, N): n . c2 / |c2|
            facing = torch.stack([dot(u, c1) / nd[..., 0], w], -1)  # (B, N, 2)
            su, facing = as_axis(w, self.signed, u, facing)  # each odd in n: times w unless signed
            scalars.append(facing)
            c = torch.cat([c, su.unsqueeze(-2)], -2)  # (B, N, 5, 3)
        s = self.scalar(torch.cat(scalars, -1))  # (B, N, S)
        v = self.vector(c)  # (B, N, V, 3)
        if not self.handed:
            return pack(s, v)
        c = c[..., :4, :]  # the four geometric vectors; the normal's odd terms follow below
        axial = cross(c, c.roll(-1, -2))  # (B, N, 4, 3): c1 x c2, c2 x c3, c3 x c4, c4 x c1
        triples = dot(axial, c.roll(-2, -2)) / (nd * nd.roll(-1, -1) * nd.roll(-2, -1))  # (B, N, 4)
        # det[y, C y, M C y]: along a helix C y follows the local tangent t and this is about
        # det[y, t, axis] (t . axis), whose sign is the hand of the helix (springs, helical teeth)
        helix = torch.stack([_det(c2, c3, c5), _det(c2, c3, c5 @ M)], -1)  # (B, N, 2)
        local = torch.stack([c1, c3], -2)  # (B, N, 2, 3)
        scale = masked_mean(local.square().sum(-1), cloud.mask).clamp_min(EPS)  # (B, 2): flats stay small
        my = c2 @ M
        odd = [triples, helix, _twist(local, geom) / scale.unsqueeze(1), triple(c2, my, my @ M).unsqueeze(-1)]
        if self.normals:
            mu = u @ M  # (B, N, 3)
            axial = torch.cat([axial, torch.stack([cross(u, mu), cross(su, c2)], -2)], -2)  # (B, N, 6, 3)
            odd += [chirality(c2, u, M).unsqueeze(-1), triple(c2, u, mu @ M).unsqueeze(-1),
                    _twist(su.unsqueeze(-2), geom)]
        return pack(s, v, self.pseudo_scalar(torch.cat(odd, -1)), self.pseudo_vector(axial))


class VectorGateBackbone(Backbone):
    """Vector-gated message passing on a kNN (or radius) graph; invariant features by mean + max pooling.

    ``symmetry`` is ``"SE3"`` with ``symmetry: se3`` (a mirror image gives other features) and ``"E3"``
    with ``e3``. ``out_features = 2 (S + V)``, or ``2 (S + 3V)`` with ``se3``.

    Shape:
        points (B, N, 3), mask (B, N) bool | None[, normals (B, N, 3) with ``normals=True``]
        -> (B, out_features)
    """

    name = "vector_gate"
    Config = VectorGateConfig

    def __init__(self, **kwargs):
        super().__init__(**kwargs)
        c = self.config
        self.symmetry = declared(c.symmetry)
        self.uses_normals = c.normals
        self.rbf = GaussianBasis(c.num_radial, 1.0, width=2**-0.5 / c.num_radial)  # exp(-(num (x - mu))^2)
        self.embed = Embedding(c)
        self.layers = nn.ModuleList(VectorGateLayer(c) for _ in range(c.layers))
        self.final_norm = FeatureNorm(c)
        self.out_features = 2 * (c.scalars + c.vectors + (2 * c.vectors if c.symmetry == "se3" else 0))

    def forward_features(self, points: torch.Tensor, mask: torch.Tensor | None = None,
                         normals: torch.Tensor | None = None) -> list[dict]:
        """Per-point feature dicts after the embedding and after every layer (``layers + 1`` entries).

        Under ``points @ Q.T + t`` with Q orthogonal each type ``(l, p)`` turns as docs/design.md, "Parity
        and handedness" says (``D_1(Q)`` on vectors in ``(y, z, x)`` order). Values at padded points are
        meaningless.
        """
        return self._run(points, mask, normals)[0]

    def forward(self, points: torch.Tensor, mask: torch.Tensor | None = None,
                normals: torch.Tensor | None = None) -> torch.Tensor:
        features, mask = self._run(points, mask, normals)
        per_point = readout(self.final_norm(features[-1]))  # (B, N, F/2)
        return torch.cat([masked_mean(per_point, mask), masked_max(per_point, mask)], -1)

    def _run(self, points, mask, normals) -> tuple[list[dict], torch.Tensor]:
        cloud = Cloud.of(self, points, mask, normals).in_harmonic_order()
        geom = edge_geometry(cloud, self.config, self.rbf)
        x = self.embed(cloud, geom)
        out = [x]
        for layer in self.layers:
            x = layer(x, geom)
            out.append(x)
        return out, cloud.mask
