"""Harmonic-filter attention: equivariant attention over neighbourhoods with spherical-harmonic filters.

Features and parity
-------------------
Every point carries features of types ``(l, p)`` (degree ``l <= l_max``, parity ``p = +-1``), each a
tensor ``(B, N, C_l, 2l + 1)`` with ``C_l = channels[l]`` (see ``_equivariant`` for the transformation
rules). The input is one proper-scalar block embedded from invariant descriptors (distance to the
centroid, mean neighbour distance, length of the mean neighbour offset); every other type is built
by the filters. With ``normals: true`` the outward surface normals (``n -> Q n`` for every orthogonal
``Q``: a polar vector) add a polar-vector block ``(1, -1)`` (the normal, ``M n``, the offset from
the centroid and the mean neighbour normal, mixed by per-point scalar weights), a few
normal-made proper scalars, and, in parity ``"full"``, a pseudo-scalar block ``(0, -1)`` built
from ``det[y, n, M n]`` (see :func:`normal_inputs`): sub-spacing detail such as a thread flank,
and so the hand of a thread, reaches the network in the first layer.

A filter path ``(l_in, p_in) -> (l_out, p_in (-1)^{l_f})`` goes through the harmonic ``Y_{l_f}``
of the edge direction, so parity is tracked exactly:

- ``parity: "full"`` keeps every path; pseudo-quantities (``1 x 1 -> 1`` gives a pseudovector, a
  later hop a pseudo-scalar) get their own channels. The readout keeps pseudo-scalars as they are,
  so a part and its mirror image give different features: the backbone is ``"SE3"``-invariant.
- ``parity: "even"`` keeps only paths between proper types (``l_in + l_f + l_out`` even): no
  pseudo-quantity exists, every invariant is reflection-invariant, the backbone is ``"E3"``.

One layer (pre-norm, residual)
------------------------------
For receiver ``i`` and its neighbours ``j`` (kNN, or within ``radius`` capped at ``k``), with
``r_ij = x_j - x_i``, ``d = |r_ij|`` and path basis
``B_P(r_ij)[m_in, m_out] = sum_{m_f} C[l_in, l_f -> l_out][m_in, m_f, m_out] Y_{l_f, m_f}(r_ij / d)``::

    u_ij[P]     = R_P(d) * (B_P(r_ij)^T h_j[t_in])                   (per path, per input channel)
    k_ij[t_out] = sum_{P -> t_out} W^K_P u_ij[P]                     (keys)
    v_ij[t_out] = sum_{P -> t_out} W^V_P u_ij[P]                     (values)
    q_i[t]      = W^Q_t h_i[t]                                        (queries)
    a_ij^h      = softmax_j( sum_t <q_i[t], k_ij[t]>_head h / sqrt(d_head) )   (invariant logits)
    out_i[t]    = W^O_t sum_j a_ij^{h(c)} v_ij[t]

With ``smooth_neighbours`` (the default) the softmax counts each edge with its weight
``w_ij`` = cosine cutoff x the neighbourhood taper of :func:`shapes.geometry.smooth_graph` (0 at the
``(k+1)``-th neighbour's distance), ``a_ij ∝ w_ij exp(logit_ij)``, so a neighbour enters and leaves the
attention with weight 0 and tied distances on a scan's lattice do not matter.

``R_P(d)`` is a per-path, per-input-channel radial weight from a small MLP on a Gaussian basis of
``d``, times a cosine cutoff; keys and values share it and differ by their channel mixings
``W^K_P``, ``W^V_P``. Keys exist only for output types the receiver has a query for (in the first
layer: scalars). Then a gated point-wise feed-forward block, whose input (with ``context: true``)
also gets the cloud's mean of every feature type, mixed per type: the mean of equivariant
features is equivariant, and it brings whole-part shape into every point. Readout: per point the
scalars and pseudo-scalars, the norms of the ``l > 0`` channels and the proper-pseudo dot
products, masked mean and max over the cloud; with ``context: true`` also the invariants of the
cloud's mean polar vectors (:class:`~shapes.backbones._equivariant.GlobalVectorReadout`): their
dot products and, in parity ``"full"``, their triple products, pseudo-scalars of the whole part.
A bracket's hand is such a quantity: each of its plates is locally mirror-symmetric, only the
arrangement of legs, gusset and holes is chiral.

The fast path and its cost
--------------------------
Channel mixing is separated from the angular part and lifted off the edges. Per input type, one
batched matmul turns the gathered sender features into ``Z_ij = h_j^T B(r_ij)`` for all its paths
at once, with the per-edge basis ``B`` built ONCE per forward pass (one GEMM of the concatenated
harmonics with a fixed coupling matrix) and shared by all layers. The radial GEMM writes its
weights already spread over the basis columns, and ``u = R * Z`` is the only per-edge feature
tensor. Keys are never formed: the query is pulled back through ``W^K`` on the receiver
(``q~_i = W^K^T q_i``, per node), and the logit is ``<q~_i, u_ij>``. Values are aggregated per head
before mixing (``A_i^h = sum_j a_ij^h u_ij``) and mixed by ``W^V`` per node. The cutoff is a
per-edge scalar, so it multiplies the logits and the attention weights instead of ``u``. With
``C_t`` channels of input type ``t``, ``W_l = sum_{pairs of l} (2 l_out + 1)`` basis columns and
``H`` heads, the multiply-adds per edge per layer are::

    angular    sum_t C_t (2 l_t + 1) W_{l_t}        radial   hidden num_radial + (hidden + 1) sum_t C_t W_{l_t}
    logits     H sum_t C_t W_{l_t}                  aggregate  H sum_t C_t W_{l_t}

and the channel mixing, ``sum_P C_out C_in (2 l_out + 1)`` for keys and values, runs per POINT,
``k`` times less often. The dense reference (``reference=True``) builds every per-edge kernel
``(C_out (2 l_out + 1), C_in (2 l_in + 1))`` explicitly (about ``3 C_out C_in (2 l_in + 1)(2 l_out + 1)``
multiply-adds per path per edge to build and apply it, for keys and values).
:meth:`HarmonicAttentionBackbone.flop_counts` gives both. A naive tensor product with a full
radial matrix per channel pair and path, the textbook form, costs
``sum_P C_out C_in (2 l_in + 1)(2 l_out + 1)(2 l_f + 1)`` per edge: the ``L^6`` growth.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import NamedTuple

import torch
from torch import nn

from shapes.backbones._base import (
    Backbone,
    check_flag,
    check_normals,
    check_points,
    masked_centroid,
    masked_max,
    masked_mean,
    neighbourhood,
)
from shapes.backbones._equivariant import (
    PARITY_MODES,
    EquivariantLinear,
    EquivariantNorm,
    GatedFeedForward,
    GlobalVectorReadout,
    angular_pairs,
    coupling_matrix,
    invariant_width,
    layer_paths,
    masked_softmax,
    parse_channels,
    point_invariants,
    safe_norm,
    weighted_softmax,
)
from shapes.backbones._radial import GaussianBasis, cosine_cutoff
from shapes.errors import ConfigError, InputError
from shapes.geometry import (
    clebsch_gordan,
    gather_neighbours,
    relative_vectors,
    spherical_harmonics,
)

__all__ = [
    "HarmonicAttentionBackbone",
    "HarmonicAttentionConfig",
    "HarmonicAttentionLayer",
    "EdgeFrame",
    "NormalInputs",
    "normal_inputs",
]


@dataclass
class HarmonicAttentionConfig:
    l_max: int = 2  # degree 2 sees the orientation of flats, slots and bores; 3 costs ~2x per layer
    channels: dict = field(default_factory=lambda: {0: 16, 1: 8, 2: 4})  # per degree AND parity; high degrees cost 2l+1 each
    layers: int = 3  # a pseudo-scalar needs three hops from the scalar input (two via the readout's dot products)
    heads: int = 2  # must divide every channel count; 2 heads keep per-head width >= 2 at degree 2
    k: int = 16  # neighbours per point; 16 spans a few mm on a 1024-point part
    radius: float | None = None  # None: k nearest neighbours; a number: neighbours within it (at most k)
    num_radial: int = 16  # Gaussians resolving edge lengths in [0, cutoff]
    radial_hidden: int = 32  # width of the radial MLP that turns the Gaussians into per-path weights
    cutoff: float = 1.0  # in RMS radii of the normalised part (filters fade to 0 there); ~4x a 16-NN radius
    parity: str = "full"  # "full": tell mirror twins apart (SE3); "even": reflection-invariant (E3)
    normals: bool = False  # True: also take outward surface normals (B, N, 3); False keeps bare point clouds working
    signed_normals: bool = False  # False: a normal counts as an axis (n and -n alike; see normal_inputs), so
    # estimated normals turned the wrong way on a scan do not read as the mirror image
    edge_block: int = 16384  # edges per block of the fast path: bounds its temporaries; results do not depend on it
    context: bool = True  # the cloud's mean of every feature type joins each layer and the readout (global shape, bracket hand)
    smooth_neighbours: bool = True  # taper the k neighbours to weight 0 at the (k+1)-th one's distance (and at
    # radius) and weight the attention by it: on a scan's lattice neighbours tie, and a hard kNN set let rounding
    # pick which tied point counted (features moved by up to 0.5 under rotation); False: the old hard graph

    def __post_init__(self):
        self.l_max = _count(self.l_max, "l_max", 0)
        if self.l_max > 3:
            raise ConfigError(f"l_max should be in 0..3, got {self.l_max}.")
        self.channels = parse_channels(self.channels, self.l_max)
        self.layers = _count(self.layers, "layers", 1)
        self.heads = _count(self.heads, "heads", 1)
        self.k = _count(self.k, "k", 1)
        self.num_radial = _count(self.num_radial, "num_radial", 1)
        self.radial_hidden = _count(self.radial_hidden, "radial_hidden", 1)
        self.edge_block = _count(self.edge_block, "edge_block", 1)
        if self.parity not in PARITY_MODES:
            raise ConfigError(f"parity should be one of {list(PARITY_MODES)}, got {self.parity!r}.")
        bad = {l: c for l, c in self.channels.items() if c % self.heads}
        if bad:
            raise ConfigError(f"heads = {self.heads} should divide every channel count, got channels {self.channels}.")
        if self.parity == "full" and (self.l_max < 1 or self.layers < 2):
            raise ConfigError(
                "parity 'full' needs l_max >= 1 and layers >= 2 to build pseudo-scalars, "
                f"got l_max = {self.l_max}, layers = {self.layers}; use parity 'even' for a smaller network."
            )
        self.cutoff = _positive(self.cutoff, "cutoff")
        if not isinstance(self.normals, bool):
            raise ConfigError(f"normals should be true or false, got {self.normals!r}.")
        if self.normals and 1 not in self.channels:
            raise ConfigError(
                f"normals: true feeds each normal in as a degree-1 feature and needs channels for degree 1, "
                f"got channels {self.channels}."
            )
        if self.radius is not None:
            self.radius = _positive(self.radius, "radius")
        if not isinstance(self.context, bool):
            raise ConfigError(f"context should be true or false, got {self.context!r}.")
        check_flag(self.smooth_neighbours, "harmonic_attention", "smooth_neighbours")
        check_flag(self.signed_normals, "harmonic_attention", "signed_normals")


def _count(value, name: str, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
        raise ConfigError(f"{name} should be an integer >= {minimum}, got {value!r}.")
    return value


def _positive(value, name: str) -> float:
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = math.nan
    if not number > 0 or math.isinf(number):
        raise ConfigError(f"{name} should be a positive number, got {value!r}.")
    return number


class EdgeFrame(NamedTuple):
    """Everything about the edges that all layers share, computed once per forward pass.

    Attributes
    ----------
    index, valid : (B, N, k) long, bool
        Senders of each receiver and which slots are real edges.
    vectors, length : (B, N, k, 3), (B, N, k) float
        Edge vectors ``x_j - x_i`` and their lengths (0 on invalid slots, which are self-loops).
    rbf : (B, N, k, num_radial) float
        Gaussian basis of the edge lengths.
    envelope : (B, N, k) float
        Cosine cutoff of the edge lengths times ``taper``: every edge's weight in the attention.
    taper : (B, N, k) float
        Neighbourhood weight of each edge (:func:`shapes.geometry.smooth_graph`: 0 at the ``(k+1)``-th
        neighbour's distance), or 1 on valid slots with ``smooth_neighbours: false``; 0 on invalid
        slots. Per-neighbourhood statistics (descriptors, normal inputs) are means with these weights.
    smooth : bool
        Whether attention weights its softmax by ``envelope`` (smooth neighbourhoods) or takes the
        softmax over the valid slots and multiplies by ``envelope`` afterwards (the old rule).
    harmonics : list of (B, N, k, 2l+1) float
        ``Y_l`` of the edge directions, ``l = 0..2 l_max`` (the reference path uses these).
    basis : dict l_in -> (B, N, k, 2 l_in + 1, W_l) float, or None
        Angular basis of every path from degree ``l_in``, columns in :func:`angular_pairs` order
        (None for the reference, which builds each path's basis itself).
    """

    index: torch.Tensor
    valid: torch.Tensor
    vectors: torch.Tensor
    length: torch.Tensor
    rbf: torch.Tensor
    envelope: torch.Tensor
    harmonics: list
    basis: dict | None
    taper: torch.Tensor
    smooth: bool

    def receivers(self, block: slice) -> "EdgeFrame":
        """The edges of the receivers ``block`` (dim 1), for the fast path (harmonics left out)."""
        basis = None if self.basis is None else {l: b[:, block] for l, b in self.basis.items()}
        return EdgeFrame(self.index[:, block], self.valid[:, block], self.vectors[:, block], self.length[:, block],
                         self.rbf[:, block], self.envelope[:, block], [], basis, self.taper[:, block], self.smooth)


NORMAL_SCALARS, NORMAL_VECTORS, NORMAL_PSEUDO = 5, 4, 3  # widths of the three parts of NormalInputs


class NormalInputs(NamedTuple):
    """Per-point inputs made from the surface normals (see :func:`normal_inputs`).

    Attributes
    ----------
    scalars : (B, N, NORMAL_SCALARS) float
        Proper scalars, unchanged by rotations and reflections.
    vectors : (B, N, NORMAL_VECTORS, 3) float
        Polar vectors in ``x, y, z`` order, turning as ``v -> Q v`` for every orthogonal ``Q``.
    pseudo : (B, N, NORMAL_PSEUDO) float
        Pseudo-scalars: unchanged by rotations, negated by reflections.
    """

    scalars: torch.Tensor
    vectors: torch.Tensor
    pseudo: torch.Tensor


def normal_inputs(points: torch.Tensor, normals: torch.Tensor, mask: torch.Tensor, edges: EdgeFrame,
                  signed: bool = True) -> NormalInputs:
    """Exactly equivariant per-point quantities of the points and their outward normals.

    With ``y`` a point's offset from the centroid in RMS radii, ``n`` its unit normal and
    ``M = 3 mean(y y^T) / mean|y|^2`` the cloud's normalised second moment (trace 3; ``M = I`` for
    an isotropic cloud), and over the valid edges ``j`` of a point:

    - scalars: ``n . y / |y|`` (outward facing), ``n^T M n`` (normal along the long axes),
      ``mean_j n . n_j`` (1 on a flat, less on a bend), ``n . mean_j r_ij / mean_j |r_ij|``
      (the sign tells a groove from a ridge) and the cloud's anisotropy
      ``a = tr (M - I)^3 = sum (eig M - 1)^3`` (> 0 for a rod, < 0 for a disc; no eigendecomposition);
    - vectors: ``n``, ``M n``, ``y`` and ``mean_j n_j``;
    - pseudo-scalars: ``chi = det[y, n, M n]``, ``chi a``, and the cloud's ``mean(chi) a`` at every
      point. A helical flank tilts ``n`` about the axis in a sense set by the hand, so ``mean(chi)``
      takes the hand's sign; ``a`` makes the sign the same for a long stud and a flat gear.

    With ``signed=False`` every quantity is even in each point's normal (``n -> -n`` point by point
    changes nothing), for normals estimated from a scan's points, whose signs are unreliable (a field
    of reversed normals reads as the mirror image in the odd terms). Each term odd in ``n`` is
    multiplied by ``w = n . y / |y|``, the normal's lean away from the centroid: the scalars become
    ``w^2``, ``w n . mean_j r_ij / mean_j |r_ij|`` and ``w n . mean_j w_j n_j``; the vectors
    ``w n``, ``w M n``, ``y`` and ``mean_j w_j n_j``. ``n^T M n`` and ``chi`` are even already.

    Parameters
    ----------
    points : (B, N, 3) float
        Centred on the real points; padding at 0.
    normals : (B, N, 3) float
        Unit outward normals; padding at 0.
    mask : (B, N) bool
    edges : EdgeFrame
        Neighbourhoods of ``points``.

    Returns
    -------
    NormalInputs
    """
    tiny = 1e-24  # far below any real squared length (coordinates are in RMS radii)
    y = points / torch.sqrt(masked_mean(points.square().sum(-1), mask) + tiny)[:, None, None]  # (B, N, 3)
    second = masked_mean(y[..., :, None] * y[..., None, :], mask)  # (B, 3, 3)
    moment = 3 * second / (second.diagonal(dim1=-2, dim2=-1).sum(-1)[:, None, None] + tiny)
    shifted = moment - torch.eye(3, dtype=y.dtype, device=y.device)
    aniso = torch.einsum("bij,bjk,bki->b", shifted, shifted, shifted)  # (B,)
    mn = normals @ moment  # (B, N, 3); M is symmetric, so this is M n per point
    chi = (torch.linalg.cross(y, normals) * mn).sum(-1)  # (B, N): det[y, n, M n]
    cloud = masked_mean(chi, mask) * aniso  # (B,)
    nmn = (normals * mn).sum(-1)  # (B, N): n^T M n
    facing = (normals * y).sum(-1) / safe_norm(y)  # (B, N): n . y / |y|
    if not signed:  # every odd use of n below takes w n instead, w = n . y / |y|: even in the sign of n
        normals, mn = normals * facing[..., None], mn * facing[..., None]
        facing = facing * facing

    valid = edges.taper.to(y.dtype)[..., None]  # (B, N, k, 1): neighbourhood weights, 0 on invalid slots
    count = valid.sum(-2).clamp_min(1.0)  # (B, N, 1)
    mean_nj = (gather_neighbours(normals, edges.index) * valid).sum(-2) / count  # (B, N, 3)
    mean_r = (edges.vectors * valid).sum(-2) / count  # (B, N, 3)
    mean_length = (edges.length * valid[..., 0]).sum(-1) / count[..., 0]  # invalid slots have length 0
    scalars = torch.stack(
        [
            facing,
            nmn,
            (normals * mean_nj).sum(-1),
            (normals * mean_r).sum(-1) / (mean_length + 1e-6),
            aniso[:, None].expand_as(chi),
        ],
        -1,
    )  # (B, N, NORMAL_SCALARS)
    vectors = torch.stack([normals, mn, y, mean_nj], -2)  # (B, N, NORMAL_VECTORS, 3)
    pseudo = torch.stack([chi, chi * aniso[:, None], cloud[:, None].expand_as(chi)], -1)  # (B, N, NORMAL_PSEUDO)
    return NormalInputs(scalars, vectors, pseudo)


class _Group(NamedTuple):
    """The paths of one input type and where they sit in the basis and radial columns."""

    t_in: tuple
    paths: list  # global path indices, in basis-column order
    widths: list  # basis columns (2 l_out + 1) of each path
    radial_slice: slice  # radial outputs of these paths: (n_paths, C_in) path-major
    keys: list  # positions in `paths` of the key paths (output type is a query type)
    key_ids: list  # index into the key-weight list of each key path


class HarmonicAttentionLayer(nn.Module):
    """One equivariant attention block plus a gated feed-forward block, both residual.

    Shape:
        {t: (B, N, C[t], 2l+1)} for ``types_in`` -> {t: (B, N, C[t], 2l+1)} for ``types_out``
    """

    def __init__(self, types_in: dict, channels: dict, parity: str, heads: int, num_radial: int, radial_hidden: int,
                 context: bool, edge_block: int):
        super().__init__()
        self.edge_block = edge_block
        self.types_in = dict(types_in)
        self.heads = heads
        self.paths = layer_paths(types_in, list(channels), parity)
        reached = {p.t_out for p in self.paths}
        self.types_out = {t: channels[t[0]] for t in sorted(set(types_in) | reached, key=lambda t: (t[0], -t[1]))}
        # Keys exist only for types the receiver has a query for (the first layer: scalars only).
        self.key_paths = [i for i, p in enumerate(self.paths) if p.t_out in types_in]

        fan_in = {t: 0 for t in self.types_out}
        for p in self.paths:
            fan_in[p.t_out] += types_in[p.t_in]
        key_fan_in = {t: 0 for t in types_in}
        for i in self.key_paths:
            key_fan_in[self.paths[i].t_out] += types_in[self.paths[i].t_in]

        def weight(p, fan):
            return nn.Parameter(torch.randn(self.types_out[p.t_out], types_in[p.t_in]) / math.sqrt(fan[p.t_out]))

        self.w_value = nn.ParameterList(weight(p, fan_in) for p in self.paths)  # (C_out, C_in) per path
        self.w_key = nn.ParameterList(weight(self.paths[i], key_fan_in) for i in self.key_paths)

        # Radial outputs: one weight per (path, input channel), shared by the key and the value of
        # the path (they differ by their channel mixing), so one per-edge tensor serves both.
        self.groups: list[_Group] = []
        at = 0
        key_pos = {i: n for n, i in enumerate(self.key_paths)}
        for g, (t_in, c_in) in enumerate(types_in.items()):
            ids = [i for i, p in enumerate(self.paths) if p.t_in == t_in]
            widths = [2 * self.paths[i].t_out[0] + 1 for i in ids]
            keys = [n for n, i in enumerate(ids) if i in key_pos]
            group = _Group(
                t_in=t_in,
                paths=ids,
                widths=widths,
                radial_slice=slice(at, at + len(ids) * c_in),
                keys=keys,
                key_ids=[key_pos[ids[n]] for n in keys],
            )
            # Rows of the radial output layer that give, for every (channel, basis column), the
            # weight of that column's path: the fast path multiplies them straight into Z.
            path_of_col = [n for n, w in enumerate(widths) for _ in range(w)]
            rows = [at + n * c_in + c for c in range(c_in) for n in path_of_col]
            self.register_buffer(f"rows_{g}", torch.tensor(rows, dtype=torch.long), persistent=False)
            at += len(ids) * c_in
            self.groups.append(group)
        self.n_radial = at
        self.radial_hidden = nn.Sequential(nn.Linear(num_radial, radial_hidden), nn.SiLU())
        self.radial_out = nn.Linear(radial_hidden, at)

        self.norm = EquivariantNorm(types_in)
        self.query = EquivariantLinear(types_in, types_in)
        self.out = EquivariantLinear(self.types_out, self.types_out)
        self.ff_norm = EquivariantNorm(self.types_out)
        self.ff = GatedFeedForward(self.types_out)
        # The cloud's mean of each type, mixed per type, joins every point's feed-forward input:
        # a mean of equivariant features is equivariant, so this keeps every type exactly.
        self.context = EquivariantLinear(self.types_out, self.types_out) if context else None
        d_head = sum(c // heads * (2 * l + 1) for (l, _), c in types_in.items())
        self.scale = 1.0 / math.sqrt(d_head)

    def forward(self, h: dict, edges: EdgeFrame, mask: torch.Tensor, reference: bool = False) -> dict:
        x = self.norm(h)
        q = self.query(x)
        if reference:
            msg = self._attend_reference(x, q, self.radial_hidden(edges.rbf), edges)
        else:
            msg = self._attend_blocks(x, q, edges)
        msg = self.out(msg)
        h = {t: msg[t] + h[t] if t in h else msg[t] for t in self.types_out}
        y = self.ff_norm(h)
        if self.context is not None:
            pooled = self.context({t: masked_mean(v, mask).unsqueeze(1) for t, v in y.items()})  # (B, 1, C, 2l+1)
            y = {t: v + pooled[t] for t, v in y.items()}
        update = self.ff(y)
        return {t: h[t] + update[t] for t in self.types_out}

    # -- fast path ---------------------------------------------------------------------------

    def _radial_columns(self, hidden: torch.Tensor, rows: torch.Tensor) -> torch.Tensor:
        """Radial weights already spread over basis columns: ``(B, N, k, C*W)``, one GEMM."""
        return nn.functional.linear(hidden, self.radial_out.weight[rows], self.radial_out.bias[rows])

    def _attend_blocks(self, x: dict, q: dict, edges: EdgeFrame) -> dict:
        """The fast path over blocks of about ``edge_block`` edges (whole receivers), concatenated.

        Every per-edge quantity belongs to one receiver, so blocks of receivers are independent and
        the result does not depend on the block size; what changes is the size of each temporary.
        Large per-edge tensors are memory-bound (and, freshly allocated, page-faulted each pass):
        measured by bench/bench_harmonic.py (1 thread), B = 8, N = 1024 in blocks of 16384 edges ran
        1.7x faster than in one piece, and time against N became about linear.
        """
        B, N, K = edges.index.shape
        rows = max(1, self.edge_block // max(B * K, 1))
        if rows >= N:
            return self._attend_fast(x, q, edges, slice(None))
        parts = [self._attend_fast(x, q, edges, slice(start, start + rows)) for start in range(0, N, rows)]
        return {t: torch.cat([part[t] for part in parts], 1) for t in parts[0]}

    def _attend_fast(self, x: dict, q: dict, edges: EdgeFrame, block: slice) -> dict:
        """Attention for the receivers ``block`` (senders may be any point)."""
        edges = edges.receivers(block)
        q = {t: v[:, block] for t, v in q.items()}
        hidden = self.radial_hidden(edges.rbf)  # (B, n, k, radial_hidden)
        # The cutoff envelope is a per-edge scalar and everything is linear in the radial weights,
        # so it multiplies the logits and the attention weights instead of every radial weight.
        H = self.heads
        logits = 0.0
        weighted = []
        for g, group in enumerate(self.groups):
            l_in = group.t_in[0]
            xj = gather_neighbours(x[group.t_in], edges.index)  # (B, N, k, C, 2l+1)
            basis = edges.basis[l_in]  # (B, N, k, 2l+1, W)
            z = xj * basis if l_in == 0 else xj @ basis  # (B, N, k, C, W)
            u = z.flatten(-2) * self._radial_columns(hidden, getattr(self, f"rows_{g}"))  # (B, N, k, C*W)
            weighted.append(u)
            if not group.keys:
                continue
            # Pull each query back through its key mixing, on the receiver: q~ = W^K^T q per head;
            # paths without a key (no query of their output type) get zero columns.
            B, N = u.shape[:2]
            c_in = self.types_in[group.t_in]
            pulled = [u.new_zeros(B, N, H, c_in, width) for width in group.widths]
            for n, key_id in zip(group.keys, group.key_ids):
                t_out = self.paths[group.paths[n]].t_out
                c_out = self.types_in[t_out]
                qh = q[t_out].unflatten(2, (H, c_out // H))  # (B, N, H, C_out/H, 2l_out+1)
                w = self.w_key[key_id].unflatten(0, (H, c_out // H))  # (H, C_out/H, C_in)
                pulled[n] = torch.einsum("bnhom,hoc->bnhcm", qh, w)  # (B, N, H, C_in, 2l_out+1)
            pulled = torch.cat(pulled, -1).flatten(-2)  # (B, N, H, C*W)
            logits = logits + u @ pulled.transpose(-1, -2)  # (B, N, k, H)
        logits = logits * (edges.envelope[..., None] * self.scale)
        alpha = self._weights(logits, edges)  # (B, N, k, H)
        out = {}
        for group, u in zip(self.groups, weighted):
            c_in = self.types_in[group.t_in]
            agg = (alpha.transpose(-1, -2) @ u).unflatten(-1, (c_in, -1))  # (B, N, H, C, W)
            for i, part in zip(group.paths, agg.split(group.widths, -1)):
                t_out = self.paths[i].t_out
                c_out = self.types_out[t_out]
                w = self.w_value[i].unflatten(0, (H, c_out // H))  # (H, C_out/H, C_in)
                o = torch.einsum("bnhcm,hoc->bnhom", part, w).flatten(2, 3)  # (B, N, C_out, 2l_out+1)
                out[t_out] = out[t_out] + o if t_out in out else o
        return out

    @staticmethod
    def _weights(logits: torch.Tensor, edges: EdgeFrame) -> torch.Tensor:
        """Attention weights ``(B, N, k, H)`` from invariant logits; both paths use this rule.

        Smooth neighbourhoods: a softmax in which every edge counts with its weight ``envelope``
        (cutoff x taper), so an edge fading out at the ``(k+1)``-th neighbour's distance leaves the
        normalisation as smoothly as its own share. Otherwise the old rule: softmax over the valid
        slots, times the envelope.
        """
        if edges.smooth:
            return weighted_softmax(logits, edges.envelope[..., None].expand_as(logits), dim=2)
        return masked_softmax(logits, edges.valid[..., None], dim=2) * edges.envelope[..., None]

    # -- reference ---------------------------------------------------------------------------

    def _path_radial(self, radial: torch.Tensor, path_id: int) -> torch.Tensor:
        """Radial weights ``(B, N, k, C_in)`` of one path, read from the shared radial output."""
        for group in self.groups:
            if path_id in group.paths:
                n = group.paths.index(path_id)
                c_in = self.types_in[group.t_in]
                start = group.radial_slice.start
                return radial[..., start + n * c_in : start + (n + 1) * c_in]
        raise AssertionError(f"path {path_id} is in no group")

    def _attend_reference(self, x: dict, q: dict, hidden: torch.Tensor, edges: EdgeFrame) -> dict:
        """Dense per-edge kernels, one path at a time: slow, and obviously equivariant."""
        B, N, K = edges.index.shape
        radial = self.radial_out(hidden) * edges.envelope[..., None]  # (B, N, k, n_radial)
        H = self.heads
        keys, values = {}, {}
        for i, p in enumerate(self.paths):
            (l_in, _), (l_out, _) = p.t_in, p.t_out
            c_in, c_out = self.types_in[p.t_in], self.types_out[p.t_out]
            cg = clebsch_gordan(l_in, p.l_f, l_out, dtype=radial.dtype, device=radial.device)
            basis = torch.einsum("bnkf,ifo->bnkio", edges.harmonics[p.l_f], cg)  # (B, N, k, 2l_in+1, 2l_out+1)
            xj = gather_neighbours(x[p.t_in], edges.index).flatten(-2)  # (B, N, k, C_in*(2l_in+1))
            r = self._path_radial(radial, i)  # (B, N, k, C_in), shared by the key and the value
            targets = [(values, self.w_value[i])]
            if i in self.key_paths:
                targets.append((keys, self.w_key[self.key_paths.index(i)]))
            for store, w in targets:
                kernel = torch.einsum("oc,bnkc,bnkij->bnkojci", w, r, basis)  # (B, N, k, C_out, 2l_out+1, C_in, 2l_in+1)
                kernel = kernel.reshape(B, N, K, c_out * (2 * l_out + 1), c_in * (2 * l_in + 1))
                y = (kernel @ xj.unsqueeze(-1)).squeeze(-1).unflatten(-1, (c_out, 2 * l_out + 1))  # (B, N, k, C_out, 2l_out+1)
                store[p.t_out] = store[p.t_out] + y if p.t_out in store else y
        logits = 0.0
        for t, k_t in keys.items():
            c = self.types_in[t]
            qh = q[t].unflatten(2, (H, c // H)).unsqueeze(2)  # (B, N, 1, H, C/H, 2l+1)
            logits = logits + (qh * k_t.unflatten(3, (H, c // H))).sum((-1, -2))  # (B, N, k, H)
        if edges.smooth:
            # the values carry the envelope already (through the radial weights), so their shares leave
            # out each edge's own weight: alpha_j v_j is then exactly the fast path's
            envelope = edges.envelope[..., None].expand(B, N, K, H)
            alpha = weighted_softmax(logits * self.scale, envelope, dim=2, own_weight=False)
        else:
            valid = edges.valid[..., None].expand(B, N, K, H)
            any_valid = valid.any(2, keepdim=True)
            alpha = torch.softmax((logits * self.scale).masked_fill(~(valid | ~any_valid), -math.inf), dim=2)
            alpha = alpha * any_valid  # an all-invalid neighbourhood sends nothing
        out = {}
        for t, v in values.items():
            c = self.types_out[t]
            out[t] = torch.einsum("bnkh,bnkhom->bnhom", alpha, v.unflatten(3, (H, c // H))).flatten(2, 3)  # (B, N, C, 2l+1)
        return out

    # -- cost --------------------------------------------------------------------------------

    def flop_counts(self, num_radial: int, radial_hidden: int) -> dict:
        """Analytic multiply-add counts: per edge of the fast path, per point, per edge of the reference."""
        H = self.heads
        angular = weighting = logits = aggregate = 0
        for group in self.groups:
            l_in = group.t_in[0]
            c_in = self.types_in[group.t_in]
            width = sum(group.widths)
            angular += c_in * (2 * l_in + 1) * width
            # the radial GEMM writes its weights already spread over the basis columns, then one product
            weighting += (radial_hidden + 1) * c_in * width
            logits += H * c_in * width if group.keys else 0
            aggregate += H * c_in * width
        radial = radial_hidden * num_radial
        mixing = 0
        reference = radial + radial_hidden * self.n_radial
        for i, p in enumerate(self.paths):
            (l_in, _), (l_out, _) = p.t_in, p.t_out
            dense = self.types_out[p.t_out] * (2 * l_out + 1) * self.types_in[p.t_in] * (2 * l_in + 1)
            copies = 2 if i in self.key_paths else 1
            mixing += copies * self.types_out[p.t_out] * self.types_in[p.t_in] * (2 * l_out + 1)
            # build the kernel (two products per entry) and apply it, plus the path's own basis
            reference += copies * 3 * dense + (2 * p.l_f + 1) * (2 * l_in + 1) * (2 * l_out + 1)
        return {
            "edge": {"angular": angular, "radial": radial + weighting, "logits": logits, "aggregate": aggregate},
            "point": {"mixing": mixing},
            "reference_edge": reference,
        }


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
        self.pairs = {l: angular_pairs(l, self.degrees, c.parity) for l in self.degrees}
        self.l_f_max = max(l_f for pairs in self.pairs.values() for l_f, _ in pairs)
        c0 = c.channels[0]
        # Invariant descriptors -> proper scalars; without normals the only input, filters build the rest.
        self.centroid_rbf = GaussianBasis(c.num_radial, 3.0)  # normalised parts lie within ~3 RMS radii
        width = c.num_radial + 4 + (NORMAL_SCALARS if c.normals else 0)
        self.embed = nn.Sequential(nn.Linear(width, c0), nn.SiLU(), nn.Linear(c0, c0))
        self.rbf = GaussianBasis(c.num_radial, c.cutoff)
        types = {(0, 1): c0}
        if c.normals:
            # Each input channel is a sum of equivariant inputs weighted by proper scalars of the same
            # point (a linear map of the embedded invariants), so it keeps its type exactly:
            # scalar x polar vector = polar vector, scalar x pseudo-scalar = pseudo-scalar.
            if c.parity == "full":
                self.pseudo_mix = nn.Linear(c0, c0 * NORMAL_PSEUDO)
                types[(0, -1)] = c0
            self.vector_mix = nn.Linear(c0, c.channels[1] * NORMAL_VECTORS)
            types[(1, -1)] = c.channels[1]
        self.uses_normals = c.normals
        layers = []
        for _ in range(c.layers):
            layers.append(
                HarmonicAttentionLayer(types, c.channels, c.parity, c.heads, c.num_radial, c.radial_hidden, c.context,
                                       c.edge_block)
            )
            types = layers[-1].types_out
        self.layers = nn.ModuleList(layers)
        self.types_out = types
        self.final_norm = EquivariantNorm(types)
        vectors = types.get((1, -1), 0) if c.context else 0
        self.global_readout = GlobalVectorReadout(vectors, chiral=c.parity == "full") if vectors else None
        self._coupling: dict = {}  # (l_in, dtype, device) -> coupling matrix, built from float64 tables
        self.symmetry = "SE3" if c.parity == "full" else "E3"
        self.out_features = 2 * invariant_width(types) + (self.global_readout.width if self.global_readout else 0)

    def _coupling_matrix(self, l_in: int, dtype, device) -> torch.Tensor:
        key = (l_in, dtype, str(device))
        if key not in self._coupling:
            self._coupling[key] = coupling_matrix(l_in, self.pairs[l_in], self.l_f_max, clebsch_gordan, dtype, device)
        return self._coupling[key]

    def edge_frame(self, points: torch.Tensor, mask: torch.Tensor, reference: bool = False) -> EdgeFrame:
        """Neighbourhoods and the per-edge radial and angular bases, shared by every layer."""
        c = self.config
        nb = neighbourhood(points, c.k, mask, c.radius, c.smooth_neighbours)
        r = relative_vectors(points, nb.index)  # (B, N, k, 3), sender - receiver
        dist = safe_norm(r) * nb.valid  # (B, N, k); invalid slots are self-loops of length 0
        harmonics = spherical_harmonics(self.l_f_max, r)  # list of (B, N, k, 2l+1)
        envelope = cosine_cutoff(dist, c.cutoff) * nb.weight  # (B, N, k): cutoff x taper (x valid)
        basis = None
        if not reference:
            y = torch.cat(harmonics, -1)  # (B, N, k, (l_f_max+1)^2)
            basis = {
                l: (y @ self._coupling_matrix(l, y.dtype, y.device)).unflatten(-1, (2 * l + 1, -1))  # (B, N, k, 2l+1, W)
                for l in self.degrees
            }
        return EdgeFrame(nb.index, nb.valid, r, dist, self.rbf(dist), envelope, harmonics, basis, nb.weight,
                         c.smooth_neighbours)

    def forward_features(self, points: torch.Tensor, mask: torch.Tensor | None = None,
                         normals: torch.Tensor | None = None, reference: bool = False) -> list:
        """Per-layer feature dicts ``{(l, p): (B, N, C_l, 2l+1)}``, one per layer (equivariant)."""
        h, _ = self._run(points, mask, normals, reference)
        return h

    def forward(self, points: torch.Tensor, mask: torch.Tensor | None = None,
                normals: torch.Tensor | None = None, reference: bool = False) -> torch.Tensor:
        """Invariant features ``(B, out_features)``; ``normals (B, N, 3)`` are needed with ``normals: true``
        and ignored otherwise."""
        per_layer, mask = self._run(points, mask, normals, reference)
        last = self.final_norm(per_layer[-1])
        inv = point_invariants(last, self.types_out)  # (B, N, F)
        parts = [masked_mean(inv, mask), masked_max(inv, mask)]  # (B, F) each
        if self.global_readout is not None:
            parts.append(self.global_readout(masked_mean(last[(1, -1)], mask)))  # (B, G)
        return torch.cat(parts, -1)

    def _run(self, points, mask, normals, reference):
        mask = check_points(points, mask)
        c = self.config
        normals = check_normals(normals, points) if c.normals else None
        if c.radius is None:
            smallest = int(mask.sum(1).min()) if mask.numel() else 0
            if smallest <= c.k:
                raise InputError(f"k = {c.k} neighbours needs clouds of at least {c.k + 1} points, got {smallest}.")
        # Padding never reaches a real point (it is no one's neighbour); zeroing it keeps junk finite.
        points = points.masked_fill(~mask[..., None], 0.0)
        points = torch.where(mask[..., None], points - masked_centroid(points, mask), points)
        edges = self.edge_frame(points, mask, reference)
        h = self._inputs(points, mask, normals, edges)
        per_layer = []
        for layer in self.layers:
            h = layer(h, edges, mask, reference)
            per_layer.append(h)
        return per_layer, mask

    def _inputs(self, points, mask, normals, edges) -> dict:
        """First-layer features: embedded invariants, and with normals the normal-made channels."""
        descriptors = self._descriptors(points, edges)  # (B, N, num_radial + 4)
        if normals is None:
            return {(0, 1): self.embed(descriptors).unsqueeze(-1)}  # (B, N, C0, 1)
        # Unit length (a scale-free input) and 0 on padding; sqrt(eps) keeps a zero normal finite.
        normals = normals.masked_fill(~mask[..., None], 0.0)
        normals = normals / safe_norm(normals, eps=1e-24)[..., None]
        extra = normal_inputs(points, normals, mask, edges, signed=self.config.signed_normals)
        scalars = self.embed(torch.cat([descriptors, extra.scalars], -1))  # (B, N, C0)
        h = {(0, 1): scalars.unsqueeze(-1)}  # (B, N, C0, 1)
        if (0, -1) in self.layers[0].types_in:
            weights = self.pseudo_mix(scalars).unflatten(-1, (-1, NORMAL_PSEUDO))  # (B, N, C0, P)
            h[(0, -1)] = (weights * extra.pseudo[:, :, None]).sum(-1, keepdim=True)  # (B, N, C0, 1)
        weights = self.vector_mix(scalars).unflatten(-1, (-1, NORMAL_VECTORS))  # (B, N, C1, V)
        # docs/design.md, "Spherical harmonics": degree-1 components are stored in the order of Y_1, (y, z, x)
        h[(1, -1)] = weights @ extra.vectors[..., [1, 2, 0]]  # (B, N, C1, 3)
        return h

    def _descriptors(self, points: torch.Tensor, edges: EdgeFrame) -> torch.Tensor:
        """Invariant per-point inputs ``(B, N, num_radial + 4)``, all unchanged by rotations and reflections.

        Gaussians of the distance to the centroid; the mean edge length; and three dimensionless
        shape numbers of the neighbourhood's second moment ``M = mean_j r_ij r_ij^T``: the length
        of the mean offset over the mean edge length (about 0 inside a surface, larger at a rim),
        ``|M|_F / tr M`` (1 on a wire, 1/sqrt 2 on a flat) and ``27 det M / (tr M)^3`` (0 on a
        flat, 1 for an isotropic blob). Smooth polynomials of ``M``, no eigen-decomposition, so
        the gradient is finite everywhere.
        """
        valid = edges.taper.to(points.dtype)  # neighbourhood weights (1 or the taper), 0 on invalid slots
        count = valid.sum(-1).clamp_min(1.0)  # (B, N)
        r = edges.vectors * valid[..., None]  # (B, N, k, 3)
        mean_length = (edges.length * valid).sum(-1) / count  # invalid slots have length 0
        # Floors far below any real edge (coordinates are in RMS radii) keep empty neighbourhoods finite.
        offset = safe_norm(r.sum(-2) / count[..., None]) / (mean_length + 1e-6)
        moment = torch.einsum("bnki,bnkj->bnij", r, edges.vectors) / count[..., None, None]  # (B, N, 3, 3): weighted
        trace = moment.diagonal(dim1=-2, dim2=-1).sum(-1) + 1e-12  # (B, N)
        spread = safe_norm(moment.flatten(-2)) / trace
        # det as a triple product of rows: a polynomial, so its gradient is finite at singular M
        det = (moment[..., 0, :] * torch.linalg.cross(moment[..., 1, :], moment[..., 2, :])).sum(-1)
        volume = 27 * det / trace**3
        return torch.cat(
            [self.centroid_rbf(safe_norm(points)), torch.stack([mean_length, offset, spread, volume], -1)], -1
        )

    def flop_counts(self) -> list:
        """Analytic multiply-add counts per layer (see :meth:`HarmonicAttentionLayer.flop_counts`)."""
        c = self.config
        return [layer.flop_counts(c.num_radial, c.radial_hidden) for layer in self.layers]
