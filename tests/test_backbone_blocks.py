"""The shared blocks the backbones are built from, each against an outside reference: vector algebra,
the cloud's moments, the radial basis and cutoff, the feature vocabulary, the neighbourhood preamble,
the normals read as axes, the attention softmaxes and the readout of a cloud's mean vectors."""

import math

import numpy as np
import pytest
import torch
from conftest import random_cloud, random_normals, rel_change, rotate, transform_features

from shapes.backbones._equivariant import GlobalVectorReadout, masked_softmax, weighted_softmax
from shapes.backbones._features import pack, parse_channels, to_harmonic_order, unpack
from shapes.backbones._neighbours import Cloud, edges
from shapes.backbones._normals import as_axis, chirality, lean
from shapes.backbones._radial import GaussianBasis, cosine_cutoff
from shapes.backbones._vectors import anisotropy, cloud_moment, cross, det3, dot, norm, triple
from shapes.backbones.plain import PlainBackbone
from shapes.errors import ConfigError
from shapes.geometry import random_improper, spherical_harmonics, uniform_rotations


def test_vector_algebra_matches_numpy():
    # reference: numpy.cross, numpy.dot, numpy.linalg.det, numpy.linalg.norm
    gen = torch.Generator().manual_seed(12)
    a, b, c = torch.randn(3, 5, 4, 3, generator=gen, dtype=torch.float64)
    A, B, C = a.numpy(), b.numpy(), c.numpy()
    np.testing.assert_allclose(cross(a, b).numpy(), np.cross(A, B), rtol=0, atol=1e-14)
    np.testing.assert_allclose(cross(a[:, :1], b).numpy(), np.cross(A[:, :1], B), rtol=0, atol=1e-14)  # broadcasts
    np.testing.assert_allclose(dot(a, b).numpy(), np.einsum("...i,...i", A, B), rtol=1e-13)
    np.testing.assert_allclose(triple(a, b, c).numpy(), np.linalg.det(np.stack([A, B, C], -2)), rtol=1e-10, atol=1e-13)
    np.testing.assert_allclose(det3(torch.stack([a, b, c], -2)).numpy(), np.linalg.det(np.stack([A, B, C], -2)),
                               rtol=1e-10, atol=1e-13)
    np.testing.assert_allclose(norm(a, eps=0.0).numpy(), np.linalg.norm(A, axis=-1), rtol=1e-14)
    zero = torch.zeros(3, dtype=torch.float64, requires_grad=True)
    norm(zero).backward()
    assert torch.isfinite(zero.grad).all()  # the floor keeps the gradient finite at 0


def test_cross_and_triple_products_pick_up_the_determinant():
    # closed form: (Q a) x (Q b) = det(Q) Q (a x b); det[Qa, Qb, Qc] = det(Q) det[a, b, c]
    gen = torch.Generator().manual_seed(2)
    a, b, c = torch.randn(3, 4, 3, generator=gen, dtype=torch.float64)
    for Q in (uniform_rotations(4, generator=gen, dtype=torch.float64),
              random_improper(4, generator=gen, dtype=torch.float64)):
        det = torch.det(Q)
        Qa, Qb, Qc = (rotate(v[:, None], Q)[:, 0] for v in (a, b, c))
        assert rel_change(det[:, None] * rotate(cross(a, b)[:, None], Q)[:, 0], cross(Qa, Qb)) <= 1e-12
        assert rel_change(det * triple(a, b, c), triple(Qa, Qb, Qc)) <= 1e-12
    # and a cyclic permutation of the components, the order of Y_1, changes neither
    assert rel_change(to_harmonic_order(cross(a, b)), cross(to_harmonic_order(a), to_harmonic_order(b))) <= 1e-15


def test_cloud_moment_and_anisotropy_match_numpy():
    # reference: numpy second moment and numpy.linalg.eigvalsh for sum (eig M - 1)^3
    x = random_cloud(2, 30, seed=3) * torch.tensor([3.0, 1.0, 0.5], dtype=torch.float64)
    mask = torch.ones(2, 30, dtype=torch.bool)
    mask[1, 20:] = False
    centred = x - (x * mask[..., None]).sum(1, keepdim=True) / mask.sum(1)[:, None, None]
    M = cloud_moment(centred, mask)
    for i, n in enumerate((30, 20)):
        y = centred[i, :n].numpy()
        expected = 3 * (y.T @ y / n) / np.mean(np.sum(y**2, 1))
        np.testing.assert_allclose(M[i].numpy(), expected, rtol=1e-12)
        np.testing.assert_allclose(float(anisotropy(M)[i]), np.sum((np.linalg.eigvalsh(expected) - 1) ** 3), rtol=1e-10)
    assert float(anisotropy(M)[0]) > 0.5  # a rod-like cloud (stretched along x): a > 0
    # turns as Q M Q^T (closed form), so M v is a vector
    Q = random_improper(2, generator=torch.Generator().manual_seed(4), dtype=torch.float64)
    assert rel_change(Q @ M @ Q.transpose(-1, -2), cloud_moment(rotate(centred, Q), mask)) <= 1e-12


def test_cosine_cutoff_and_gaussian_basis_values():
    # reference: closed form (cos(pi x) + 1) / 2 on [0, 1], 0 beyond, slope 0 at both ends;
    # Gaussians exp(-(d - mu)^2 / 2 w^2) with mu evenly spaced on [0, cutoff]
    x = torch.tensor([0.0, 0.25, 0.5, 1.0, 1.5], dtype=torch.float64, requires_grad=True)
    y = cosine_cutoff(x)
    np.testing.assert_allclose(y.detach().numpy(), [1.0, 0.5 * (np.cos(np.pi / 4) + 1.0), 0.5, 0.0, 0.0], atol=1e-15)
    (grad,) = torch.autograd.grad(y.sum(), x)
    np.testing.assert_allclose(grad[[0, 3, 4]].numpy(), 0.0, atol=1e-12)
    torch.testing.assert_close(cosine_cutoff(2 * x, 2.0), y)
    basis = GaussianBasis(5, 2.0).double()
    d = torch.tensor([0.3, 1.7], dtype=torch.float64)
    mu, w = np.linspace(0, 2, 5), 0.5
    np.testing.assert_allclose(basis(d).numpy(), np.exp(-((d.numpy()[:, None] - mu) ** 2) / (2 * w**2)), rtol=1e-12)


def test_degree_one_order_is_that_of_the_first_harmonics():
    # reference: Y_1(v) = sqrt(3 / 4 pi) (y, z, x) / |v| (docs/design.md, "Spherical harmonics";
    # shapes.geometry.spherical_harmonics is checked against scipy in tests/test_geometry_harmonics.py)
    v = random_cloud(1, 10, seed=5)[0]
    y1 = spherical_harmonics(1, v)[1]
    torch.testing.assert_close(y1, math.sqrt(3 / (4 * math.pi)) * to_harmonic_order(v) / v.norm(dim=-1, keepdim=True))
    # pack/unpack round trip in the shapes of the vocabulary (docs/design.md, "Tensor shapes")
    s, vv, p, a = torch.randn(2, 5, 4), torch.randn(2, 5, 3, 3), torch.randn(2, 5, 3), torch.randn(2, 5, 3, 3)
    x = pack(s, vv, p, a)
    assert {t: tuple(t_.shape) for t, t_ in x.items()} == {(0, 1): (2, 5, 4, 1), (0, -1): (2, 5, 3, 1),
                                                         (1, -1): (2, 5, 3, 3), (1, 1): (2, 5, 3, 3)}
    assert all(torch.equal(u, w) for u, w in zip(unpack(x), (s, vv, p, a)))
    assert unpack(pack(s, vv)).p is None


def test_parse_channels_reads_yaml_keys_and_refuses_bad_maps():
    # convention: docs/design.md, "Options": YAML and Hydra hand keys over as strings or integers
    assert parse_channels({"1": 8, 0: 16}, 1) == {0: 16, 1: 8}
    for bad, match in (({1: 8}, "degree 0"), ({0: 8, 3: 2}, r"in \[0, 1\]"), ({0: 0, 1: 2}, r">= 1"),
                       ({0: 2.5, 1: 2}, "an integer"), ("0:16", "a mapping")):
        with pytest.raises(ConfigError, match=match):
            parse_channels(bad, 1)


def test_preamble_centres_zeroes_padding_and_scales_normals():
    # convention: docs/design.md, "Translations" and "Tensor shapes"
    net = PlainBackbone(hidden=4, layers=1).double()
    points = random_cloud(2, 12, seed=6) + 5.0
    mask = torch.ones(2, 12, dtype=torch.bool)
    mask[0, 9:] = False
    points[0, 10] = float("nan")  # junk at padding
    cloud = Cloud.of(net, points, mask)
    assert torch.equal(cloud.points[0, 9:], torch.zeros(3, 3, dtype=torch.float64))
    torch.testing.assert_close(cloud.points[0, :9].mean(0), torch.zeros(3, dtype=torch.float64))
    torch.testing.assert_close(cloud.y[1].square().sum(-1).mean(), torch.tensor(1.0, dtype=torch.float64))
    graph = edges(cloud, 4)
    assert not graph.valid[0, 9:].any() and not (graph.index[0, :9] >= 9).any()  # padding sends nothing
    torch.testing.assert_close(graph.share.sum(-1)[1], torch.ones(12, dtype=torch.float64))


def test_normals_as_axes_are_even_in_each_sign_and_keep_parity():
    # closed form: w = n . y / |y| is odd in n, so w n and w (n . c) are even; det[y, n, M n] is even in n
    # and a pseudo-scalar (det[Qy, Qn, Q M Q^T Q n] = det Q det[y, n, M n]); docs/design.md, "Normals as axes"
    y, n = random_cloud(1, 20, seed=8), random_normals(1, 20, seed=9)
    M = cloud_moment(y, torch.ones(1, 20, dtype=torch.bool))
    flip = torch.where(torch.arange(20) % 3 == 0, -1.0, 1.0).to(torch.float64)[None, :, None]
    w, w_flipped = lean(n, y), lean(n * flip, y)
    torch.testing.assert_close(w_flipped, w * flip[..., 0])
    axis = as_axis(w, False, n, dot(n, y)[..., None])
    flipped = as_axis(w_flipped, False, n * flip, dot(n * flip, y)[..., None])
    assert all(torch.equal(a, b) for a, b in zip(axis, flipped))
    assert not torch.equal(*as_axis(w, True, n), *as_axis(w_flipped, True, n * flip))  # signed: the sign counts
    assert torch.equal(chirality(y, n, M), chirality(y, n * flip, M))
    Q = random_improper(1, generator=torch.Generator().manual_seed(10), dtype=torch.float64)
    turned = chirality(rotate(y, Q), rotate(n, Q), Q @ M @ Q.transpose(-1, -2))
    assert rel_change(-chirality(y, n, M), turned) <= 1e-12
    assert float(chirality(y, n, M).abs().mean()) > 1e-2  # not zero to start with


def test_masked_and_weighted_softmax():
    # reference: softmax is invariant to a shift of its inputs (closed form); torch.softmax on valid entries
    logits = torch.tensor([[1e4, 1e4 + 1.0, -3.0], [0.5, 2.0, 7.0], [1.0, 2.0, 3.0]], dtype=torch.float64,
                          requires_grad=True)
    valid = torch.tensor([[True, True, False], [False, False, False], [True, False, True]])
    a = masked_softmax(logits, valid, dim=-1)
    e = math.exp(1.0)
    torch.testing.assert_close(a[0], torch.tensor([1 / (1 + e), e / (1 + e), 0.0], dtype=torch.float64))
    assert a[1].abs().max() == 0.0
    torch.testing.assert_close(a[2, [0, 2]], torch.softmax(torch.tensor([1.0, 3.0], dtype=torch.float64), 0))
    a.square().sum().backward()
    assert torch.isfinite(logits.grad).all()
    # weights of 1 on the valid entries give the masked softmax; a weight of 0 takes no part at all
    torch.testing.assert_close(weighted_softmax(logits.detach()[2:], valid[2:].double(), -1), a.detach()[2:])
    half = weighted_softmax(torch.zeros(1, 2, dtype=torch.float64), torch.tensor([[0.5, 0.0]], dtype=torch.float64), -1)
    torch.testing.assert_close(half, torch.tensor([[0.5, 0.0]], dtype=torch.float64))  # faded with a total below 1


def test_global_vector_readout_matches_numpy_and_transforms_by_parity():
    # reference: numpy.linalg.det and numpy dot products of the mixed vectors; det[Qa, Qb, Qc] = det Q det[a, b, c]
    torch.manual_seed(0)
    readout = GlobalVectorReadout(6, chiral=True).double()
    g = torch.randn(4, 6, 3, generator=torch.Generator().manual_seed(1), dtype=torch.float64)
    out = readout(g)
    w = readout.mix.weight.detach().numpy().reshape(3, 6, 6)  # rows: a, b, c mixings
    for b in range(4):
        gb = g[b].numpy()
        a, bb, c = (w[i] @ gb for i in range(3))  # (6, 3) each
        scale = (gb**2).sum(-1).mean() + readout.floor
        dots = (a * bb).sum(-1) / scale
        dets = np.array([np.linalg.det(np.stack([a[i], bb[i], c[i]])) for i in range(6)]) / scale**1.5
        np.testing.assert_allclose(out[b].detach().numpy(), np.concatenate([dots, dets]), rtol=1e-10, atol=1e-12)
    # components in (y, z, x) order: polar vectors turn with the Wigner-D of degree 1; Q improper and proper
    for Q in (random_improper(4, generator=torch.Generator().manual_seed(2), dtype=torch.float64),
              uniform_rotations(4, generator=torch.Generator().manual_seed(3), dtype=torch.float64)):
        turned = readout(transform_features({(1, -1): g[:, None]}, Q)[(1, -1)][:, 0])
        assert rel_change(out[:, :6], turned[:, :6]) <= 1e-12  # dot products: invariant
        assert rel_change(out[:, 6:] * torch.det(Q)[:, None], turned[:, 6:]) <= 1e-12  # triple products: det Q
    assert out[:, 6:].abs().min() > 1e-6  # both directions: the pseudo-scalars are not zero to start with
    assert GlobalVectorReadout(6, chiral=False).width == 6
