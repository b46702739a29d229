"""k-nearest-neighbour and radius graphs for padded batches, in O(B N k) memory.

A graph is stored per receiver: ``index[b, i, :]`` lists the senders ``j`` of receiver ``i`` in
cloud ``b``, nearest first, and ``valid[b, i, :]`` says which slots are real edges. Invalid slots
point at the receiver itself, so gathers stay in range and need no masking to be safe.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import torch

from shapes.errors import InputError
from shapes.geometry._checks import check_count, shape_of

__all__ = [
    "Neighbours",
    "SmoothNeighbours",
    "knn_graph",
    "radius_graph",
    "smooth_graph",
    "neighbour_taper",
    "gather_neighbours",
    "relative_vectors",
]


# Distances held per block (elements); see _graph.
_BLOCK_ELEMENTS = 1 << 20

# The taper of smooth_graph is 1 up to this fraction of the squared scale and falls to 0 at 1 (see
# neighbour_taper). On a surface the squared distance of the j-th neighbour grows about like j, so
# about the nearer half of the k neighbours keep full weight and the taper spans the outer half:
# the soft neighbour count is about 0.75 k, the weight's slope stays below pi per unit of (d / s)^2.
TAPER_START = 0.5


class Neighbours(NamedTuple):
    """Edges of a neighbourhood graph, per receiver.

    Attributes
    ----------
    index : (B, N, k) long
        ``index[b, i, s]`` is the sender of slot ``s`` of receiver ``i``; slots are sorted by
        distance, ties by sender index. Invalid slots hold ``i`` itself.
    valid : (B, N, k) bool
        True where the slot is a real edge (a real sender, within the radius if one was given,
        and a real receiver).
    """

    index: torch.Tensor
    valid: torch.Tensor


def _check_points(points, mask) -> torch.Tensor:
    if not isinstance(points, torch.Tensor) or points.dim() != 3 or points.shape[-1] != 3:
        raise InputError(f"points should have shape (B, N, 3), got {shape_of(points)} instead.")
    if not points.is_floating_point():
        raise InputError(f"points should be float32 or float64, got {points.dtype} instead.")
    if mask is None:
        return torch.ones(points.shape[:2], dtype=torch.bool, device=points.device)
    if not isinstance(mask, torch.Tensor) or tuple(mask.shape) != tuple(points.shape[:2]):
        raise InputError(
            f"mask should have shape (B, N) = {tuple(points.shape[:2])}, got {shape_of(mask)} instead."
        )
    return mask.to(device=points.device, dtype=torch.bool)


def _sq_distances(cols: torch.Tensor, start: int, stop: int) -> torch.Tensor:
    """Squared distances ``(B, c, N)`` from receivers ``start:stop`` to every point.

    ``cols (B, 3, N)`` holds the coordinates axis-major, so every operand row is contiguous.
    Exact differences rather than ``|a|^2 + |b|^2 - 2 a.b``: symmetric, never negative, exactly 0
    for duplicate points, and only two ``(B, c, N)`` buffers alive at once.
    """
    d = torch.sub(cols[:, 0, start:stop, None], cols[:, 0, None, :]).square_()  # (B, c, N)
    tmp = torch.empty_like(d)
    for axis in (1, 2):
        torch.sub(cols[:, axis, start:stop, None], cols[:, axis, None, :], out=tmp)
        d.addcmul_(tmp, tmp)
    return d


def _smallest_k(d: torch.Tensor, k: int) -> tuple[torch.Tensor, torch.Tensor]:
    """The ``k`` smallest entries of each row of ``d (..., N)``, ordered by (value, index).

    ``topk`` is fast but leaves the order among equal values unspecified. Taking one extra entry
    shows whether the k-th value is tied with an entry left out; such rows (finite ties only) are
    redone with a stable sort. The chosen k are then ordered by value with ties by index.
    Deterministic for any input.
    """
    n = d.shape[-1]
    extra = 1 if k < n else 0
    vals, idx = torch.topk(d, k + extra, dim=-1, largest=False, sorted=True)
    if extra:
        ambiguous = (vals[..., k - 1] == vals[..., k]) & torch.isfinite(vals[..., k - 1])
        vals, idx = vals[..., :k], idx[..., :k]
        if ambiguous.any():
            rows = ambiguous.nonzero(as_tuple=True)
            order = torch.sort(d[rows], dim=-1, stable=True).indices[..., :k]
            idx[rows] = order
            vals[rows] = torch.gather(d[rows], -1, order)
    # Order equal values by index: stable sort by index, then stable sort by value. Only needed
    # when a finite value repeats (infinite slots are dropped by the caller), so usually skipped.
    repeats = (vals[..., 1:] == vals[..., :-1]) & torch.isfinite(vals[..., 1:])
    if not repeats.any():
        return vals, idx
    by_index = torch.sort(idx, dim=-1, stable=True)
    idx = by_index.values
    vals = torch.gather(vals, -1, by_index.indices)
    by_value = torch.sort(vals, dim=-1, stable=True)
    return by_value.values, torch.gather(idx, -1, by_value.indices)


def _graph(points, k, mask, include_self, chunk_size, radius) -> Neighbours:
    k = check_count(k, "k", 1)
    chunk_size = check_count(chunk_size, "chunk_size", 1)
    mask = _check_points(points, mask)
    B, N, _ = points.shape
    device = points.device
    kk = min(k, N)
    index = torch.empty((B, N, k), dtype=torch.long, device=device)
    valid = torch.zeros((B, N, k), dtype=torch.bool, device=device)
    arange = torch.arange(N, device=device)
    index[:] = arange[None, :, None]
    if N == 0:
        return Neighbours(index, valid)
    limit = None if radius is None else radius * radius
    # Receivers per block: at most chunk_size, and few enough that a block of B x c x N distances
    # stays around 4 MB in float32 -- cache-sized blocks make the passes below several times faster.
    rows_per_block = max(1, min(chunk_size, _BLOCK_ELEMENTS // max(1, B * N)))
    all_real = bool(mask.all())
    with torch.no_grad():
        cols = points.detach().transpose(1, 2).contiguous()  # (B, 3, N)
        not_sender = ~mask[:, None, :]  # (B, 1, N)
        for start in range(0, N, rows_per_block):
            stop = min(start + rows_per_block, N)
            d = _sq_distances(cols, start, stop)  # (B, c, N)
            if not all_real:
                d.masked_fill_(not_sender, math.inf)
            if not include_self:
                rows = torch.arange(stop - start, device=device)
                d[:, rows, rows + start] = math.inf
            vals, idx = _smallest_k(d, kk)  # (B, c, kk)
            ok = torch.isfinite(vals) & mask[:, start:stop, None]
            if limit is not None:
                ok &= vals <= limit
            receiver = arange[start:stop][None, :, None]
            index[:, start:stop, :kk] = torch.where(ok, idx, receiver)
            valid[:, start:stop, :kk] = ok
    return Neighbours(index, valid)


def knn_graph(
    points: torch.Tensor,
    k: int,
    mask: torch.Tensor | None = None,
    include_self: bool = False,
    chunk_size: int = 1024,
) -> Neighbours:
    """The ``k`` nearest senders of every point of a padded batch.

    Parameters
    ----------
    points : (B, N, 3) float
    k : int
        Neighbours per receiver, ``>= 1``. May exceed the cloud size: the extra slots are invalid.
    mask : (B, N) bool, optional
        True for real points. Padded points are never senders, and padded receivers have no valid slot.
    include_self : bool
        Whether a point may be its own neighbour (at distance 0, so it comes first).
    chunk_size : int
        Most receivers handled at once; the peak buffer is at most ``B x chunk_size x N``
        distances (blocks are made smaller still, about 1M distances, for cache efficiency).

    Returns
    -------
    Neighbours
        ``index (B, N, k) long`` and ``valid (B, N, k) bool``, nearest first, ties by sender index.
    """
    return _graph(points, k, mask, include_self, chunk_size, None)


def radius_graph(
    points: torch.Tensor,
    radius: float,
    k: int,
    mask: torch.Tensor | None = None,
    include_self: bool = False,
    chunk_size: int = 1024,
) -> Neighbours:
    """The (at most) ``k`` nearest senders within distance ``radius`` (inclusive) of every point.

    Same layout and rules as :func:`knn_graph`; senders farther than ``radius`` are invalid slots.
    """
    try:
        radius = float(radius)
    except (TypeError, ValueError):
        radius = math.nan
    if not radius > 0:  # also rejects NaN
        raise InputError(f"radius should be a positive number, got {radius!r} instead.")
    return _graph(points, k, mask, include_self, chunk_size, radius)


class SmoothNeighbours(NamedTuple):
    """A k-nearest-neighbour graph whose edges carry weights continuous in the points.

    Attributes
    ----------
    index, valid : (B, N, k) long, bool
        As in :class:`Neighbours`: the ``k`` nearest senders, nearest first.
    weight : (B, N, k) float
        ``neighbour_taper(|r_ij|^2 / s_i^2)`` on valid slots, 0 on the others. Differentiable in the
        points (it is built from them, not from the detached search).
    scale : (B, N) float
        ``s_i``: the distance to the ``(k+1)``-th nearest sender (at most ``radius`` if one was
        given); ``inf`` where there is no such sender (a cloud of ``k + 1`` points or fewer, where
        every other point is a neighbour and nothing can enter or leave).
    """

    index: torch.Tensor
    valid: torch.Tensor
    weight: torch.Tensor
    scale: torch.Tensor


def neighbour_taper(u: torch.Tensor) -> torch.Tensor:
    """Weight of a neighbour at squared relative distance ``u = (d / s)^2``.

    1 for ``u <= TAPER_START``, then ``(1 + cos(pi t)) / 2`` with ``t = (u - TAPER_START) / (1 - TAPER_START)``,
    and 0 for ``u >= 1``: once differentiable, with zero slope at both joins, so a neighbour reaches the
    scale ``s`` (where it may swap places with the ``(k+1)``-th) with weight 0 and slope 0.
    """
    t = ((u - TAPER_START) / (1.0 - TAPER_START)).clamp(0.0, 1.0)
    return 0.5 * (torch.cos(math.pi * t) + 1.0)


def smooth_graph(
    points: torch.Tensor,
    k: int,
    mask: torch.Tensor | None = None,
    radius: float | None = None,
    chunk_size: int = 1024,
) -> SmoothNeighbours:
    """The ``k`` nearest senders of every point, weighted so that the neighbourhood is continuous.

    A plain kNN set jumps when the ``k``-th and ``(k+1)``-th neighbours swap, and on points that
    lie on a lattice (a scan) many neighbours tie, so which tied point is kept depends on rounding.
    Here ``k + 1`` neighbours are found, the distance ``s_i`` to the ``(k+1)``-th is the receiver's
    scale (an order statistic: continuous in the points, whichever tied point holds the slot), and
    each of the ``k`` nearest gets the weight ``neighbour_taper(d_ij^2 / s_i^2)``. Every sender at
    distance ``s_i`` or more has weight 0, so a neighbour enters and leaves with weight 0, and the
    weighted neighbourhood does not depend on how ties were broken. With ``radius``, the scale is
    ``min(s_i, radius)``: a sender crossing the radius fades out the same way.

    Parameters
    ----------
    points : (B, N, 3) float
    k : int
        Neighbours per receiver, ``>= 1``.
    mask : (B, N) bool, optional
        True for real points (padding is never a sender and has no valid slot).
    radius : float, optional
        Largest scale; ``None`` for a pure kNN neighbourhood.
    chunk_size : int
        As in :func:`knn_graph`.

    Returns
    -------
    SmoothNeighbours
        Self-edges are never included. Memory ``O(B N k)``.
    """
    k = check_count(k, "k", 1)
    if radius is not None:
        try:
            radius = float(radius)
        except (TypeError, ValueError):
            radius = math.nan
        if not radius > 0:  # also rejects NaN
            raise InputError(f"radius should be a positive number, got {radius!r} instead.")
    nb = knn_graph(points, k + 1, mask=mask, chunk_size=chunk_size)
    rel = gather_neighbours(points, nb.index) - points[:, :, None, :]  # (B, N, k+1, 3)
    sq = rel.square().sum(-1)  # (B, N, k+1); squared, so the gradient is finite at duplicate points
    scale_sq = torch.where(nb.valid[..., k], sq[..., k], torch.full_like(sq[..., k], math.inf))  # (B, N)
    if radius is not None:
        scale_sq = scale_sq.clamp(max=radius * radius)
    valid = nb.valid[..., :k]
    if radius is not None:
        valid = valid & (sq[..., :k] <= radius * radius)
    # s = 0 (k + 2 coincident points): the neighbours all sit at the scale, so they get weight 0
    positive = scale_sq[..., None] > 0
    u = sq[..., :k] / torch.where(positive, scale_sq[..., None], torch.ones_like(scale_sq[..., None]))
    u = torch.where(positive, u, torch.ones_like(u))
    weight = torch.where(valid, neighbour_taper(u), torch.zeros_like(u))
    receiver = torch.arange(points.shape[1], device=points.device)[None, :, None]
    index = torch.where(valid, nb.index[..., :k], receiver)
    return SmoothNeighbours(index, valid, weight, scale_sq.sqrt())


def gather_neighbours(x: torch.Tensor, index: torch.Tensor) -> torch.Tensor:
    """Per-edge copies of per-point features.

    Parameters
    ----------
    x : (B, N, ...) tensor
    index : (B, N, k) long
        Sender indices, e.g. ``Neighbours.index``.

    Returns
    -------
    (B, N, k, ...) tensor
        ``out[b, i, s] = x[b, index[b, i, s]]``; differentiable in ``x``.
    """
    if not isinstance(x, torch.Tensor) or x.dim() < 2:
        raise InputError(f"x should have shape (B, N, ...), got {shape_of(x)} instead.")
    if not isinstance(index, torch.Tensor) or index.dim() != 3 or index.shape[0] != x.shape[0]:
        raise InputError(
            f"index should have shape (B, N, k) with B = {x.shape[0]}, got {shape_of(index)} instead."
        )
    B, N = x.shape[:2]
    tail = x.shape[2:]
    flat = x.reshape((B * N,) + tail)  # (B*N, ...)
    offsets = (torch.arange(B, device=index.device) * N)[:, None, None]
    return flat[index + offsets]  # (B, N', k, ...)


def relative_vectors(points: torch.Tensor, index: torch.Tensor) -> torch.Tensor:
    """Edge vectors ``sender - receiver``: ``points (B, N, 3)``, ``index (B, N, k) -> (B, N, k, 3)``."""
    if not isinstance(points, torch.Tensor) or points.dim() != 3 or points.shape[-1] != 3:
        raise InputError(f"points should have shape (B, N, 3), got {shape_of(points)} instead.")
    if not isinstance(index, torch.Tensor) or index.dim() != 3 or tuple(index.shape[:2]) != tuple(points.shape[:2]):
        raise InputError(
            f"index should have shape (B, N, k) with (B, N) = {tuple(points.shape[:2])}, got {shape_of(index)} instead."
        )
    return gather_neighbours(points, index) - points[:, :, None, :]
