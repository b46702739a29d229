"""One table of backbone cases drives the generic checks: shape, bad input, gradients,
state_dict round trip, masks, and the declared symmetry, in both directions."""

import pytest
import torch

from shapes.backbones import BACKBONES, build_backbone
from shapes.errors import ConfigError, InputError
from shapes.geometry import random_improper, uniform_rotations

# name, small options, expected symmetry
CASES = [
    ("plain", {"hidden": 16, "layers": 2}, "none"),
    ("distance", {"hidden": 16, "layers": 2, "k": 8}, "E3"),
]
try:  # backbones land one by one; the table covers every registered one that imports
    import shapes.backbones.vector_gate  # noqa: F401

    CASES += [("vector_gate", {"scalars": 16, "vectors": 8, "layers": 2, "k": 8}, "SE3"),
              ("vector_gate", {"scalars": 16, "vectors": 8, "layers": 2, "k": 8, "handedness": False}, "E3")]
except ImportError:
    pass
try:
    import shapes.backbones.harmonic_attention  # noqa: F401

    CASES += [("harmonic_attention", {"l_max": 1, "channels": {0: 8, 1: 4}, "layers": 2, "k": 8, "heads": 2}, "SE3"),
              ("harmonic_attention", {"l_max": 1, "channels": {0: 8, 1: 4}, "layers": 2, "k": 8, "heads": 2,
                                      "parity": "even"}, "E3")]
except ImportError:
    pass

IDS = [f"{n}-{s}" for n, _, s in CASES]
EQUIVARIANT = [c for c in CASES if c[2] != "none"]
EQ_IDS = [f"{n}-{s}" for n, _, s in EQUIVARIANT]


def make(name, options, dtype=torch.float64):
    torch.manual_seed(0)
    return build_backbone(name, **options).to(dtype).eval()


def rotate(points, R):
    return points @ R.transpose(-1, -2)  # convention: docs/design.md, "Rotations": x' = R x


def rel_change(a, b):
    a, b = a.detach(), b.detach()
    return float((a - b).abs().max() / a.abs().max().clamp_min(1e-30))


@pytest.fixture
def cloud():
    gen = torch.Generator().manual_seed(7)
    return torch.randn(3, 48, 3, generator=gen, dtype=torch.float64)  # generic cloud: chiral


def test_every_registered_backbone_is_in_the_table():
    importable = set()
    for name in BACKBONES:
        try:
            build_backbone(name)
            importable.add(name)
        except ImportError:
            pass
    assert importable <= {n for n, _, _ in CASES}


@pytest.mark.parametrize("name,options,symmetry", CASES, ids=IDS)
def test_output_shape_and_declared_symmetry(name, options, symmetry, cloud):
    net = make(name, options)
    out = net(cloud)
    assert out.shape == (3, net.out_features)
    assert torch.isfinite(out).all()
    assert net.symmetry == symmetry


@pytest.mark.parametrize("name,options,symmetry", CASES, ids=IDS)
@pytest.mark.parametrize("bad", [(3, 48), (3, 48, 2), (3, 48, 4)])
def test_wrong_point_shapes_raise(name, options, symmetry, bad):
    with pytest.raises(InputError, match=r"\(B, N, 3\)"):
        make(name, options)(torch.zeros(bad, dtype=torch.float64))


@pytest.mark.parametrize("name,options,symmetry", CASES, ids=IDS)
def test_unknown_option_raises(name, options, symmetry):
    with pytest.raises(ConfigError, match="no option"):
        build_backbone(name, **options, nonsense=1)


@pytest.mark.parametrize("name,options,symmetry", CASES, ids=IDS)
def test_gradients_reach_every_parameter(name, options, symmetry, cloud):
    net = make(name, options).train()
    net(cloud).square().sum().backward()
    missing = [n for n, p in net.named_parameters() if p.grad is None or not torch.isfinite(p.grad).all()
               or float(p.grad.abs().max()) == 0.0]
    assert not missing


@pytest.mark.parametrize("name,options,symmetry", CASES, ids=IDS)
def test_state_dict_round_trip(name, options, symmetry, cloud):
    net = make(name, options)
    again = build_backbone(name, **net.config_dict()).to(torch.float64).eval()
    again.load_state_dict(net.state_dict())
    torch.testing.assert_close(again(cloud), net(cloud), rtol=0, atol=0)


@pytest.mark.parametrize("name,options,symmetry", CASES, ids=IDS)
def test_padding_is_ignored(name, options, symmetry, cloud):
    net = make(name, options)
    junk = 50.0 + torch.randn(3, 10, 3, dtype=torch.float64)
    padded = torch.cat([cloud, junk], dim=1)
    mask = torch.cat([torch.ones(3, 48, dtype=torch.bool), torch.zeros(3, 10, dtype=torch.bool)], dim=1)
    torch.testing.assert_close(net(padded, mask), net(cloud), rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("name,options,symmetry", CASES, ids=IDS)
def test_translation_invariant(name, options, symmetry, cloud):
    # convention: docs/design.md, "Translations": every backbone sees centroid-relative or neighbour-relative coordinates
    net = make(name, options)
    shift = torch.tensor([[[3.0, -7.0, 11.0]]], dtype=torch.float64)
    assert rel_change(net(cloud), net(cloud + shift)) <= 1e-9


@pytest.mark.parametrize("name,options,symmetry", CASES, ids=IDS)
def test_declared_symmetry_holds_both_ways(name, options, symmetry, cloud):
    """E3: rotations and reflections leave features unchanged. SE3: rotations do, reflections
    of a chiral cloud do not. none: rotations change the features measurably."""
    net = make(name, options)
    gen = torch.Generator().manual_seed(3)
    base = net(cloud)
    rot = max(rel_change(base, net(rotate(cloud, uniform_rotations(3, generator=gen, dtype=torch.float64))))
              for _ in range(5))
    ref = max(rel_change(base, net(rotate(cloud, random_improper(3, generator=gen, dtype=torch.float64))))
              for _ in range(5))
    if symmetry == "none":
        assert rot > 1e-3
    else:
        assert rot <= 1e-9
    if symmetry == "E3":
        assert ref <= 1e-9
    else:
        assert ref > 1e-3


@pytest.mark.parametrize("name,options,symmetry", EQUIVARIANT, ids=EQ_IDS)
def test_float32_invariance_within_tolerance(name, options, symmetry, cloud):
    net = make(name, options, dtype=torch.float32)
    x = cloud.float()
    R = uniform_rotations(3, generator=torch.Generator().manual_seed(5))
    assert rel_change(net(x), net(rotate(x, R))) <= 1e-4


@pytest.mark.parametrize("name,options,symmetry", EQUIVARIANT, ids=EQ_IDS)
def test_too_few_points_for_k_raises(name, options, symmetry):
    with pytest.raises(InputError, match="at least"):
        make(name, options)(torch.randn(1, 5, 3, dtype=torch.float64))


# Backbones that take normals, with their two sign conventions. Closed form for the check: a unit
# normal and its negative span the same line, so a backbone that reads normals as axes
# (signed_normals: false) must give identical features when any of them is reversed, and one that
# reads the outward sign must not; both must still turn with the points and (when handed) see a
# mirror image. A reversed field of estimated normals is a real scan failure (single-view signs).
NORMAL_CASES = [(n, o) for n, o, s in CASES if n in ("vector_gate", "harmonic_attention") and s == "SE3"]


@pytest.mark.parametrize("name,options", NORMAL_CASES, ids=[n for n, _ in NORMAL_CASES])
@pytest.mark.parametrize("signed", [False, True])
def test_normal_signs_ignored_unless_signed(name, options, signed, cloud):
    net = make(name, {**options, "normals": True, "signed_normals": signed})
    gen = torch.Generator().manual_seed(11)
    normals = torch.nn.functional.normalize(torch.randn(cloud.shape, generator=gen, dtype=torch.float64), dim=-1)
    flip = torch.where(torch.rand(cloud.shape[:2] + (1,), generator=gen) < 0.4, -1.0, 1.0).to(torch.float64)
    base = net(cloud, normals=normals)
    reversed_some = net(cloud, normals=normals * flip)
    R = uniform_rotations(1, generator=gen, dtype=torch.float64)[0]
    turned = net(rotate(cloud, R) + 0.3, normals=rotate(normals * flip, R))
    Q = random_improper(1, generator=gen, dtype=torch.float64)[0]
    mirrored = net(rotate(cloud, Q), normals=rotate(normals, Q))
    if signed:
        assert rel_change(base, reversed_some) > 1e-3
    else:
        assert rel_change(base, reversed_some) < 1e-12
        assert rel_change(base, turned) < 1e-9
    assert rel_change(base, mirrored) > 1e-3  # the hand is still seen through the axes


def test_signed_normals_must_be_a_flag():
    for name, options in NORMAL_CASES:
        with pytest.raises(ConfigError, match="signed_normals"):
            build_backbone(name, **{**options, "normals": True, "signed_normals": "yes"})
