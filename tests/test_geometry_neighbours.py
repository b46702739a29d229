"""Neighbourhood graphs against brute-force references (dense distances, scipy cKDTree)."""

import numpy as np
import pytest
import torch
from scipy.spatial import cKDTree

from shapes.errors import InputError
from shapes.geometry import Neighbours, gather_neighbours, knn_graph, radius_graph, relative_vectors
from shapes.seeding import torch_generator


def brute_force(points, k, mask=None, include_self=False, radius=None):
    """Reference: dense (N, N) distances per cloud, stable argsort (ties by index), slot rules of the API."""
    B, N, _ = points.shape
    mask = np.ones((B, N), bool) if mask is None else np.asarray(mask)
    index = np.tile(np.arange(N)[None, :, None], (B, 1, k))
    valid = np.zeros((B, N, k), bool)
    for b in range(B):
        p = points[b].astype(np.float64)
        d = ((p[:, None, :] - p[None, :, :]) ** 2).sum(-1)
        d[:, ~mask[b]] = np.inf
        if not include_self:
            np.fill_diagonal(d, np.inf)
        order = np.argsort(d, axis=1, kind="stable")[:, :k]
        dist = np.take_along_axis(d, order, 1)
        ok = np.isfinite(dist) & mask[b][:, None]
        if radius is not None:
            ok &= dist <= radius**2
        kk = order.shape[1]
        index[b, :, :kk] = np.where(ok, order, np.arange(N)[:, None])
        valid[b, :, :kk] = ok
    return index, valid


def check_equal(nb, ref):
    assert isinstance(nb, Neighbours)
    assert nb.index.dtype == torch.long and nb.valid.dtype == torch.bool
    np.testing.assert_array_equal(nb.valid.numpy(), ref[1])
    np.testing.assert_array_equal(nb.index.numpy(), ref[0])


@pytest.mark.parametrize("include_self", [False, True])
@pytest.mark.parametrize("chunk_size", [7, 1024])
def test_knn_matches_brute_force(include_self, chunk_size):
    pts = torch.randn(3, 50, 3, generator=torch_generator(0), dtype=torch.float64)
    nb = knn_graph(pts, 8, include_self=include_self, chunk_size=chunk_size)
    # reference: dense distances + stable argsort
    check_equal(nb, brute_force(pts.numpy(), 8, include_self=include_self))
    if include_self:
        assert torch.equal(nb.index[..., 0], torch.arange(50).expand(3, 50))


def test_knn_matches_ckdtree_distances():
    pts = torch.rand(2, 200, 3, generator=torch_generator(1))
    nb = knn_graph(pts, 10)
    for b in range(2):
        # reference: scipy.spatial.cKDTree (k + 1 to skip the point itself)
        dist, _ = cKDTree(pts[b].numpy()).query(pts[b].numpy(), k=11)
        ours = (pts[b][nb.index[b]] - pts[b][:, None]).norm(dim=-1).numpy()
        np.testing.assert_allclose(ours, dist[:, 1:], rtol=1e-5, atol=1e-6)


def test_knn_with_mask_and_small_clouds():
    pts = torch.randn(3, 12, 3, generator=torch_generator(2))
    mask = torch.zeros(3, 12, dtype=torch.bool)
    mask[0, :12] = True
    mask[1, :5] = True  # fewer than k real other points
    mask[2, [1, 4, 9]] = True  # scattered padding
    nb = knn_graph(pts, 6, mask=mask, chunk_size=5)
    # reference: dense distances with padded senders removed
    check_equal(nb, brute_force(pts.numpy(), 6, mask.numpy()))
    assert not nb.valid[~mask].any()  # padded receivers have no edge
    assert mask.gather(1, nb.index.flatten(1)).view_as(nb.valid)[nb.valid].all()  # senders are real
    assert nb.valid[1, :5].sum(-1).tolist() == [4] * 5  # 5 real points: 4 others each
    # the extra slots point at the receiver itself
    assert torch.equal(nb.index[1, :5, 4:], torch.arange(5)[:, None].expand(5, 2))


def test_k_larger_than_cloud():
    pts = torch.randn(1, 4, 3, generator=torch_generator(3))
    nb = knn_graph(pts, 10)
    assert nb.index.shape == (1, 4, 10)
    assert nb.valid.sum(-1).tolist() == [[3, 3, 3, 3]]
    check_equal(nb, brute_force(pts.numpy(), 10))


def test_duplicates_and_ties_are_deterministic():
    base = torch.randn(1, 6, 3, generator=torch_generator(4), dtype=torch.float64)
    pts = torch.cat([base, base, base[:, :2]], 1)  # every point duplicated, some three times
    nb = knn_graph(pts, 5)
    rel = relative_vectors(pts, nb.index)
    assert torch.isfinite(rel).all()
    # reference: stable argsort, so exact ties go to the lower index
    check_equal(nb, brute_force(pts.numpy(), 5))
    # a grid has many exact ties between distinct points
    g = torch.stack(torch.meshgrid(*[torch.arange(4.0)] * 3, indexing="ij"), -1).reshape(1, 64, 3)
    check_equal(knn_graph(g, 7, chunk_size=9), brute_force(g.numpy(), 7))
    assert torch.equal(knn_graph(g, 7).index, knn_graph(g.clone(), 7, chunk_size=3).index)


def test_radius_graph_matches_brute_force():
    pts = torch.rand(2, 80, 3, generator=torch_generator(5), dtype=torch.float64)
    mask = torch.ones(2, 80, dtype=torch.bool)
    mask[1, 60:] = False
    nb = radius_graph(pts, 0.2, 12, mask=mask, chunk_size=16)
    # reference: dense distances, keep the nearest 12 within the radius
    check_equal(nb, brute_force(pts.numpy(), 12, mask.numpy(), radius=0.2))
    # reference: scipy cKDTree ball counts (capped at k) agree
    tree = cKDTree(pts[0].numpy())
    counts = np.array([len(tree.query_ball_point(p, 0.2)) - 1 for p in pts[0].numpy()])
    np.testing.assert_array_equal(nb.valid[0].sum(-1).numpy(), np.minimum(counts, 12))
    assert 0 < nb.valid.sum() < nb.valid.numel()  # the radius really cut edges


def test_gather_and_relative_vectors():
    pts = torch.randn(2, 9, 3, generator=torch_generator(6), dtype=torch.float64, requires_grad=True)
    feats = torch.randn(2, 9, 4, 5, generator=torch_generator(7))
    nb = knn_graph(pts, 3)
    g = gather_neighbours(feats, nb.index)
    assert g.shape == (2, 9, 3, 4, 5)
    assert torch.equal(g[1, 2, 1], feats[1, nb.index[1, 2, 1]])
    rel = relative_vectors(pts, nb.index)
    assert torch.allclose(rel[0, 5, 2], pts[0, nb.index[0, 5, 2]] - pts[0, 5])
    rel.sum().backward()
    assert pts.grad is not None and torch.isfinite(pts.grad).all()


def test_knn_is_rotation_and_translation_invariant():
    pts = torch.randn(1, 40, 3, generator=torch_generator(8), dtype=torch.float64)
    from shapes.geometry import uniform_rotations

    R = uniform_rotations(1, torch_generator(9), dtype=torch.float64)
    moved = pts @ R.transpose(-1, -2) + torch.tensor([1.0, -2.0, 3.0], dtype=torch.float64)
    a, b = knn_graph(pts, 5), knn_graph(moved, 5)
    assert torch.equal(a.index, b.index)
    # a non-rigid change (stretch along x) does change the graph: the check can fail
    stretched = pts * torch.tensor([5.0, 1.0, 1.0], dtype=torch.float64)
    assert not torch.equal(a.index, knn_graph(stretched, 5).index)


@pytest.mark.parametrize(
    "call, message",
    [
        (lambda: knn_graph(torch.zeros(10, 2), 3), r"points should have shape \(B, N, 3\), got \(10, 2\)"),
        (lambda: knn_graph(torch.zeros(2, 10, 4), 3), r"points should have shape \(B, N, 3\), got \(2, 10, 4\)"),
        (lambda: knn_graph(torch.zeros(2, 10, 3), 0), r"k should be an integer >= 1, got 0"),
        (lambda: knn_graph(torch.zeros(2, 10, 3), 3, mask=torch.ones(2, 9, dtype=torch.bool)), r"mask should have shape \(B, N\) = \(2, 10\), got \(2, 9\)"),
        (lambda: radius_graph(torch.zeros(2, 10, 3), -1.0, 3), r"radius should be a positive number, got -1.0"),
    ],
)
def test_bad_input(call, message):
    with pytest.raises(InputError, match=message):
        call()
