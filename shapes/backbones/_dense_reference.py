"""The dense reference of the harmonic attention and the cost counts of both paths.

The fast path (``_harmonic_layer``) is what trains; this reference builds every per-edge kernel
explicitly, one path at a time: slow, and obviously equivariant. Tests check that the two agree,
values and gradients, to round-off.

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

import torch

from shapes.backbones._equivariant import weighted_softmax
from shapes.geometry import clebsch_gordan, gather_neighbours

__all__ = ["attend_reference", "path_radial", "flop_counts"]


def path_radial(layer, radial: torch.Tensor, path_id: int) -> torch.Tensor:
    """Radial weights ``(B, N, k, C_in)`` of one path, read from the shared radial output."""
    for group in layer.groups:
        if path_id in group.paths:
            n = group.paths.index(path_id)
            c_in = layer.types_in[group.t_in]
            start = group.radial_slice.start
            return radial[..., start + n * c_in : start + (n + 1) * c_in]
    raise AssertionError(f"path {path_id} is in no group")


def attend_reference(layer, x: dict, q: dict, hidden: torch.Tensor, edges) -> dict:
    """Dense per-edge kernels, one path at a time: slow, and obviously equivariant."""
    B, N, K = edges.index.shape
    radial = layer.radial_out(hidden) * edges.envelope[..., None]  # (B, N, k, n_radial)
    H = layer.heads
    keys, values = {}, {}
    for i, p in enumerate(layer.paths):
        (l_in, _), (l_out, _) = p.t_in, p.t_out
        c_in, c_out = layer.types_in[p.t_in], layer.types_out[p.t_out]
        cg = clebsch_gordan(l_in, p.l_f, l_out, dtype=radial.dtype, device=radial.device)
        basis = torch.einsum("bnkf,ifo->bnkio", edges.harmonics[p.l_f], cg)  # (B, N, k, 2l_in+1, 2l_out+1)
        xj = gather_neighbours(x[p.t_in], edges.index).flatten(-2)  # (B, N, k, C_in*(2l_in+1))
        r = path_radial(layer, radial, i)  # (B, N, k, C_in), shared by the key and the value
        targets = [(values, layer.w_value[i])]
        if i in layer.key_paths:
            targets.append((keys, layer.w_key[layer.key_paths.index(i)]))
        for store, w in targets:
            kernel = torch.einsum("oc,bnkc,bnkij->bnkojci", w, r, basis)  # (B, N, k, C_out, 2l_out+1, C_in, 2l_in+1)
            kernel = kernel.reshape(B, N, K, c_out * (2 * l_out + 1), c_in * (2 * l_in + 1))
            y = (kernel @ xj.unsqueeze(-1)).squeeze(-1).unflatten(-1, (c_out, 2 * l_out + 1))  # (B, N, k, C_out, 2l_out+1)
            store[p.t_out] = store[p.t_out] + y if p.t_out in store else y
    logits = 0.0
    for t, k_t in keys.items():
        c = layer.types_in[t]
        qh = q[t].unflatten(2, (H, c // H)).unsqueeze(2)  # (B, N, 1, H, C/H, 2l+1)
        logits = logits + (qh * k_t.unflatten(3, (H, c // H))).sum((-1, -2))  # (B, N, k, H)
    if edges.smooth:
        # the values carry the envelope already (through the radial weights), so their shares leave
        # out each edge's own weight: alpha_j v_j is then exactly the fast path's
        envelope = edges.envelope[..., None].expand(B, N, K, H)
        alpha = weighted_softmax(logits * layer.scale, envelope, dim=2, own_weight=False)
    else:
        valid = edges.valid[..., None].expand(B, N, K, H)
        any_valid = valid.any(2, keepdim=True)
        alpha = torch.softmax((logits * layer.scale).masked_fill(~(valid | ~any_valid), -math.inf), dim=2)
        alpha = alpha * any_valid  # an all-invalid neighbourhood sends nothing
    out = {}
    for t, v in values.items():
        c = layer.types_out[t]
        out[t] = torch.einsum("bnkh,bnkhom->bnhom", alpha, v.unflatten(3, (H, c // H))).flatten(2, 3)  # (B, N, C, 2l+1)
    return out


def flop_counts(layer, num_radial: int, radial_hidden: int) -> dict:
    """Analytic multiply-add counts: per edge of the fast path, per point, per edge of the reference."""
    H = layer.heads
    angular = weighting = logits = aggregate = 0
    for group in layer.groups:
        l_in = group.t_in[0]
        c_in = layer.types_in[group.t_in]
        width = sum(group.widths)
        angular += c_in * (2 * l_in + 1) * width
        # the radial GEMM writes its weights already spread over the basis columns, then one product
        weighting += (radial_hidden + 1) * c_in * width
        logits += H * c_in * width if group.keys else 0
        aggregate += H * c_in * width
    radial = radial_hidden * num_radial
    mixing = 0
    reference = radial + radial_hidden * layer.n_radial
    for i, p in enumerate(layer.paths):
        (l_in, _), (l_out, _) = p.t_in, p.t_out
        dense = layer.types_out[p.t_out] * (2 * l_out + 1) * layer.types_in[p.t_in] * (2 * l_in + 1)
        copies = 2 if i in layer.key_paths else 1
        mixing += copies * layer.types_out[p.t_out] * layer.types_in[p.t_in] * (2 * l_out + 1)
        # build the kernel (two products per entry) and apply it, plus the path's own basis
        reference += copies * 3 * dense + (2 * p.l_f + 1) * (2 * l_in + 1) * (2 * l_out + 1)
    return {
        "edge": {"angular": angular, "radial": radial + weighting, "logits": logits, "aggregate": aggregate},
        "point": {"mixing": mixing},
        "reference_edge": reference,
    }
