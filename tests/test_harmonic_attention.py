"""What is special about harmonic-filter attention: degree 3 and the coupling paths, mirror twins on a
helix and on a thread's normals, the fast path against the dense reference, blocks of receivers,
the reach of the context, the normal inputs against numpy, and its option checks.

(The generic table-driven checks over all backbones live in test_backbones.py.)"""

import math

import pytest
import torch
from conftest import random_cloud, random_normals, rotate, transform_features
from conftest import rel_change as rel

from shapes.backbones._features import proper_parity
from shapes.backbones._harmonic_layer import angular_pairs, layer_paths
from shapes.backbones._neighbours import Cloud, edges
from shapes.backbones._normals import normal_inputs
from shapes.backbones.harmonic_attention import HarmonicAttentionBackbone
from shapes.errors import ConfigError
from shapes.geometry import random_improper, reflection, uniform_rotations

SMALL = {"k": 8, "normals": False}  # default channels and layers (the shipped architecture), on bare points
NORMALS = {"k": 8, "normals": True}
L2 = {"l_max": 2, "channels": {0: 8, 1: 4, 2: 2}}


def make(dtype=torch.float64, seed=0, **options):
    torch.manual_seed(seed)
    return HarmonicAttentionBackbone(**{**SMALL, **options}).to(dtype).eval()


def helix_cloud(n=64, dtype=torch.float64):
    """A right-hand helix (r cos t, r sin t, p t / 2 pi) with an off-axis lump at one end.

    Common practice: the right hand turns counter-clockwise as it rises, seen from +z (docs/design.md,
    "Parity and handedness").

    Chiral: no rotation maps it onto its mirror image, so an SE3 model may (and should) tell them apart.
    """
    t = torch.linspace(0, 4 * math.pi, n - 8, dtype=dtype)
    helix = torch.stack([torch.cos(t), torch.sin(t), 0.25 * t], -1)
    g = torch.Generator().manual_seed(11)
    lump = torch.tensor([1.5, 0.3, 0.0], dtype=dtype) + 0.2 * torch.randn(8, 3, generator=g, dtype=dtype)
    return torch.cat([helix, lump])[None]



def threaded_cloud(n=96, depth=0.5, pitch=1.0, dtype=torch.float64):
    """Points on the cylinder r = 1, |z| <= 2, with the outward normals of a right-hand thread
    ``r = 1 + e sin(2 pi z / p - theta)`` whose flanks are finer than the point spacing.

    The point set is mirror-symmetric (every point has its image under x -> -x), so only the
    normals carry the hand. Normal of ``r(theta, z)``: ``e_r - (1/r) dr/dtheta e_theta - dr/dz e_z``
    (closed form for a surface of revolution perturbed in r), evaluated with ``depth = e (2 pi / p)``.
    """
    g = torch.Generator().manual_seed(21)
    theta = 2 * math.pi * torch.rand(n // 2, generator=g, dtype=dtype)
    z = 4 * torch.rand(n // 2, generator=g, dtype=dtype) - 2
    theta = torch.cat([theta, math.pi - theta])  # (x, y) -> (-x, y): theta -> pi - theta
    z = torch.cat([z, z])
    points = torch.stack([torch.cos(theta), torch.sin(theta), z], -1)
    phase = torch.cos(2 * math.pi * z / pitch - theta)
    e_r = torch.stack([torch.cos(theta), torch.sin(theta), 0 * z], -1)
    e_t = torch.stack([-torch.sin(theta), torch.cos(theta), 0 * z], -1)
    e_z = torch.stack([0 * z, 0 * z, 1 + 0 * z], -1)
    e = depth * pitch / (2 * math.pi)
    normal = e_r + e * phase[:, None] * e_t - depth * phase[:, None] * e_z
    return points[None], (normal / normal.norm(dim=-1, keepdim=True))[None]


def turn(points, normals, Q):
    # closed form: an outward normal is a polar vector, n -> Q n (reflections included)
    return rotate(points, Q), rotate(normals, Q)


# -- degrees, paths and parity ----------------------------------------------------------------


@pytest.mark.parametrize("improper", [False, True], ids=["rotation", "improper"])
def test_degree_three_layers_transform_with_wigner_d_and_parity(improper):
    # reference: Wigner-D from shapes.geometry (checked against sympy there); parity rule: docs/design.md,
    # "Parity and handedness"
    net = make(l_max=3, channels={0: 8, 1: 4, 2: 2, 3: 2})
    cloud = random_cloud(n=40)
    gen = torch.Generator().manual_seed(4)
    Q = (random_improper if improper else uniform_rotations)(3, generator=gen, dtype=torch.float64)
    before = net.forward_features(cloud.expand(3, -1, -1))
    after = net.forward_features(rotate(cloud.expand(3, -1, -1), Q))
    assert len(before) == net.config.layers
    for layer_before, layer_after in zip(before, after):
        expected = transform_features(layer_before, Q)
        for t in layer_before:
            assert rel(expected[t], layer_after[t]) <= 1e-9, t
    # both directions: the map does move non-scalar features (l = 1 is not invariant)
    t = (1, -1)
    assert rel(before[-1][t], after[-1][t]) > 1e-2


def test_se3_builds_pseudo_quantities_and_e3_does_not():
    # convention: docs/design.md, "Parity and handedness"; a pseudo-scalar flips sign under a reflection (checked above)
    full = make()
    assert full.symmetry == "SE3"
    assert (0, -1) in full.types_out and (1, 1) in full.types_out  # pseudo-scalar, pseudovector
    even = make(symmetry="e3")
    assert even.symmetry == "E3"
    assert all(p == proper_parity(l) for l, p in even.types_out)
    # with e3 every path couples proper to proper: l_in + l_f + l_out is even
    for l_in in range(3):
        assert all((l_in + l_f + l_out) % 2 == 0 for l_f, l_out in angular_pairs(l_in, [0, 1, 2], "e3"))
    # 1 x 1 -> 1 from a vector (the cross product) is a pseudovector
    paths = layer_paths({(1, -1): 4}, [0, 1, 2], "se3")
    assert [(p.l_f, p.t_out) for p in paths if p.t_out[0] == 1 and p.l_f == 1] == [(1, (1, 1))]


def test_mirror_twins_differ_with_se3_and_agree_with_e3():
    # closed form: a helix with a lump is chiral (no rotation maps it onto its mirror image);
    # parity rule: docs/design.md, "Parity and handedness"
    cloud = helix_cloud()
    mirror = rotate(cloud, reflection(torch.tensor([1.0, 0.0, 0.0], dtype=torch.float64)))
    turned = rotate(mirror, uniform_rotations(1, generator=torch.Generator().manual_seed(9), dtype=torch.float64))
    full, even = make(), make(symmetry="e3")
    assert rel(full(cloud), full(mirror)) > 1e-3
    assert rel(full(cloud), full(turned)) > 1e-3
    assert rel(even(cloud), even(mirror)) <= 1e-9
    assert rel(even(cloud), even(turned)) <= 1e-9


# -- fast path against the dense reference ----------------------------------------------------


@pytest.mark.parametrize(
    "options",
    [
        {},
        {"symmetry": "e3", "heads": 1},
        {"l_max": 3, "channels": {0: 4, 1: 2, 2: 2, 3: 2}, "layers": 2},
        {"l_max": 2, "channels": {0: 4, 2: 2}, "radius": 0.9, "cutoff": 0.9},  # a missing degree; radius graph
        {**L2, **NORMALS},
        {"context": False},
    ],
    ids=["default", "even", "l3", "radius", "normals", "no-context"],
)
def test_fast_path_equals_dense_reference_with_gradients(options):
    # reference: the dense per-edge kernel implementation in the same module (explicit W(r_ij))
    net = make(**options)
    points = random_cloud(b=2, n=24, seed=3).requires_grad_(True)
    inputs = [points]
    extra = {}
    if net.uses_normals:
        extra["normals"] = random_normals(b=2, n=24, seed=4).requires_grad_(True)
        inputs.append(extra["normals"])
    mask = torch.ones(2, 24, dtype=torch.bool)
    mask[1, -4:] = False
    weights = torch.randn(net.out_features, generator=torch.Generator().manual_seed(5), dtype=torch.float64)
    results = []
    for reference in (False, True):
        net.zero_grad()
        for x in inputs:
            x.grad = None
        out = net(points, mask, reference=reference, **extra)
        (out * weights).sum().backward()
        grads = [p.grad.clone() for p in net.parameters()] + [x.grad.clone() for x in inputs]
        results.append((out.detach(), grads))
    (fast, fast_grads), (ref, ref_grads) = results
    assert (fast - ref).abs().max() <= 1e-10 * ref.abs().max()
    for a, b in zip(fast_grads, ref_grads):
        assert (a - b).abs().max() <= 1e-10 * max(float(b.abs().max()), 1.0)
    assert max(float(g.abs().max()) for g in ref_grads) > 0
    if net.uses_normals:
        assert float(ref_grads[-1].abs().max()) > 0  # the output really depends on the normals


@pytest.mark.parametrize("block", [1, 7 * 8, 10**9], ids=["one-edge", "uneven", "one-piece"])
def test_fast_path_in_blocks_of_receivers_equals_one_piece_with_gradients(block):
    # reference: the same network with edge_block large enough for one piece (the block size only bounds temporaries)
    whole = make(**NORMALS, edge_block=10**9)
    split = make(**NORMALS, edge_block=block)
    split.load_state_dict(whole.state_dict())
    points = random_cloud(b=2, n=30, seed=4).requires_grad_(True)
    normals = random_normals(b=2, n=30, seed=5)
    mask = torch.ones(2, 30, dtype=torch.bool)
    mask[0, -3:] = False
    grads = []
    outs = []
    for net in (whole, split):
        points.grad = None
        out = net(points, mask, normals=normals)
        out.square().sum().backward()
        outs.append(out.detach())
        grads.append(points.grad.clone())
    assert rel(outs[0], outs[1]) <= 1e-12 and rel(grads[0], grads[1]) <= 1e-12
    assert split.layers[0].edge_block == block


def test_context_reaches_past_the_neighbourhood_and_context_off_stays_local():
    # convention: docs/design.md, "Neighbourhoods and reach"; without context a layer only gathers from its k neighbours
    cloud = random_cloud(n=48, seed=21)
    first = 0
    near = torch.cdist(cloud[0], cloud[0])[first].argsort()  # nearest first
    far_a, far_b = int(near[-1]), int(near[-2])
    moved = cloud.clone()
    step = torch.tensor([0.05, -0.03, 0.02], dtype=torch.float64)
    moved[0, far_a] += step  # and the opposite on a second far point: the centroid stays put
    moved[0, far_b] -= step
    assert torch.allclose(cloud.mean(1), moved.mean(1), atol=1e-15)
    for context, expect_change in ((False, False), (True, True)):
        net = make(k=4, context=context)
        before = net.forward_features(cloud)[0]
        after = net.forward_features(moved)[0]
        change = max(rel(before[t][:, first], after[t][:, first]) for t in before)
        assert (change > 1e-6) == expect_change, (context, change)
    assert make(context=False).out_features < make().out_features  # the global readout adds invariants


# -- surface normals --------------------------------------------------------------------------


def test_normal_inputs_match_numpy_and_transform_by_type():
    # reference: numpy.linalg.det of [y, n, M n] and numpy.linalg.eigvalsh for sum (eig M - 1)^3;
    # closed form: n -> Q n, so scalars stay, vectors turn, pseudo-scalars take det Q
    import numpy as np

    net = make(**NORMALS)
    cloud, normals = threaded_cloud()
    centred = cloud - cloud.mean(1, keepdim=True)

    def inputs(points, normals):
        prepared = Cloud.of(net, points, None, normals)
        return normal_inputs(prepared, edges(prepared, net.config.k))

    out = inputs(centred, normals)
    y = centred[0].numpy() / np.sqrt(np.mean(np.sum(centred[0].numpy() ** 2, 1)))
    moment = 3 * (y.T @ y / len(y)) / np.mean(np.sum(y**2, 1))
    n = normals[0].numpy()
    chi = np.array([np.linalg.det(np.stack([y[i], n[i], moment @ n[i]])) for i in range(len(y))])
    aniso = np.sum((np.linalg.eigvalsh(moment) - 1) ** 3)
    np.testing.assert_allclose(out.pseudo[0, :, 0].numpy(), chi, atol=1e-12)
    np.testing.assert_allclose(out.scalars[0, :, 4].numpy(), aniso, rtol=1e-12)
    np.testing.assert_allclose(out.pseudo[0, :, 2].numpy(), chi.mean() * aniso, rtol=1e-10)
    # a long cylinder is a rod (a > 0); closed form: on the thread chi = (m_z - m_r) t_theta t_z y.e_r, with
    # t_theta t_z = -e depth cos^2: mean(chi) = -(m_z - m_r) e depth / 2 / rms, clearly non-zero and negative
    assert aniso > 0.1 and chi.mean() < -5e-3
    Q = random_improper(1, generator=torch.Generator().manual_seed(8), dtype=torch.float64)
    moved, turned = turn(centred, normals, Q)
    mirrored = inputs(moved, turned)
    torch.testing.assert_close(mirrored.scalars, out.scalars, rtol=1e-10, atol=1e-12)
    torch.testing.assert_close(mirrored.vectors, out.vectors @ Q.transpose(-1, -2)[:, None], rtol=1e-10, atol=1e-12)
    torch.testing.assert_close(mirrored.pseudo, -out.pseudo, rtol=1e-10, atol=1e-12)


def test_mirror_twins_told_apart_by_their_normals_with_se3_only():
    # common practice: a thread is chiral, its mirror image is the other hand (docs/design.md, "Parity and handedness");
    # closed form: an outward normal is a polar vector, n -> Q n under the reflection too
    cloud, normals = threaded_cloud()
    S = reflection(torch.tensor([1.0, 0.0, 0.0], dtype=torch.float64))
    Q = uniform_rotations(1, generator=torch.Generator().manual_seed(9), dtype=torch.float64) @ S
    mirror = turn(cloud, normals, Q)
    full = make(**L2, **NORMALS)
    even = make(symmetry="e3", **L2, **NORMALS)
    assert rel(full(cloud, normals=normals), full(mirror[0], normals=mirror[1])) > 1e-2
    assert rel(even(cloud, normals=normals), even(mirror[0], normals=mirror[1])) <= 1e-9
    # the point set alone is mirror-symmetric: without normals even se3 cannot tell the hands
    bare = make(**L2)
    assert rel(bare(cloud), bare(mirror[0])) <= 1e-9


# -- options --------------------------------------------------------------------------------


def test_channel_keys_may_be_strings_as_hydra_gives_them():
    # reference: YAML/Hydra deliver mapping keys as strings or ints (docs/design.md, "Options": no mini-language)
    from hydra.utils import instantiate
    from omegaconf import OmegaConf

    net = HarmonicAttentionBackbone(l_max=2, channels={"0": 16, "1": 8, "2": 4})
    assert net.config.channels == {0: 16, 1: 8, 2: 4}
    built = instantiate(OmegaConf.create({"_target_": "shapes.backbones.harmonic_attention.HarmonicAttentionBackbone",
                                          "l_max": 2, "channels": {0: 16, 1: 8, 2: 4}}))
    assert built.config.channels == {0: 16, 1: 8, 2: 4}


@pytest.mark.parametrize(
    "options,match",
    [
        ({"l_max": 4}, r"backbone\.l_max should be an integer in \[0, 3\], got 4"),
        ({"l_max": -1}, r"backbone\.l_max should be an integer in \[0, 3\], got -1"),
        ({"channels": {1: 8}}, r"degree 0"),
        ({"channels": {0: 8, 1: 4, 2: 2}}, r"channels key \(a degree\) should be an integer in \[0, 1\], got 2"),
        ({"channels": {0: 8, 1: 0}}, r"channels\[1\] \(a channel count\) should be an integer >= 1, got 0"),
        ({"channels": {0: 8, 1: 2.5}}, r"should be an integer >= 1, got 2\.5"),
        ({"channels": "0:16,1:8"}, r"should be a mapping"),
        ({"l_max": 2}, r"degree 2 \(l_max = 2\)"),
        ({"heads": 3}, r"heads = 3 should divide every channel count"),
        ({"symmetry": "odd"}, r"backbone\.symmetry should be one of se3, e3, got 'odd'"),
        ({"parity": "full"}, r"'parity' is now symmetry \(se3 \| e3"),
        ({"layers": 1}, r"symmetry se3 needs l_max >= 1 and layers >= 2"),
        ({"cutoff": 0.0}, r"backbone\.cutoff should be a finite number > 0"),
        ({"radius": -1.0}, r"backbone\.radius should be null or a finite number > 0"),
    ],
)
def test_bad_options_raise_config_errors(options, match):
    # convention: DEVELOPERS.md, "Adding a backbone": each option checked by shapes/_checks.py, one line
    with pytest.raises(ConfigError, match=match):
        HarmonicAttentionBackbone(**options)


@pytest.mark.parametrize(
    "options,match",
    [
        ({"context": 1}, r"backbone\.context should be true or false, got 1"),
        ({"edge_block": 0}, r"backbone\.edge_block should be an integer >= 1, got 0"),
        ({"normals": True, "l_max": 2, "channels": {0: 8, 2: 4}}, r"needs channels for degree 1"),
    ],
)
def test_bad_context_block_and_normals_options_raise_config_errors(options, match):
    # convention: DEVELOPERS.md, "Adding a backbone": each option checked by shapes/_checks.py, one line
    with pytest.raises(ConfigError, match=match):
        HarmonicAttentionBackbone(**options)
