"""Specific checks of the vector-gated backbone: equivariance of every layer, handedness, masks, options.

(The generic table-driven checks over all backbones live in test_backbones.py.)
"""

import numpy as np
import pytest
import torch
from scipy.spatial.transform import Rotation

from shapes.backbones import build_backbone
from shapes.backbones.vector_gate import VectorGateBackbone, cross, smooth_cutoff
from shapes.errors import ConfigError, InputError

SMALL = {"scalars": 16, "vectors": 8, "layers": 3, "k": 8}
TOL = {torch.float64: 1e-9, torch.float32: 1e-4}


def make(dtype=torch.float64, **options):
    torch.manual_seed(0)
    return VectorGateBackbone(**{**SMALL, **options}).to(dtype).eval()


def rotations(n, dtype, seed=0):
    # reference: rotation matrices from scipy.spatial.transform.Rotation (Haar-uniform)
    return torch.tensor(Rotation.random(n, random_state=seed).as_matrix(), dtype=dtype)


def householder(normal, dtype):
    # reference: closed form of the reflection through the plane with unit normal n: I - 2 n n^T
    n = np.asarray(normal, dtype=float)
    n = n / np.linalg.norm(n)
    return torch.tensor(np.eye(3) - 2.0 * np.outer(n, n), dtype=dtype)


def improper(n, dtype, seed=0):
    """Reflections followed by Haar rotations (a random improper pose, docs/design.md "Random poses"), det = -1."""
    mirror = householder([0.3, -0.5, 0.8], dtype)
    return rotations(n, dtype, seed) @ mirror


def transform(points, Q, t=None):
    out = points @ Q.transpose(-1, -2)  # convention: docs/design.md, "Rotations": x' = Q x on column vectors
    return out if t is None else out + t


def rel_change(a, b):
    a, b = a.detach(), b.detach()
    return float((a - b).abs().max() / a.abs().max().clamp_min(1e-30))


def cloud(n=64, dtype=torch.float64, seed=3, batch=1):
    gen = torch.Generator().manual_seed(seed)
    return torch.randn(batch, n, 3, generator=gen, dtype=dtype)  # a generic cloud has no mirror symmetry


def helix(n=64, handed=+1, dtype=torch.float64, seed=5):
    """Points on a helix (r cos t, r sin t, p t / 2 pi): right-hand for handed=+1.

    # common practice: a right-hand helix turns counter-clockwise as it rises, seen from +z (docs/design.md,
    # "Parity and handedness"); handed=-1 is its mirror image z -> -z.
    Random parameters and a little jitter avoid exact ties between neighbour distances.
    """
    rng = np.random.default_rng(seed)
    t = np.sort(rng.uniform(0.0, 4.0 * np.pi, n))
    r, pitch = 1.0, 1.5
    pts = np.stack([r * np.cos(t), r * np.sin(t), handed * pitch * t / (2.0 * np.pi)], -1)
    pts += rng.normal(scale=0.01, size=pts.shape) * np.array([1.0, 1.0, handed])  # mirrored jitter too
    return torch.tensor(pts[None], dtype=dtype)


# ---------------------------------------------------------------------------------------------
# rotations and translations


@pytest.mark.parametrize("dtype", [torch.float64, torch.float32])
@pytest.mark.parametrize("handedness", [True, False])
def test_features_invariant_under_50_rotations_and_translations(dtype, handedness):
    # claim: docs/design.md, "Rotations" (x' = R x) and "Translations"; R from scipy
    model = make(dtype, handedness=handedness)
    x = cloud(dtype=dtype)
    R = rotations(50, dtype, seed=1)
    t = torch.randn(50, 1, 3, generator=torch.Generator().manual_seed(2), dtype=dtype) * 5.0
    with torch.no_grad():
        ref = model(x)
        moved = model(transform(x.expand(50, -1, -1), R, t))
    assert rel_change(ref.expand(50, -1), moved) <= TOL[dtype]
    # the other direction: the features depend on the shape (a different cloud gives others)
    with torch.no_grad():
        other = model(cloud(dtype=dtype, seed=4))
    assert rel_change(ref, other) > 1e-2


@pytest.mark.parametrize("dtype", [torch.float64, torch.float32])
def test_vector_channels_rotate_with_the_input_at_every_layer(dtype):
    # closed form: vector channels rotate as the points, v(R x) = R v(x), scalars unchanged (module docstring); R from scipy
    model = make(dtype)
    x = cloud(dtype=dtype)
    R = rotations(5, dtype, seed=6)
    with torch.no_grad():
        ref = model.forward_features(x)
        moved = model.forward_features(transform(x.expand(5, -1, -1), R) + 2.0)
    assert len(ref) == SMALL["layers"] + 1
    for before, after in zip(ref, moved):
        assert rel_change(transform(before.v, R.unsqueeze(1)), after.v) <= TOL[dtype]
        assert rel_change(transform(before.a, R.unsqueeze(1)), after.a) <= TOL[dtype]
        assert rel_change(before.s.expand_as(after.s), after.s) <= TOL[dtype]
        assert rel_change(before.p.expand_as(after.p), after.p) <= TOL[dtype]
        # ...and they really are vectors: rotating them changes them
        assert rel_change(before.v.expand_as(after.v), after.v) > 1e-2


def test_radius_graph_variant_is_invariant_too():
    # claim: docs/design.md, "Rotations" and "Translations" (the radius graph too); R from scipy
    model = make(radius=1.5, cutoff=1.5, k=12)
    x = cloud()
    R = rotations(10, torch.float64, seed=8)
    with torch.no_grad():
        ref = model(x)
        moved = model(transform(x.expand(10, -1, -1), R, 1.0))
    assert rel_change(ref.expand(10, -1), moved) <= 1e-9


# ---------------------------------------------------------------------------------------------
# reflections and handedness


def test_mirror_twins_differ_with_handedness_at_initialisation():
    # closed form: if f(Q x) = f(x) for every orthogonal Q, the reflection gives f(mirror) = f(part), so an
    # E(3)-invariant model cannot separate a chiral object from its mirror image; a model that keeps
    # triple products (det[Q a, Q b, Q c] = det(Q) det[a, b, c]) can.
    model = make()
    right, left = helix(handed=+1), helix(handed=-1)
    with torch.no_grad():
        f_right, f_left = model(right), model(left)
        # the mirror image, turned, is still the left-hand helix: same features as `left`
        f_left_turned = model(transform(left, rotations(1, torch.float64, seed=9)[0]))
    assert rel_change(f_right, f_left) > 1e-3
    assert rel_change(f_left, f_left_turned) <= 1e-9


def test_mirror_twins_agree_without_handedness():
    # closed form: f(Q x) = f(x) for every orthogonal Q, reflections included, gives f(mirror) = f(part)
    model = make(handedness=False)
    assert model.symmetry == "E3"
    with torch.no_grad():
        f_right, f_left = model(helix(handed=+1)), model(helix(handed=-1))
    assert rel_change(f_right, f_left) <= 1e-9
    # not because the features are blind: a different helix (other pitch) is told apart
    with torch.no_grad():
        squashed = helix(handed=+1) * torch.tensor([1.0, 1.0, 0.5], dtype=torch.float64)
        assert rel_change(f_right, model(squashed)) > 1e-3


@pytest.mark.parametrize("handedness, should_change", [(True, True), (False, False)])
def test_features_under_50_improper_maps(handedness, should_change):
    # convention: docs/design.md, "Parity and handedness"; improper maps = Householder reflection (closed form) x scipy rotation
    model = make(handedness=handedness)
    x = cloud()
    Q = improper(50, torch.float64, seed=10)
    with torch.no_grad():
        ref = model(x)
        mirrored = model(transform(x.expand(50, -1, -1), Q, 0.5))
    change = rel_change(ref.expand(50, -1), mirrored)
    assert (change > 1e-3) if should_change else (change <= 1e-9)


def test_pseudo_channels_pick_up_the_determinant_under_reflection():
    # closed form: (Q a) x (Q b) = det(Q) Q (a x b), so a cross product is a pseudo-vector, p -> det(Q) p, a -> det(Q) Q a;
    # Q = Householder reflection (closed form) x scipy rotation, det(Q) = -1
    model = make()
    x = cloud()
    Q = improper(3, torch.float64, seed=11)
    assert torch.allclose(torch.linalg.det(Q), -torch.ones(3, dtype=torch.float64))
    with torch.no_grad():
        layer = SMALL["layers"] // 2 + 1  # one layer in the middle of the stack
        before = model.forward_features(x)[layer]
        after = model.forward_features(transform(x.expand(3, -1, -1), Q))[layer]
    det = -1.0
    assert rel_change(transform(before.v, Q.unsqueeze(1)), after.v) <= 1e-9  # vectors: Q v
    assert rel_change(det * transform(before.a, Q.unsqueeze(1)), after.a) <= 1e-9  # det(Q) Q a
    assert rel_change(det * before.p.expand_as(after.p), after.p) <= 1e-9  # det(Q) p
    assert rel_change(before.s.expand_as(after.s), after.s) <= 1e-9
    # the other direction: a pseudo-vector is not an ordinary vector, p is not zero
    assert rel_change(transform(before.a, Q.unsqueeze(1)), after.a) > 1.0
    assert float(before.p.abs().mean()) > 1e-3


def test_cross_product_matches_numpy():
    # reference: numpy.cross
    gen = torch.Generator().manual_seed(12)
    a, b = torch.randn(2, 5, 4, 3, generator=gen, dtype=torch.float64)
    np.testing.assert_allclose(cross(a, b).numpy(), np.cross(a.numpy(), b.numpy()), rtol=0, atol=1e-14)
    # broadcasting over channels, as the edge code uses it
    np.testing.assert_allclose(
        cross(a[:, :1], b).numpy(), np.cross(a[:, :1].numpy(), b.numpy()), rtol=0, atol=1e-14
    )


def test_smooth_cutoff_values():
    # reference: closed form 0.5 (cos(pi x) + 1) on [0, 1], 0 beyond; slope 0 at both ends
    x = torch.tensor([0.0, 0.25, 0.5, 1.0, 1.5], dtype=torch.float64, requires_grad=True)
    y = smooth_cutoff(x)
    expected = [1.0, 0.5 * (np.cos(np.pi / 4) + 1.0), 0.5, 0.0, 0.0]
    np.testing.assert_allclose(y.detach().numpy(), expected, atol=1e-15)
    (grad,) = torch.autograd.grad(y.sum(), x)
    np.testing.assert_allclose(grad[[0, 3, 4]].numpy(), 0.0, atol=1e-12)


# ---------------------------------------------------------------------------------------------
# masks


@pytest.mark.parametrize("handedness", [True, False])
def test_padded_junk_points_do_not_change_real_features(handedness):
    # convention: docs/design.md, "Tensor shapes": mask (B, N) is True at real points, padding is ignored
    model = make(handedness=handedness)
    a, b = cloud(n=40, seed=13), cloud(n=64, seed=14)
    with torch.no_grad():
        ref_a, ref_b = model(a), model(b)
    gen = torch.Generator().manual_seed(15)
    padded = torch.cat([a, 1e3 * torch.randn(1, 24, 3, generator=gen, dtype=torch.float64)], 1)
    padded[0, 50] = float("nan")  # even NaN junk cannot leak
    points = torch.cat([padded, b], 0)
    mask = torch.ones(2, 64, dtype=torch.bool)
    mask[0, 40:] = False
    with torch.no_grad():
        out = model(points, mask)
        feats = model.forward_features(points, mask)
    assert torch.isfinite(out).all()
    assert rel_change(ref_a[0], out[0]) <= 1e-12
    assert rel_change(ref_b[0], out[1]) <= 1e-12
    # per-point features of the real points agree too, at every layer
    with torch.no_grad():
        alone = model.forward_features(a)
    for x, y in zip(alone, feats):
        assert rel_change(x.v[0], y.v[0, :40]) <= 1e-12
        assert rel_change(x.s[0], y.s[0, :40]) <= 1e-12
    # the other direction: unmasked, the junk does change the features
    with torch.no_grad():
        unmasked = model(torch.nan_to_num(points[:1], nan=0.0))
    assert rel_change(ref_a[0], unmasked[0]) > 1e-3


# ---------------------------------------------------------------------------------------------
# options and errors


def test_symmetry_and_width_follow_the_options():
    handed = make()
    plain = make(handedness=False)
    assert handed.symmetry == "SE3" and plain.symmetry == "E3"
    S, V = SMALL["scalars"], SMALL["vectors"]
    assert handed.out_features == 2 * (S + 3 * V)  # mean + max of s, |v|, |a|, p
    assert plain.out_features == 2 * (S + V)  # mean + max of s, |v|
    with torch.no_grad():
        assert handed(cloud()).shape == (1, handed.out_features)
        assert plain(cloud(batch=2)).shape == (2, plain.out_features)
        assert handed.forward_features(cloud())[0].p.shape == (1, 64, V)
        assert plain.forward_features(cloud())[0].p is None


def test_registry_builds_it_and_the_yaml_matches_the_config():
    import dataclasses
    from pathlib import Path

    import yaml  # installed with hydra-core (omegaconf depends on it)

    model = build_backbone("vector_gate", **SMALL)
    assert isinstance(model, VectorGateBackbone)
    conf = yaml.safe_load((Path(__file__).parents[1] / "shapes/conf/backbone/vector_gate.yaml").read_text())
    assert conf.pop("_target_") == "shapes.backbones.vector_gate.VectorGateBackbone"
    fields = {f.name: f.default for f in dataclasses.fields(VectorGateBackbone.Config)}
    assert set(conf) == set(fields)
    assert VectorGateBackbone(**conf).config_dict() == conf


@pytest.mark.parametrize(
    "options",
    [
        {"scalars": 0},
        {"vectors": -1},
        {"layers": 0},
        {"k": 0},
        {"num_radial": 0},
        {"scalars": 8.5},
        {"k": True},
        {"radius": -1.0},
        {"radius": 0},
        {"cutoff": 0.0},
        {"cutoff": float("inf")},
        {"handedness": "yes"},
        {"channels": 4},
    ],
)
def test_bad_options_raise_config_error(options):
    with pytest.raises(ConfigError):
        VectorGateBackbone(**options)


def test_too_few_points_for_k_raises_input_error():
    model = VectorGateBackbone(k=16)
    with pytest.raises(InputError, match=r"^k = 16 neighbours needs clouds of at least 17 points, got 12\.$"):
        model(torch.randn(1, 12, 3))
    # with padding it is the number of REAL points that counts
    mask = torch.ones(2, 40, dtype=torch.bool)
    mask[1, 12:] = False
    with pytest.raises(InputError, match="got 12"):
        model(torch.randn(2, 40, 3), mask)
    with pytest.raises(InputError):
        model(torch.randn(1, 40, 2))


# ---------------------------------------------------------------------------------------------
# surface normals


def helicoid(n=96, handed=+1, dtype=torch.float64, seed=7):
    """Points on a helicoid strip (thread flank) z = handed * p * theta / 2 pi + f(r), with normals.

    # closed form: the normal of the level set F = z - handed * p * theta / (2 pi) is grad F
    # = e_z - handed * p / (2 pi r) e_theta, taken as handed * grad F so that handed=-1 is exactly
    # the mirror image z -> -z of handed=+1, normals included (common practice: the right hand turns
    # counter-clockwise rising, seen from +z).
    """
    rng = np.random.default_rng(seed)
    t = rng.uniform(0.0, 4.0 * np.pi, n)
    r = rng.uniform(1.0, 1.4, n)
    pitch = 0.8
    pts = np.stack([r * np.cos(t), r * np.sin(t), handed * pitch * t / (2.0 * np.pi)], -1)
    e_theta = np.stack([-np.sin(t), np.cos(t), np.zeros_like(t)], -1)
    grad = handed * np.array([0.0, 0.0, 1.0]) - (pitch / (2.0 * np.pi * r))[:, None] * e_theta
    normals = grad / np.linalg.norm(grad, axis=1, keepdims=True)
    return torch.tensor(pts[None], dtype=dtype), torch.tensor(normals[None], dtype=dtype)


def unit_normals(x, seed=9):
    gen = torch.Generator().manual_seed(seed)
    return torch.nn.functional.normalize(torch.randn(x.shape, generator=gen, dtype=x.dtype), dim=-1)


@pytest.mark.parametrize("dtype", [torch.float64, torch.float32])
@pytest.mark.parametrize("handedness", [True, False])
def test_with_normals_invariant_under_50_rotations_and_translations(dtype, handedness):
    # closed form: an outward normal is a polar vector, n -> R n with its surface; R from scipy
    model = make(dtype, handedness=handedness, normals=True)
    x = cloud(dtype=dtype)
    n = unit_normals(x)
    R = rotations(50, dtype, seed=11)
    t = torch.randn(50, 1, 3, generator=torch.Generator().manual_seed(12), dtype=dtype) * 5.0
    with torch.no_grad():
        ref = model(x, normals=n)
        moved = model(transform(x.expand(50, -1, -1), R, t), normals=transform(n.expand(50, -1, -1), R))
        # the other direction: normals left unturned make another input, and other features
        stale = model(transform(x.expand(50, -1, -1), R), normals=n.expand(50, -1, -1))
    assert rel_change(ref.expand(50, -1), moved) <= TOL[dtype]
    assert rel_change(ref.expand(50, -1), stale) > 1e-2


def test_with_normals_channels_transform_at_every_layer():
    # closed form: v -> Q v, a -> det(Q) Q a, p -> det(Q) p for Q = a reflection (det -1, Householder)
    model = make(normals=True)
    x = cloud()
    n = unit_normals(x)
    Q = householder([0.2, 0.9, -0.4], torch.float64)
    with torch.no_grad():
        ref = model.forward_features(x, normals=n)
        moved = model.forward_features(transform(x, Q), normals=transform(n, Q))
    for before, after in zip(ref, moved):
        assert rel_change(transform(before.v, Q), after.v) <= 1e-9
        assert rel_change(-transform(before.a, Q), after.a) <= 1e-9
        assert rel_change(-before.p, after.p) <= 1e-9
        assert rel_change(before.s, after.s) <= 1e-9


def test_helicoid_hands_differ_with_normals_and_agree_without_handedness():
    # closed form: f(Q x) = f(x) for every orthogonal Q, reflections included, gives f(mirror) = f(part):
    # an E(3)-invariant model cannot separate a chiral object from its mirror image
    right, n_right = helicoid(handed=+1)
    left, n_left = helicoid(handed=-1)  # exact mirror z -> -z, normals mirrored with their surface
    mirror = torch.diag(torch.tensor([1.0, 1.0, -1.0], dtype=torch.float64))
    torch.testing.assert_close(transform(right, mirror), left)
    torch.testing.assert_close(transform(n_right, mirror), n_left)
    handed, blind = make(normals=True), make(normals=True, handedness=False)
    with torch.no_grad():
        assert rel_change(handed(right, normals=n_right), handed(left, normals=n_left)) > 1e-2
        assert rel_change(blind(right, normals=n_right), blind(left, normals=n_left)) <= 1e-9


def test_normals_are_required_when_configured_and_shaped_like_the_points():
    model = make(normals=True)
    x = cloud()
    with pytest.raises(InputError, match="normals"):
        model(x)
    with pytest.raises(InputError, match="normals should have"):
        model(x, normals=unit_normals(x)[:, :10])
    with pytest.raises(ConfigError, match="normals"):
        VectorGateBackbone(normals="yes")
