"""Harmonic-filter attention: invariance and per-layer equivariance, parity in both directions,
fast path against the dense reference, masks, numerics and option validation."""

import math
from pathlib import Path

import pytest
import torch

from shapes.backbones._equivariant import (
    GlobalVectorReadout,
    angular_pairs,
    layer_paths,
    masked_softmax,
    proper_parity,
)
from shapes.backbones.harmonic_attention import HarmonicAttentionBackbone
from shapes.errors import ConfigError, InputError
from shapes.geometry import random_improper, uniform_rotations, reflection, wigner_d

SMALL = {"k": 8}  # default channels and layers, small neighbourhoods: the shipped architecture, cheaply


def make(dtype=torch.float64, seed=0, **options):
    torch.manual_seed(seed)
    return HarmonicAttentionBackbone(**{**SMALL, **options}).to(dtype).eval()


def rotate(points, R):
    return points @ R.transpose(-1, -2)  # convention: docs/design.md, "Rotations": x' = R x


def rel(a, b):
    a, b = a.detach(), b.detach()
    return float((a - b).abs().max() / a.abs().max().clamp_min(1e-30))


def random_cloud(b=1, n=64, seed=7, dtype=torch.float64):
    return torch.randn(b, n, 3, generator=torch.Generator().manual_seed(seed), dtype=dtype)


NORMALS = {"k": 8, "normals": True}


def random_normals(b=1, n=64, seed=17, dtype=torch.float64):
    v = torch.randn(b, n, 3, generator=torch.Generator().manual_seed(seed), dtype=dtype)
    return v / v.norm(dim=-1, keepdim=True)


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


def transform_features(features: dict, Q: torch.Tensor) -> dict:
    """Expected features after the orthogonal map ``Q (B, 3, 3)``: type (l, p) goes to ``s_p D_l(R) x``.

    ``R = Q`` and ``s = 1`` for a rotation; ``R = -Q`` and ``s = p`` for an improper map (docs/design.md,
    "Wigner-D" and "Parity and handedness": Y_l(R v) = D_l(R) Y_l(v), and inversion multiplies a parity-p
    feature by p).
    """
    improper = torch.det(Q) < 0  # (B,)
    R = torch.where(improper[:, None, None], -Q, Q)
    out = {}
    for (l, p), x in features.items():
        D = wigner_d(l, R)  # (B, 2l+1, 2l+1)
        sign = torch.where(improper, float(p), 1.0).to(x.dtype)[:, None, None, None]
        out[(l, p)] = sign * torch.einsum("bnci,bji->bncj", x, D)  # (B, N, C, 2l+1)
    return out


# -- invariance and equivariance --------------------------------------------------------------


@pytest.mark.parametrize("dtype,tol", [(torch.float64, 1e-9), (torch.float32, 1e-4)])
def test_features_invariant_under_50_rotations_and_translations(dtype, tol):
    # claim: docs/design.md, "Backbone contract" and "Translations"; Haar rotations from shapes.geometry (KS-tested there)
    net = make(dtype)
    cloud = random_cloud(dtype=dtype)
    R = uniform_rotations(50, generator=torch.Generator().manual_seed(1), dtype=dtype)
    shift = torch.randn(50, 1, 3, generator=torch.Generator().manual_seed(2), dtype=dtype) * 5
    moved = rotate(cloud.expand(50, -1, -1), R) + shift
    base = net(cloud)
    assert rel(base.expand(50, -1), net(moved)) <= tol
    # both directions: the features do depend on the cloud's shape
    assert rel(base, net(random_cloud(seed=8, dtype=dtype))) > 1e-2


@pytest.mark.parametrize("improper", [False, True], ids=["rotation", "improper"])
@pytest.mark.parametrize("options", [{}, {"l_max": 3, "channels": {0: 8, 1: 4, 2: 2, 3: 2}}, {"parity": "even"}],
                         ids=["default", "l3", "even"])
def test_every_layer_transforms_with_wigner_d_and_parity(options, improper):
    # reference: Wigner-D from shapes.geometry (checked against sympy there); parity rule: docs/design.md,
    # "Parity and handedness"
    net = make(**options)
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


def test_full_parity_builds_pseudo_quantities_and_even_parity_does_not():
    # convention: docs/design.md, "Parity and handedness"; a pseudo-scalar flips sign under a reflection (checked above)
    full = make()
    assert full.symmetry == "SE3"
    assert (0, -1) in full.types_out and (1, 1) in full.types_out  # pseudo-scalar, pseudovector
    even = make(parity="even")
    assert even.symmetry == "E3"
    assert all(p == proper_parity(l) for l, p in even.types_out)
    # in "even" mode every path couples proper to proper: l_in + l_f + l_out is even
    for l_in in range(3):
        assert all((l_in + l_f + l_out) % 2 == 0 for l_f, l_out in angular_pairs(l_in, [0, 1, 2], "even"))
    # 1 x 1 -> 1 from a vector (the cross product) is a pseudovector
    paths = layer_paths({(1, -1): 4}, [0, 1, 2], "full")
    assert [(p.l_f, p.t_out) for p in paths if p.t_out[0] == 1 and p.l_f == 1] == [(1, (1, 1))]


def test_mirror_twins_differ_with_full_parity_and_agree_with_even_parity():
    # closed form: a helix with a lump is chiral (no rotation maps it onto its mirror image);
    # parity rule: docs/design.md, "Parity and handedness"
    cloud = helix_cloud()
    mirror = rotate(cloud, reflection(torch.tensor([1.0, 0.0, 0.0], dtype=torch.float64)))
    turned = rotate(mirror, uniform_rotations(1, generator=torch.Generator().manual_seed(9), dtype=torch.float64))
    full, even = make(), make(parity="even")
    assert rel(full(cloud), full(mirror)) > 1e-3
    assert rel(full(cloud), full(turned)) > 1e-3
    assert rel(even(cloud), even(mirror)) <= 1e-9
    assert rel(even(cloud), even(turned)) <= 1e-9


# -- fast path against the dense reference ----------------------------------------------------


@pytest.mark.parametrize(
    "options",
    [
        {},
        {"parity": "even", "heads": 1},
        {"l_max": 3, "channels": {0: 4, 1: 2, 2: 2, 3: 2}, "layers": 2},
        {"l_max": 2, "channels": {0: 4, 2: 2}, "radius": 0.9, "cutoff": 0.9},  # a missing degree; radius graph
        {"channels": {0: 8, 1: 4, 2: 2}, **NORMALS},
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


# -- global context ---------------------------------------------------------------------------


def test_global_vector_readout_matches_numpy_and_transforms_by_parity():
    # reference: numpy.linalg.det and numpy dot products of the mixed vectors; det[Qa, Qb, Qc] = det Q det[a, b, c]
    import numpy as np

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
        moved = transform_features({(1, -1): g[:, None]}, Q)[(1, -1)][:, 0]
        turned = readout(moved)
        sign = torch.det(Q)[:, None]
        assert rel(out[:, :6], turned[:, :6]) <= 1e-12  # dot products: invariant
        assert rel(out[:, 6:] * sign, turned[:, 6:]) <= 1e-12  # triple products: times det Q
    assert out[:, 6:].abs().min() > 1e-6  # both directions: the pseudo-scalars are not zero to start with
    assert GlobalVectorReadout(6, chiral=False).width == 6


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


# -- masks and numerics -----------------------------------------------------------------------


def test_padding_changes_nothing_for_the_real_points():
    # convention: docs/design.md, "Tensor shapes": mask True = real point
    net = make()
    cloud = random_cloud(b=2, n=40)
    junk = torch.cat([torch.full((2, 6, 3), 1e3, dtype=torch.float64), torch.zeros(2, 6, 3, dtype=torch.float64)], 1)
    padded = torch.cat([cloud, junk], 1)
    mask = torch.cat([torch.ones(2, 40, dtype=torch.bool), torch.zeros(2, 12, dtype=torch.bool)], 1)
    assert rel(net(cloud), net(padded, mask)) <= 1e-12
    for plain, pad in zip(net.forward_features(cloud), net.forward_features(padded, mask)):
        for t in plain:
            assert rel(plain[t], pad[t][:, :40]) <= 1e-12
    # the masked slots would matter if they were real points
    assert rel(net(cloud), net(padded)) > 1e-3


def test_masked_softmax_is_stable_and_empty_neighbourhoods_give_zeros():
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


def test_duplicate_points_stay_finite():
    # reference: shapes.geometry harmonics are finite at zero vectors; a coincident neighbour has r = 0
    net = make()
    cloud = random_cloud(n=40)
    cloud = torch.cat([cloud, cloud[:, :5]], 1).requires_grad_(True)
    out = net(cloud)
    out.sum().backward()
    assert torch.isfinite(out).all() and torch.isfinite(cloud.grad).all()


def test_every_parameter_of_the_default_network_gets_a_gradient():
    # reference: common practice; an unused parameter would point to a path with no effect
    net = make().train()
    net(random_cloud(b=2, n=32)).square().sum().backward()
    assert [n for n, p in net.named_parameters() if p.grad is None or float(p.grad.abs().max()) == 0.0] == []


# -- options --------------------------------------------------------------------------------


def test_channel_keys_may_be_strings_and_the_yaml_builds_the_default():
    # reference: YAML/Hydra deliver mapping keys as strings or ints (docs/design.md, "Options": no mini-language)
    from hydra.utils import instantiate
    from omegaconf import OmegaConf

    net = HarmonicAttentionBackbone(channels={"0": 16, "1": 8, "2": 4})
    assert net.config.channels == {0: 16, 1: 8, 2: 4}
    conf = OmegaConf.load(Path(__file__).parents[1] / "shapes/conf/backbone/harmonic_attention.yaml")
    built = instantiate(conf)
    assert isinstance(built, HarmonicAttentionBackbone)
    for key in ("l_max", "layers", "heads", "k", "parity", "num_radial", "cutoff", "normals", "context"):
        assert getattr(built.config, key) == conf[key]
    assert built.config.channels == {int(k): v for k, v in conf.channels.items()}


@pytest.mark.parametrize(
    "options,match",
    [
        ({"l_max": 4}, r"l_max should be in 0\.\.3, got 4"),
        ({"l_max": -1}, r"l_max should be an integer >= 0, got -1"),
        ({"channels": {1: 8, 2: 4}}, r"degree 0"),
        ({"channels": {0: 8, 1: 4, 2: 2, 3: 2}}, r"has degree 3, expected degrees 0\.\.l_max = 0\.\.2"),
        ({"channels": {0: 8, 1: 0, 2: 4}}, r"channels\[1\] should be a positive channel count, got 0"),
        ({"channels": {0: 8, 1: 2.5, 2: 4}}, r"should be an integer, got 2\.5"),
        ({"channels": "0:16,1:8"}, r"should be a mapping"),
        ({"l_max": 3}, r"degree 3 \(l_max = 3\)"),
        ({"heads": 3}, r"heads = 3 should divide every channel count"),
        ({"parity": "odd"}, r"parity should be one of \['full', 'even'\], got 'odd'"),
        ({"layers": 1}, r"parity 'full' needs l_max >= 1 and layers >= 2"),
        ({"cutoff": 0.0}, r"cutoff should be a positive number"),
        ({"radius": -1.0}, r"radius should be a positive number"),
    ],
)
def test_bad_options_raise_config_errors(options, match):
    with pytest.raises(ConfigError, match=match):
        HarmonicAttentionBackbone(**options)


def test_too_small_cloud_for_k_raises_input_error():
    net = make(k=16)
    with pytest.raises(InputError, match=r"k = 16 neighbours needs clouds of at least 17 points, got 12"):
        net(random_cloud(n=12))
    # the smallest real cloud of a padded batch decides
    mask = torch.ones(2, 20, dtype=torch.bool)
    mask[0, 12:] = False
    with pytest.raises(InputError, match="got 12"):
        net(random_cloud(b=2, n=20), mask)


# -- surface normals --------------------------------------------------------------------------

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


@pytest.mark.parametrize("parity", ["full", "even"])
def test_normals_features_invariant_under_50_rotations_and_translations(parity):
    # claim: docs/design.md, "Backbone contract"; closed form: normals turn as n -> R n and ignore translations
    net = make(parity=parity, channels={0: 8, 1: 4, 2: 2}, **NORMALS)
    cloud, normals = random_cloud(), random_normals()
    R = uniform_rotations(50, generator=torch.Generator().manual_seed(1), dtype=torch.float64)
    shift = torch.randn(50, 1, 3, generator=torch.Generator().manual_seed(2), dtype=torch.float64) * 5
    moved, turned = turn(cloud.expand(50, -1, -1), normals.expand(50, -1, -1), R)
    base = net(cloud, normals=normals)
    assert rel(base.expand(50, -1), net(moved + shift, normals=turned)) <= 1e-9
    # both directions: the features depend on the normals, not only on the points
    assert rel(base, net(cloud, normals=random_normals(seed=18))) > 1e-2


@pytest.mark.parametrize("improper", [False, True], ids=["rotation", "improper"])
@pytest.mark.parametrize("parity", ["full", "even"])
def test_normals_every_layer_transforms_with_wigner_d_and_parity(parity, improper):
    # reference: Wigner-D from shapes.geometry (checked against sympy there); parity rule: docs/design.md,
    # "Parity and handedness";
    # closed form: an outward normal is a polar vector, n -> Q n
    net = make(parity=parity, channels={0: 8, 1: 4, 2: 2}, **NORMALS)
    cloud, normals = random_cloud(n=40), random_normals(n=40)
    gen = torch.Generator().manual_seed(4)
    Q = (random_improper if improper else uniform_rotations)(3, generator=gen, dtype=torch.float64)
    before = net.forward_features(cloud.expand(3, -1, -1), normals=normals.expand(3, -1, -1))
    moved, turned = turn(cloud.expand(3, -1, -1), normals.expand(3, -1, -1), Q)
    after = net.forward_features(moved, normals=turned)
    for layer_before, layer_after in zip(before, after):
        expected = transform_features(layer_before, Q)
        for t in layer_before:
            assert rel(expected[t], layer_after[t]) <= 1e-9, t
    # the normals enter as degree-1 inputs: the first layer's degree-1 features do turn
    assert rel(before[0][(1, -1)], after[0][(1, -1)]) > 1e-2


def test_turning_the_points_but_not_the_normals_changes_the_output():
    # closed form: a consistent pose turns both (n -> R n); turning only the points breaks the surface
    net = make(channels={0: 8, 1: 4, 2: 2}, **NORMALS)
    cloud, normals = random_cloud(), random_normals()
    R = uniform_rotations(4, generator=torch.Generator().manual_seed(6), dtype=torch.float64)
    base = net(cloud, normals=normals).expand(4, -1)
    moved, turned = turn(cloud.expand(4, -1, -1), normals.expand(4, -1, -1), R)
    assert rel(base, net(moved, normals=turned)) <= 1e-9
    assert rel(base, net(moved, normals=normals.expand(4, -1, -1))) > 1e-2


def test_normal_inputs_match_numpy_and_transform_by_type():
    # reference: numpy.linalg.det of [y, n, M n] and numpy.linalg.eigvalsh for sum (eig M - 1)^3;
    # closed form: n -> Q n, so scalars stay, vectors turn, pseudo-scalars take det Q
    import numpy as np

    from shapes.backbones.harmonic_attention import normal_inputs

    net = make(**NORMALS)
    cloud, normals = threaded_cloud()
    centred = cloud - cloud.mean(1, keepdim=True)
    mask = torch.ones(cloud.shape[:2], dtype=torch.bool)
    out = normal_inputs(centred, normals, mask, net.edge_frame(centred, mask))
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
    mirrored = normal_inputs(moved, turned, mask, net.edge_frame(moved, mask))
    torch.testing.assert_close(mirrored.scalars, out.scalars, rtol=1e-10, atol=1e-12)
    torch.testing.assert_close(mirrored.vectors, out.vectors @ Q.transpose(-1, -2)[:, None], rtol=1e-10, atol=1e-12)
    torch.testing.assert_close(mirrored.pseudo, -out.pseudo, rtol=1e-10, atol=1e-12)


def test_mirror_twins_told_apart_by_their_normals_with_full_parity_only():
    # common practice: a thread is chiral, its mirror image is the other hand (docs/design.md, "Parity and handedness");
    # closed form: an outward normal is a polar vector, n -> Q n under the reflection too
    cloud, normals = threaded_cloud()
    S = reflection(torch.tensor([1.0, 0.0, 0.0], dtype=torch.float64))
    Q = uniform_rotations(1, generator=torch.Generator().manual_seed(9), dtype=torch.float64) @ S
    mirror = turn(cloud, normals, Q)
    full = make(channels={0: 8, 1: 4, 2: 2}, **NORMALS)
    even = make(parity="even", channels={0: 8, 1: 4, 2: 2}, **NORMALS)
    assert rel(full(cloud, normals=normals), full(mirror[0], normals=mirror[1])) > 1e-2
    assert rel(even(cloud, normals=normals), even(mirror[0], normals=mirror[1])) <= 1e-9
    # the point set alone is mirror-symmetric: without normals even parity "full" cannot tell the hands
    bare = make(channels={0: 8, 1: 4, 2: 2}, k=8)
    assert rel(bare(cloud), bare(mirror[0])) <= 1e-9


def test_padding_with_junk_normals_changes_nothing_and_every_parameter_learns():
    # convention: docs/design.md, "Tensor shapes": mask True = real point; common practice: no dead parameters
    net = make(channels={0: 8, 1: 4, 2: 2}, **NORMALS)
    cloud, normals = random_cloud(b=2, n=40), random_normals(b=2, n=40)
    padded = torch.cat([cloud, torch.full((2, 6, 3), 1e3, dtype=torch.float64)], 1)
    junk = torch.cat([normals, torch.full((2, 6, 3), -7.0, dtype=torch.float64)], 1)
    mask = torch.cat([torch.ones(2, 40, dtype=torch.bool), torch.zeros(2, 6, dtype=torch.bool)], 1)
    assert rel(net(cloud, normals=normals), net(padded, mask, normals=junk)) <= 1e-12
    net.train()
    net(cloud, normals=normals).square().sum().backward()
    assert [n for n, p in net.named_parameters() if p.grad is None or float(p.grad.abs().max()) == 0.0] == []


def test_missing_or_misshapen_normals_raise_and_normals_false_ignores_them():
    from shapes.backbones import Classifier

    net = make(**NORMALS)
    assert net.uses_normals and Classifier(net, 3).uses_normals
    cloud = random_cloud(n=20)
    with pytest.raises(InputError, match=r"needs normals \(B, N, 3\)") as missing:
        net(cloud)
    assert "\n" not in str(missing.value)
    with pytest.raises(InputError, match=r"normals should have the points' shape \(1, 20, 3\), got \(1, 19, 3\)"):
        net(cloud, normals=random_normals(n=19))
    with pytest.raises(InputError, match="needs normals"):
        net.forward_features(cloud)
    plain = make()
    assert not plain.uses_normals and not Classifier(plain, 3).uses_normals
    assert torch.equal(plain(cloud), plain(cloud, normals=random_normals(n=20)))
    assert torch.equal(plain(cloud), plain(cloud, normals=random_normals(n=5)))  # not even checked


@pytest.mark.parametrize(
    "options,match",
    [
        ({"normals": "yes"}, r"normals should be true or false, got 'yes'"),
        ({"context": 1}, r"context should be true or false, got 1"),
        ({"edge_block": 0}, r"edge_block should be an integer >= 1, got 0"),
        ({"normals": True, "channels": {0: 8, 2: 4}}, r"needs channels for degree 1"),
    ],
)
def test_bad_normals_options_raise_config_errors(options, match):
    with pytest.raises(ConfigError, match=match):
        HarmonicAttentionBackbone(**options)
