"""One table of backbone cases drives every generic check: shape, each bad input, options, gradients,
state_dict round trip, padding, duplicate points, the declared symmetry in both directions (points and
normals), per-layer equivariance of the feature dicts, normals read as axes, float32 tolerance, and
the shipped yaml against each Config."""

import dataclasses
from typing import NamedTuple

import pytest
import torch
from conftest import (
    SHIPPED_BACKBONES,
    random_cloud,
    random_normals,
    rel_change,
    rotate,
    shipped_options,
    transform_features,
)

from shapes.backbones import BACKBONES, RENAMED, backbone_class, build_backbone, stored_options
from shapes.errors import ConfigError, InputError
from shapes.geometry import random_improper, uniform_rotations

N = 48  # points per test cloud


def shipped_normals(name: str) -> dict:
    """The normals column: the normals settings shapes/conf/backbone/<name>.yaml ships."""
    conf = shipped_options(name)
    return {k: conf[k] for k in ("normals", "signed_normals") if k in conf}


# Bad inputs: what is wrong -> (how to break a good call, the one-line error it must give).
# A call is a dict of forward's arguments: points, mask, normals (None when the backbone takes none).
def _set(**changes):
    return lambda call, net: {**call, **changes}


def _edit(key, fn):
    return lambda call, net: {**call, key: fn(call[key], net)}


def _at_real_point(value):
    def put(x, net):
        x = x.clone()
        x[0, 3, 1] = value
        return x
    return put


def _too_few(call, net):
    """One real point fewer than the backbone needs (k + 1 for a kNN backbone, 1 for the others)."""
    mask = torch.zeros(call["points"].shape[:2], dtype=torch.bool)
    mask[:, : net.min_points - 1] = True
    return {**call, "mask": mask}


BAD_POINTS = {
    "points (B, N)": (_edit("points", lambda x, net: x[..., 0]), r"points should have shape \(B, N, 3\)"),
    "points (B, N, 2)": (_edit("points", lambda x, net: x[..., :2]), r"points should have shape \(B, N, 3\)"),
    "points (B, N, 4)": (_edit("points", lambda x, net: torch.cat([x, x[..., :1]], -1)), r"\(B, N, 3\)"),
    "points a list": (_edit("points", lambda x, net: x.tolist()), r"points should have shape \(B, N, 3\)"),
    "points int64": (_edit("points", lambda x, net: x.long()), r"points should be torch.float64"),
    "points float32, weights float64": (_edit("points", lambda x, net: x.float()), r"points should be torch.float64"),
    "NaN at a real point": (_edit("points", _at_real_point(float("nan"))), r"points should be finite"),
    "inf at a real point": (_edit("points", _at_real_point(float("inf"))), r"points should be finite"),
    "mask (B, N + 1)": (_edit("mask", lambda m, net: torch.ones(m.shape[0], m.shape[1] + 1, dtype=torch.bool)),
                        r"mask should have shape \(B, N\)"),
    "mask float": (_edit("mask", lambda m, net: m.double()), r"mask should be bool"),
    "too few real points": (_too_few, r"needs clouds of at least \d+ points, got \d+"),
}
BAD_NORMALS = {
    "normals missing": (_set(normals=None), r"needs normals \(B, N, 3\)"),
    "normals (B, N - 1, 3)": (_edit("normals", lambda n, net: n[:, 1:]), r"normals should have the points' shape"),
    "normals int64": (_edit("normals", lambda n, net: n.long()), r"normals should be a floating dtype"),
    "NaN normal at a real point": (_edit("normals", _at_real_point(float("nan"))), r"normals should be finite"),
}


class Case(NamedTuple):
    name: str
    options: dict  # small, for speed; the normals column is added on top
    normals: dict  # the normals settings (shipped, or bare points)
    symmetry: str  # declared: "E3", "SE3" or "none"
    bad: dict  # the bad-input column: what is wrong -> (break a good call, expected error)

    @property
    def built(self) -> dict:
        return {**self.options, **self.normals}

    @property
    def bare(self) -> dict:
        """The options on bare points (normals off where the backbone has the option)."""
        return {**self.options, **({"normals": False} if "normals" in self.normals else {})}

    @property
    def id(self) -> str:
        extra = "-".join(f"{k}={v}" for k, v in {**self.options, **self.normals}.items()
                         if k in ("symmetry", "normals", "signed_normals"))
        return f"{self.name}-{self.symmetry}" + (f"-{extra}" if extra else "")


def case(name, options, symmetry, normals=None):
    normals = shipped_normals(name) if normals is None else normals
    return Case(name, options, normals, symmetry, {**BAD_POINTS, **(BAD_NORMALS if normals.get("normals") else {})})


VECTOR_GATE = {"scalars": 16, "vectors": 8, "layers": 2, "k": 8}
HARMONIC = {"l_max": 1, "channels": {0: 8, 1: 4}, "layers": 2, "k": 8, "heads": 2}
CASES = [
    case("plain", {"hidden": 16, "layers": 2}, "none"),
    case("distance", {"hidden": 16, "layers": 2, "k": 8}, "E3"),
    case("vector_gate", VECTOR_GATE, "SE3"),
    case("vector_gate", {**VECTOR_GATE, "symmetry": "e3"}, "E3"),
    case("vector_gate", VECTOR_GATE, "SE3", normals={"normals": False}),
    case("harmonic_attention", HARMONIC, "SE3"),
    case("harmonic_attention", {**HARMONIC, "symmetry": "e3"}, "E3"),
    case("harmonic_attention", HARMONIC, "SE3", normals={"normals": False}),
]
IDS = [c.id for c in CASES]
EQUIVARIANT = [c for c in CASES if c.symmetry != "none"]
EQ_IDS = [c.id for c in EQUIVARIANT]
WITH_NORMALS = [c for c in CASES if c.normals.get("normals")]
BAD = [(c, what) for c in CASES for what in c.bad]


def make(c: Case, dtype=torch.float64, **extra):
    torch.manual_seed(0)
    return build_backbone(c.name, **{**c.built, **extra}).to(dtype).eval()


def call(net, points, mask=None, normals=None):
    return net(points, mask, normals=normals) if net.uses_normals else net(points, mask)


@pytest.fixture
def cloud():
    return random_cloud(3, N, seed=7)  # generic cloud: chiral


@pytest.fixture
def normals():
    return random_normals(3, N, seed=17)


def test_every_registered_backbone_and_shipped_yaml_is_in_the_table():
    # convention: DEVELOPERS.md, "Adding a backbone": one file, one yaml, rows of this table
    assert set(BACKBONES) == {c.name for c in CASES}
    assert {p.stem for p in SHIPPED_BACKBONES.glob("*.yaml")} == set(BACKBONES) | {"d2"}  # d2: not a network


def test_a_backbone_file_registers_the_class_of_its_own_name(monkeypatch):
    # convention: DEVELOPERS.md, "Adding a backbone": the file is the registration, named as the backbone
    assert all(backbone_class(name).name == name for name in BACKBONES)
    monkeypatch.setitem(BACKBONES, "plain", "shapes.backbones.distance")  # a file whose class has another name
    with pytest.raises(ConfigError, match=r"distance\.py should define one Backbone subclass with name = 'plain', found 0"):
        backbone_class("plain")


@pytest.mark.parametrize("name", sorted(BACKBONES) + ["d2"])
def test_shipped_yaml_agrees_with_the_config_defaults(name):
    # convention: docs/design.md, "Options": the Config dataclass holds every default, the yaml repeats them
    from shapes.classic import D2Options

    config = D2Options if name == "d2" else backbone_class(name).Config
    defaults = {f.name: f.default if f.default is not dataclasses.MISSING else f.default_factory()
                for f in dataclasses.fields(config)}
    assert shipped_options(name) == defaults
    if name != "d2":  # and the yaml builds what the defaults build
        assert build_backbone(name, **shipped_options(name)).config_dict() == build_backbone(name).config_dict()


@pytest.mark.parametrize("c", CASES, ids=IDS)
def test_output_shape_and_declared_symmetry(c, cloud, normals):
    # convention: docs/design.md, "Backbone contract": (B, N, 3) -> (B, out_features), symmetry declared
    net = make(c)
    out = call(net, cloud, None, normals)
    assert out.shape == (3, net.out_features)
    assert torch.isfinite(out).all()
    assert net.symmetry == c.symmetry
    assert net.uses_normals == bool(c.normals.get("normals"))


@pytest.mark.parametrize("c,what", BAD, ids=[f"{c.id}-{what}" for c, what in BAD])
def test_each_bad_input_gives_one_clean_line(c, what, cloud, normals):
    # convention: docs/design.md, "Backbone contract" (the input checks) and DEVELOPERS.md: one line per mistake
    net = make(c)
    good = {"points": cloud, "mask": torch.ones(3, N, dtype=torch.bool), "normals": normals if net.uses_normals else None}
    breaks, message = c.bad[what]
    with pytest.raises(InputError, match=message) as error:
        call(net, **breaks(good, net))
    assert "\n" not in str(error.value)


@pytest.mark.parametrize("c", CASES, ids=IDS)
def test_unknown_and_renamed_options_raise_one_line(c):
    # convention: README, "Backbones": the old names handedness and parity are refused naming symmetry
    with pytest.raises(ConfigError, match="no option"):
        build_backbone(c.name, **c.built, nonsense=1)
    for old in RENAMED:
        with pytest.raises(ConfigError, match=rf"'{old}' is now symmetry \(se3 \| e3"):
            build_backbone(c.name, **c.built, **{old: True})


def test_stored_options_of_old_checkpoints_map_to_symmetry():
    # convention: DEVELOPERS.md, "Run folders": a checkpoint records the options it was trained with
    assert stored_options("vector_gate", {"handedness": True, "signed_normals": False}) == {
        "symmetry": "se3", "signed_normals": False}
    assert stored_options("vector_gate", {"handedness": False})["symmetry"] == "e3"
    assert stored_options("harmonic_attention", {"parity": "full"})["symmetry"] == "se3"
    assert stored_options("harmonic_attention", {"parity": "even"}) == {"symmetry": "e3", "signed_normals": True}
    assert stored_options("distance", {"k": 8}) == {"k": 8}


@pytest.mark.parametrize("c", CASES, ids=IDS)
def test_gradients_reach_every_parameter_and_input(c, cloud, normals):
    # common practice: an unused parameter or input points to a path with no effect
    net = make(c).train()
    cloud, normals = cloud.clone().requires_grad_(True), normals.clone().requires_grad_(True)
    call(net, cloud, None, normals).square().sum().backward()
    missing = [n for n, p in net.named_parameters() if p.grad is None or not torch.isfinite(p.grad).all()
               or float(p.grad.abs().max()) == 0.0]
    assert not missing
    assert float(cloud.grad.abs().max()) > 0
    if net.uses_normals:
        assert float(normals.grad.abs().max()) > 0  # the output really depends on the normals


@pytest.mark.parametrize("c", CASES, ids=IDS)
def test_state_dict_round_trip(c, cloud, normals):
    # convention: DEVELOPERS.md, "Run folders": a checkpoint's options and weights rebuild the network exactly
    net = make(c)
    again = build_backbone(c.name, **net.config_dict()).to(torch.float64).eval()
    again.load_state_dict(net.state_dict())
    torch.testing.assert_close(call(again, cloud, None, normals), call(net, cloud, None, normals), rtol=0, atol=0)


@pytest.mark.parametrize("c", CASES, ids=IDS)
def test_padding_is_ignored(c, cloud, normals):
    # convention: docs/design.md, "Tensor shapes": padded points change nothing, whatever they hold
    net = make(c)
    junk = 50.0 + torch.randn(3, 10, 3, dtype=torch.float64)
    junk[0, 4] = float("nan")  # even NaN at a padded point cannot leak
    padded = torch.cat([cloud, junk], dim=1)
    mask = torch.cat([torch.ones(3, N, dtype=torch.bool), torch.zeros(3, 10, dtype=torch.bool)], dim=1)
    out = call(net, padded, mask, torch.cat([normals, junk], 1))
    assert torch.isfinite(out).all()
    torch.testing.assert_close(out, call(net, cloud, None, normals), rtol=1e-9, atol=1e-9)
    # the other direction: taken as real points, the junk does change the features
    assert rel_change(out, call(net, torch.nan_to_num(padded), None, torch.cat([normals, normals[:, :10]], 1))) > 1e-3


@pytest.mark.parametrize("c", CASES, ids=IDS)
def test_duplicate_points_stay_finite(c, cloud, normals):
    # closed form: a coincident neighbour has r_ij = 0, whose length and direction must not give NaN
    net = make(c)
    cloud = torch.cat([cloud, cloud[:, :5]], 1).requires_grad_(True)
    out = call(net, cloud, None, torch.cat([normals, normals[:, :5]], 1))
    out.sum().backward()
    assert torch.isfinite(out).all() and torch.isfinite(cloud.grad).all()


@pytest.mark.parametrize("c", CASES, ids=IDS)
def test_translation_invariant(c, cloud, normals):
    # convention: docs/design.md, "Translations": every backbone sees centroid-relative or neighbour-relative coordinates
    net = make(c)
    shift = torch.tensor([[[3.0, -7.0, 11.0]]], dtype=torch.float64)
    assert rel_change(call(net, cloud, None, normals), call(net, cloud + shift, None, normals)) <= 1e-9


@pytest.mark.parametrize("c", CASES, ids=IDS)
def test_declared_symmetry_holds_both_ways(c, cloud, normals):
    """E3: rotations and reflections leave features unchanged. SE3: rotations do, reflections of a
    chiral cloud do not. none: rotations change the features measurably. Normals turn with the points
    (closed form: a normal is a polar vector, n -> Q n, reflections included)."""
    net = make(c)
    gen = torch.Generator().manual_seed(3)
    base = call(net, cloud, None, normals)

    def change(Q):
        return rel_change(base, call(net, rotate(cloud, Q) + 0.5, None, rotate(normals, Q)))

    rot = max(change(uniform_rotations(3, generator=gen, dtype=torch.float64)) for _ in range(5))
    ref = max(change(random_improper(3, generator=gen, dtype=torch.float64)) for _ in range(5))
    assert (rot > 1e-3) if c.symmetry == "none" else (rot <= 1e-9)
    assert (ref <= 1e-9) if c.symmetry == "E3" else (ref > 1e-3)
    if net.uses_normals:  # the other direction for normals: turning the points alone is another input
        R = uniform_rotations(3, generator=gen, dtype=torch.float64)
        assert rel_change(base, call(net, rotate(cloud, R), None, normals)) > 1e-3


@pytest.mark.parametrize("improper", [False, True], ids=["rotation", "improper"])
@pytest.mark.parametrize("c", [c for c in EQUIVARIANT if hasattr(backbone_class(c.name), "forward_features")],
                         ids=lambda c: c.id)
def test_every_layer_transforms_by_degree_and_parity(c, improper, normals):
    # reference: Wigner-D from shapes.geometry (checked against sympy there); parity rule: docs/design.md,
    # "Parity and handedness"; the feature vocabulary: docs/design.md, "Tensor shapes"
    net = make(c)
    cloud = random_cloud(3, 40, seed=5)
    normals = normals[:, :40]
    Q = (random_improper if improper else uniform_rotations)(3, generator=torch.Generator().manual_seed(4),
                                                            dtype=torch.float64)
    before = net.forward_features(cloud, normals=normals if net.uses_normals else None)
    after = net.forward_features(rotate(cloud, Q) - 1.0, normals=rotate(normals, Q) if net.uses_normals else None)
    for layer_before, layer_after in zip(before, after):
        expected = transform_features(layer_before, Q)
        for t in layer_before:
            assert rel_change(expected[t], layer_after[t]) <= 1e-9, t
        # both directions: the map does move the vectors (degree 1 is not invariant)
        assert rel_change(layer_before[(1, -1)], layer_after[(1, -1)]) > 1e-2
    pseudo = {t for t in before[-1] if t[1] != (-1) ** t[0]}
    assert bool(pseudo) == (c.symmetry == "SE3")  # SE3 builds pseudo-quantities, E3 never does


@pytest.mark.parametrize("c", WITH_NORMALS, ids=[c.id for c in WITH_NORMALS])
@pytest.mark.parametrize("signed", [False, True])
def test_normal_signs_ignored_exactly_unless_signed(c, signed, cloud, normals):
    # closed form: a unit normal and its negative span the same line, so a backbone that reads normals as
    # axes (signed_normals: false; docs/design.md, "Normals as axes") gives identical features when any of
    # them is reversed, and one that reads the outward sign does not. A reversed field of estimated normals
    # is a real scan failure (single-view signs).
    net = make(c, signed_normals=signed)
    gen = torch.Generator().manual_seed(11)
    flip = torch.where(torch.rand(cloud.shape[:2] + (1,), generator=gen) < 0.4, -1.0, 1.0).to(torch.float64)
    base = net(cloud, normals=normals)
    reversed_some = net(cloud, normals=normals * flip)
    if signed:
        assert rel_change(base, reversed_some) > 1e-3
    else:
        assert torch.equal(base, reversed_some)
    if c.symmetry == "SE3":  # the hand is still seen through the axes
        Q = random_improper(1, generator=gen, dtype=torch.float64)[0]
        assert rel_change(base, net(rotate(cloud, Q), normals=rotate(normals, Q))) > 1e-3


@pytest.mark.parametrize("c", EQUIVARIANT, ids=EQ_IDS)
def test_float32_invariance_within_tolerance(c, cloud, normals):
    # common practice: float32 round-off (eps ~ 1e-7) grown through a few layers stays far below 1e-4
    net = make(c, dtype=torch.float32)
    x, n = cloud.float(), normals.float()
    R = uniform_rotations(3, generator=torch.Generator().manual_seed(5))
    assert rel_change(call(net, x, None, n), call(net, rotate(x, R), None, rotate(n, R))) <= 1e-4


@pytest.mark.parametrize("c", CASES, ids=IDS)
def test_flags_must_be_booleans(c):
    # convention: docs/design.md, "Options": options are plain YAML values, a flag is true or false
    for flag in ("normals", "signed_normals", "smooth_neighbours", "context"):
        if flag in {f.name for f in dataclasses.fields(backbone_class(c.name).Config)}:
            with pytest.raises(ConfigError, match=rf"backbone\.{flag} should be true or false, got 'yes'"):
                build_backbone(c.name, **{**c.built, flag: "yes"})
