"""Harmonic-filter attention: equivariant attention over neighbourhoods with spherical-harmonic filters.

Every point carries features of types ``(l, p)`` (degree ``l <= l_max``, parity ``p = +-1``) in the
vocabulary of :mod:`._features`: ``{(l, p): (B, N, C_l, 2l + 1)}`` with ``C_l = channels[l]``. The
input is one proper-scalar block embedded from invariant descriptors of the neighbourhood; with
``normals: true`` the normals add a vector block (the normal, ``M n``, the offset from the centroid,
the mean neighbour normal, mixed by per-point scalar weights), normal-made scalars and, with
``symmetry: se3``, pseudo-scalars from ``det[y, n, M n]`` (:func:`._normals.normal_inputs`).

One layer (pre-norm, residual), for receiver ``i``, neighbours ``j`` (kNN, or within ``radius``
capped at ``k``), ``r_ij = x_j - x_i``, ``d = |r_ij|`` and the path basis
``B_P(r_ij)[m_in, m_out] = sum_{m_f} C[l_in, l_f -> l_out][m_in, m_f, m_out] Y_{l_f, m_f}(r_ij / d)``::

    u_ij[P]     = R_P(d) * (B_P(r_ij)^T h_j[t_in])                   (per path, per input channel)
    k_ij[t_out] = sum_{P -> t_out} W^K_P u_ij[P]                     (keys)
    v_ij[t_out] = sum_{P -> t_out} W^V_P u_ij[P]                     (values)
    q_i[t]      = W^Q_t h_i[t]                                        (queries)
    a_ij^h      = softmax_j( sum_t <q_i[t], k_ij[t]>_head h / sqrt(d_head) )   (invariant logits)
    out_i[t]    = W^O_t sum_j a_ij^{h(c)} v_ij[t]

``R_P(d)`` is a per-path, per-input-channel radial weight from a small MLP on a Gaussian basis of
``d``, times the cosine cutoff. With ``smooth_neighbours`` the softmax counts each edge with its
weight (cutoff x the neighbourhood taper), so a neighbour enters and leaves the attention with
weight 0. Then a gated point-wise feed-forward block, whose input (with ``context: true``) also
gets the cloud's mean of every feature type. Readout: per point the scalars and pseudo-scalars, the
norms of the ``l > 0`` channels and the proper-pseudo dot products, masked mean and max over the
cloud; with ``context`` also the dot (and, ``se3``, triple) products of the cloud's mean vectors
(a bracket's hand is such a whole-part quantity).

``symmetry: se3`` keeps every coupling path: pseudo-quantities reach the readout, and a part and its
mirror image give different features. ``e3`` keeps only paths between proper types: the features
are reflection-invariant too. The fast path and its cost, against the dense reference
(``reference=True``), are described in ``_dense_reference``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import NamedTuple

import torch
from torch import nn

from shapes._checks import boolean, choice, integer, number, optional
from shapes.backbones._base import Backbone, masked_max, masked_mean
from shapes.backbones._equivariant import EquivariantNorm, GlobalVectorReadout
from shapes.backbones._features import (
    PSEUDO_SCALAR,
    SCALAR,
    SYMMETRY_OPTIONS,
    VECTOR,
    declared,
    invariant_width,
    parse_channels,
    point_invariants,
    to_harmonic_order,
)
from shapes.backbones._harmonic_layer import HarmonicAttentionLayer, angular_pairs, coupling_matrix
from shapes.backbones._neighbours import Cloud, Edges, edges
from shapes.backbones._normals import NORMAL_PSEUDO, NORMAL_SCALARS, NORMAL_VECTORS, normal_inputs
from shapes.backbones._radial import GaussianBasis, cosine_cutoff
from shapes.backbones._vectors import det3, norm
from shapes.errors import ConfigError
from shapes.geometry import clebsch_gordan, spherical_harmonics

__all__ = ["HarmonicAttentionBackbone", "HarmonicAttentionConfig", "EdgeFrame"]


@dataclass
class HarmonicAttentionConfig:
    l_max: int = 1  # degree 1 costs about a third of degree 2 per edge; 2 sees flats and slots but trains ~3x slower
    channels: dict = field(default_factory=lambda: {0: 16, 1: 8})  # per degree AND parity; degree l costs 2l+1 each
    layers: int = 3  # a pseudo-scalar needs three hops from the scalar input (two via the readout's dot products)
    heads: int = 2  # must divide every channel count; 2 heads keep per-head width >= 4
    k: int = 12  # neighbours per point: 12 on 256-point clouds (the demo's), 16 on 1024
    radius: float | None = None  # None: k nearest neighbours; a number: neighbours within it (at most k)
    num_radial: int = 16  # Gaussians resolving edge lengths in [0, cutoff]
    radial_hidden: int = 32  # width of the radial MLP that turns the Gaussians into per-path weights
    cutoff: float = 1.0  # in RMS radii of the normalised part (filters fade to 0 there); ~4x a 16-NN radius
    symmetry: str = "se3"  # se3: tell mirror twins apart; e3: reflection-invariant
    normals: bool = True  # thread flanks and helical teeth are far below the point spacing; their normals show the hand
    signed_normals: bool = False  # False: a normal counts as an axis (n and -n alike; docs/design.md, "Normals as
    # axes"), so estimated normals turned the wrong way on a scan do not read as the mirror image
    edge_block: int = 16384  # edges per block of the fast path: bounds its temporaries; results do not depend on it
    context: bool = True  # the cloud's mean of every feature type joins each layer and the readout (bracket hand)
    smooth_neighbours: bool = True  # taper the k neighbours to weight 0 at the (k+1)-th one's distance: on a scan's
    # lattice neighbours tie, and a hard kNN set let rounding pick which tied point counted (features moved by
    # up to 0.5 under rotation); False: the old hard graph and plain softmax

    def __post_init__(self):
        self.l_max = integer("backbone.l_max", self.l_max, low=0, high=3)
        self.channels = parse_channels(self.channels, self.l_max, "backbone.channels")
        for name in ("layers", "heads", "k", "num_radial", "radial_hidden", "edge_block"):
            setattr(self, name, integer(f"backbone.{name}", getattr(self, name), low=1))
        self.cutoff = number("backbone.cutoff", self.cutoff, low=0, low_open=True)
        self.radius = optional(number, "backbone.radius", self.radius, low=0, low_open=True)
        self.symmetry = choice("backbone.symmetry", self.symmetry, SYMMETRY_OPTIONS)
        for name in ("normals", "signed_normals", "context", "smooth_neighbours"):
            boolean(f"backbone.{name}", getattr(self, name))
        if any(c % self.heads for c in self.channels.values()):
            raise ConfigError(f"backbone.heads = {self.heads} should divide every channel count, got channels "
                              f"{self.channels}.")
        if self.symmetry == "se3" and (self.l_max < 1 or self.layers < 2):
            raise ConfigError("backbone.symmetry se3 needs l_max >= 1 and layers >= 2 to build pseudo-scalars, got "
                              f"l_max = {self.l_max}, layers = {self.layers}; use symmetry e3 for a smaller network.")
        if self.normals and 1 not in self.channels:
            raise ConfigError("backbone.normals true feeds each normal in as a degree-1 feature and needs channels "
                              f"for degree 1, got channels {self.channels}.")


class EdgeFrame(NamedTuple):
    """Everything about the edges that all layers share, computed once per forward pass.

    graph : the neighbour graph (:class:`._neighbours.Edges`); rbf (B, N, k, num_radial) Gaussians of
    the edge lengths; envelope (B, N, k) cosine cutoff x taper, every edge's weight in the attention;
    harmonics, list of (B, N, k, 2l+1), ``Y_l`` of the edge directions (for the reference); basis,
    dict l_in -> (B, N, k, 2 l_in + 1, W_l), the angular basis of every path from degree ``l_in``
    (None for the reference); smooth: whether attention weights its softmax by ``envelope``.
    """

    graph: Edges
    rbf: torch.Tensor
    envelope: torch.Tensor
    harmonics: list
    basis: dict | None
    smooth: bool

    @property
    def index(self) -> torch.Tensor:
        return self.graph.index

    @property
    def valid(self) -> torch.Tensor:
        return self.graph.valid

    def receivers(self, block: slice) -> "EdgeFrame":
        """The edges of the receivers ``block`` (dim 1), for the fast path (harmonics left out)."""
        basis = None if self.basis is None else {l: b[:, block] for l, b in self.basis.items()}
        return EdgeFrame(Edges(*(f[:, block] for f in self.graph)), self.rbf[:, block], self.envelope[:, block], [],
                         basis, self.smooth)


class HarmonicAttentionBackbone(Backbone):
    """Equivariant attention with spherical-harmonic filters; invariant readout (see module docstring).

    Shape:
        points (B, N, 3), mask (B, N), normals (B, N, 3) (only with ``normals: true``) -> features (B, out_features)
    """

    name = "harmonic_attention"
    Config = HarmonicAttentionConfig

    def __init__(self, **kwargs):
        super().__init__(**kwargs)
        c = self.config
        self.degrees = list(c.channels)
        self.pairs = {l: angular_pairs(l, self.degrees, c.symmetry) for l in self.degrees}
        self.l_f_max = max(l_f for pairs in self.pairs.values() for l_f, _ in pairs)
        c0 = c.channels[0]
        # Invariant descriptors -> proper scalars; without normals the only input, filters build the rest.
        self.centroid_rbf = GaussianBasis(c.num_radial, 3.0)  # normalised parts lie within ~3 RMS radii
        width = c.num_radial + 4 + (NORMAL_SCALARS if c.normals else 0)
        self.embed = nn.Sequential(nn.Linear(width, c0), nn.SiLU(), nn.Linear(c0, c0))
        self.rbf = GaussianBasis(c.num_radial, c.cutoff)
        types = {SCALAR: c0}
        if c.normals:
            # Each input channel is a sum of equivariant inputs weighted by proper scalars of the same
            # point, so it keeps its type exactly: scalar x vector = vector, scalar x pseudo-scalar = pseudo-scalar.
            if c.symmetry == "se3":
                self.pseudo_mix = nn.Linear(c0, c0 * NORMAL_PSEUDO)
                types[PSEUDO_SCALAR] = c0
            self.vector_mix = nn.Linear(c0, c.channels[1] * NORMAL_VECTORS)
            types[VECTOR] = c.channels[1]
        self.uses_normals = c.normals
        layers = []
        for _ in range(c.layers):
            layers.append(HarmonicAttentionLayer(types, c.channels, c.symmetry, c.heads, c.num_radial,
                                                 c.radial_hidden, c.context, c.edge_block))
            types = layers[-1].types_out
        self.layers = nn.ModuleList(layers)
        self.types_out = types
        self.final_norm = EquivariantNorm(types)
        vectors = types.get(VECTOR, 0) if c.context else 0
        self.global_readout = GlobalVectorReadout(vectors, chiral=c.symmetry == "se3") if vectors else None
        self._coupling: dict = {}  # (l_in, dtype, device) -> coupling matrix, built from float64 tables
        self.symmetry = declared(c.symmetry)
        self.out_features = 2 * invariant_width(types) + (self.global_readout.width if self.global_readout else 0)

    def _coupling_matrix(self, l_in: int, dtype, device) -> torch.Tensor:
        key = (l_in, dtype, str(device))
        if key not in self._coupling:
            self._coupling[key] = coupling_matrix(l_in, self.pairs[l_in], self.l_f_max, clebsch_gordan, dtype, device)
        return self._coupling[key]

    def edge_frame(self, cloud: Cloud, reference: bool = False) -> EdgeFrame:
        """Neighbourhoods and the per-edge radial and angular bases, shared by every layer."""
        c = self.config
        graph = edges(cloud, c.k, c.radius, c.smooth_neighbours)
        harmonics = spherical_harmonics(self.l_f_max, graph.vectors)  # list of (B, N, k, 2l+1)
        envelope = cosine_cutoff(graph.length, c.cutoff) * graph.taper  # (B, N, k): cutoff x taper (x valid)
        basis = None
        if not reference:
            y = torch.cat(harmonics, -1)  # (B, N, k, (l_f_max+1)^2)
            basis = {l: (y @ self._coupling_matrix(l, y.dtype, y.device)).unflatten(-1, (2 * l + 1, -1))
                     for l in self.degrees}  # (B, N, k, 2l+1, W)
        return EdgeFrame(graph, self.rbf(graph.length), envelope, harmonics, basis, c.smooth_neighbours)

    def forward_features(self, points: torch.Tensor, mask: torch.Tensor | None = None,
                         normals: torch.Tensor | None = None, reference: bool = False) -> list:
        """Per-layer feature dicts ``{(l, p): (B, N, C_l, 2l+1)}``, one per layer (equivariant)."""
        return self._run(points, mask, normals, reference)[0]

    def forward(self, points: torch.Tensor, mask: torch.Tensor | None = None,
                normals: torch.Tensor | None = None, reference: bool = False) -> torch.Tensor:
        """Invariant features ``(B, out_features)``; ``normals (B, N, 3)`` are needed with ``normals: true``
        and ignored otherwise."""
        per_layer, mask = self._run(points, mask, normals, reference)
        last = self.final_norm(per_layer[-1])
        inv = point_invariants(last, self.types_out)  # (B, N, F)
        parts = [masked_mean(inv, mask), masked_max(inv, mask)]  # (B, F) each
        if self.global_readout is not None:
            parts.append(self.global_readout(masked_mean(last[VECTOR], mask)))  # (B, G)
        return torch.cat(parts, -1)

    def _run(self, points, mask, normals, reference):
        cloud = Cloud.of(self, points, mask, normals)
        frame = self.edge_frame(cloud, reference)
        h = self._inputs(cloud, frame)
        per_layer = []
        for layer in self.layers:
            h = layer(h, frame, cloud.mask, reference)
            per_layer.append(h)
        return per_layer, cloud.mask

    def _inputs(self, cloud: Cloud, frame: EdgeFrame) -> dict:
        """First-layer features: embedded invariants, and with normals the normal-made channels."""
        descriptors = self._descriptors(cloud, frame.graph)  # (B, N, num_radial + 4)
        if cloud.normals is None:
            return {SCALAR: self.embed(descriptors).unsqueeze(-1)}  # (B, N, C0, 1)
        extra = normal_inputs(cloud, frame.graph, signed=self.config.signed_normals)
        scalars = self.embed(torch.cat([descriptors, extra.scalars], -1))  # (B, N, C0)
        h = {SCALAR: scalars.unsqueeze(-1)}  # (B, N, C0, 1)
        if PSEUDO_SCALAR in self.layers[0].types_in:
            weights = self.pseudo_mix(scalars).unflatten(-1, (-1, NORMAL_PSEUDO))  # (B, N, C0, P)
            h[PSEUDO_SCALAR] = (weights * extra.pseudo[:, :, None]).sum(-1, keepdim=True)  # (B, N, C0, 1)
        weights = self.vector_mix(scalars).unflatten(-1, (-1, NORMAL_VECTORS))  # (B, N, C1, V)
        h[VECTOR] = weights @ to_harmonic_order(extra.vectors)  # (B, N, C1, 3)
        return h

    def _descriptors(self, cloud: Cloud, graph: Edges) -> torch.Tensor:
        """Invariant per-point inputs ``(B, N, num_radial + 4)``, unchanged by rotations and reflections.

        Gaussians of the distance to the centroid; the mean edge length; and three dimensionless
        shape numbers of the neighbourhood's second moment ``C = mean_j r_ij r_ij^T``: the length of
        the mean offset over the mean edge length (about 0 inside a surface, larger at a rim),
        ``|C|_F / tr C`` (1 on a wire, 1/sqrt 2 on a flat) and ``27 det C / (tr C)^3`` (0 on a flat,
        1 for an isotropic blob). Polynomials of ``C``, no eigendecomposition: finite gradients.
        """
        mean_length = graph.mean(graph.length)  # (B, N); invalid slots have length 0
        # Floors far below any real edge (coordinates are in RMS radii) keep empty neighbourhoods finite.
        offset = norm(graph.mean(graph.vectors)) / (mean_length + 1e-6)
        local = torch.einsum("bnk,bnki,bnkj->bnij", graph.share, graph.vectors, graph.vectors)  # (B, N, 3, 3)
        trace = local.diagonal(dim1=-2, dim2=-1).sum(-1) + 1e-12  # (B, N)
        spread = norm(local.flatten(-2)) / trace
        volume = 27 * det3(local) / trace**3
        return torch.cat([self.centroid_rbf(norm(cloud.points)),
                          torch.stack([mean_length, offset, spread, volume], -1)], -1)

    def flop_counts(self) -> list:
        """Analytic multiply-add counts per layer (:func:`._dense_reference.flop_counts`)."""
        c = self.config
        return [layer.flop_counts(c.num_radial, c.radial_hidden) for layer in self.layers]
