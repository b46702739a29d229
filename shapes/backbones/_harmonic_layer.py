"""One layer of the harmonic-attention backbone: equivariant attention over a neighbourhood with
spherical-harmonic filters, then a gated feed-forward block, both residual (pre-norm).

A filter path ``(l_in, p_in) -> (l_out, p_in (-1)^{l_f})`` goes through the harmonic ``Y_{l_f}`` of
the edge direction and the coupling coefficients ``C[l_in, l_f -> l_out]`` (docs/design.md,
"Coupling coefficients"), so parity is tracked exactly: from a proper input the output is proper
exactly when ``l_in + l_f + l_out`` is even. ``symmetry: se3`` keeps every path (pseudo-quantities get
their own channels); ``e3`` keeps only the paths between proper types. The math of one layer, the
fast path and its cost are in the docstrings of ``harmonic_attention`` and ``_dense_reference``.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import torch
from torch import nn

from shapes.backbones._base import masked_mean
from shapes.backbones._dense_reference import attend_reference, flop_counts
from shapes.backbones._equivariant import (
    EquivariantLinear,
    EquivariantNorm,
    GatedFeedForward,
    masked_softmax,
    weighted_softmax,
)
from shapes.backbones._features import proper_parity
from shapes.geometry import gather_neighbours

__all__ = ["HarmonicAttentionLayer", "Path", "angular_pairs", "layer_paths", "coupling_matrix"]


class Path(NamedTuple):
    """One filter path: sender type ``t_in`` through harmonic degree ``l_f`` into type ``t_out``."""

    t_in: FeatureType
    l_f: int
    t_out: FeatureType


def angular_pairs(l_in: int, degrees, symmetry: str) -> list[tuple[int, int]]:
    """The ``(l_f, l_out)`` pairs a degree-``l_in`` input couples to, in a fixed order.

    Every ``l_out`` in ``degrees`` and every ``l_f`` in the triangle ``|l_in - l_out| <= l_f <= l_in + l_out``;
    with ``symmetry`` ``e3`` only the pairs with ``l_in + l_f + l_out`` even (proper in, proper out).
    The same list, in the same order, fixes the columns of the shared per-edge angular basis.
    """
    pairs = []
    for l_out in degrees:
        for l_f in range(abs(l_in - l_out), l_in + l_out + 1):
            if symmetry == "e3" and (l_in + l_f + l_out) % 2:
                continue
            pairs.append((l_f, l_out))
    return pairs


def layer_paths(types_in, degrees, symmetry: str) -> list[Path]:
    """All paths from the given input types, in the order of :func:`angular_pairs` per input type."""
    paths = []
    for t_in in types_in:
        l_in, p_in = t_in
        for l_f, l_out in angular_pairs(l_in, degrees, symmetry):
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

    def __init__(self, types_in: dict, channels: dict, symmetry: str, heads: int, num_radial: int, radial_hidden: int,
                 context: bool, edge_block: int):
        super().__init__()
        self.edge_block = edge_block
        self.types_in = dict(types_in)
        self.heads = heads
        self.paths = layer_paths(types_in, list(channels), symmetry)
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

    def forward(self, h: dict, edges, mask: torch.Tensor, reference: bool = False) -> dict:
        x = self.norm(h)
        q = self.query(x)
        if reference:
            msg = attend_reference(self, x, q, self.radial_hidden(edges.rbf), edges)
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

    def _attend_blocks(self, x: dict, q: dict, edges) -> dict:
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

    def _attend_fast(self, x: dict, q: dict, edges, block: slice) -> dict:
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
    def _weights(logits: torch.Tensor, edges) -> torch.Tensor:
        """Attention weights ``(B, N, k, H)`` from invariant logits; both paths use this rule.

        Smooth neighbourhoods: a softmax in which every edge counts with its weight ``envelope``
        (cutoff x taper), so an edge fading out at the ``(k+1)``-th neighbour's distance leaves the
        normalisation as smoothly as its own share. Otherwise the old rule: softmax over the valid
        slots, times the envelope.
        """
        if edges.smooth:
            return weighted_softmax(logits, edges.envelope[..., None].expand_as(logits), dim=2)
        return masked_softmax(logits, edges.valid[..., None], dim=2) * edges.envelope[..., None]

    def flop_counts(self, num_radial: int, radial_hidden: int) -> dict:
        """Analytic multiply-add counts (:func:`shapes.backbones._dense_reference.flop_counts`)."""
        return flop_counts(self, num_radial, radial_hidden)
