"""What is special about the vector-gated backbone: mirror twins on a helix and a helicoid, the radius
graph with an absolute cutoff, its readout width and its option checks.

(The generic table-driven checks over all backbones live in test_backbones.py.)
"""

import numpy as np
import pytest
import torch
from conftest import random_cloud, rel_change, rotate
from scipy.spatial.transform import Rotation

from shapes.backbones.vector_gate import VectorGateBackbone
from shapes.errors import ConfigError

SMALL = {"scalars": 16, "vectors": 8, "layers": 3, "k": 8, "normals": False}


def make(**options):
    torch.manual_seed(0)
    return VectorGateBackbone(**{**SMALL, **options}).double().eval()


def rotations(n, seed=0):
    # reference: rotation matrices from scipy.spatial.transform.Rotation (Haar-uniform)
    return torch.tensor(Rotation.random(n, random_state=seed).as_matrix(), dtype=torch.float64)


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


def test_mirror_twins_differ_with_se3_and_agree_with_e3():
    # closed form: if f(Q x) = f(x) for every orthogonal Q, the reflection gives f(mirror) = f(part), so an
    # E(3)-invariant model cannot separate a chiral object from its mirror image; a model that keeps
    # triple products (det[Q a, Q b, Q c] = det(Q) det[a, b, c]) can.
    right, left = helix(handed=+1), helix(handed=-1)
    handed, blind = make(), make(symmetry="e3")
    assert handed.symmetry == "SE3" and blind.symmetry == "E3"
    with torch.no_grad():
        assert rel_change(handed(right), handed(left)) > 1e-3
        # the mirror image, turned, is still the left-hand helix: same features as `left`
        assert rel_change(handed(left), handed(rotate(left, rotations(1, seed=9)[0]))) <= 1e-9
        assert rel_change(blind(right), blind(left)) <= 1e-9
        # not because the features are blind: a different helix (other pitch) is told apart
        squashed = helix(handed=+1) * torch.tensor([1.0, 1.0, 0.5], dtype=torch.float64)
        assert rel_change(blind(right), blind(squashed)) > 1e-3


def test_helicoid_hands_differ_by_their_normals_with_se3_only():
    # closed form: f(Q x) = f(x) for every orthogonal Q, reflections included, gives f(mirror) = f(part):
    # an E(3)-invariant model cannot separate a chiral object from its mirror image
    right, n_right = helicoid(handed=+1)
    left, n_left = helicoid(handed=-1)  # exact mirror z -> -z, normals mirrored with their surface
    mirror = torch.diag(torch.tensor([1.0, 1.0, -1.0], dtype=torch.float64))
    torch.testing.assert_close(rotate(right, mirror), left)
    torch.testing.assert_close(rotate(n_right, mirror), n_left)
    handed, blind = make(normals=True), make(normals=True, symmetry="e3")
    with torch.no_grad():
        assert rel_change(handed(right, normals=n_right), handed(left, normals=n_left)) > 1e-2
        assert rel_change(blind(right, normals=n_right), blind(left, normals=n_left)) <= 1e-9


def test_radius_graph_with_an_absolute_cutoff_is_invariant_too():
    # claim: docs/design.md, "Rotations" and "Translations" (the radius graph too); R from scipy
    model = make(radius=1.5, cutoff=1.5, k=12)
    x = random_cloud(seed=3)  # a generic cloud has no mirror symmetry
    R = rotations(10, seed=8)
    with torch.no_grad():
        ref = model(x)
        assert rel_change(ref.expand(10, -1), model(rotate(x.expand(10, -1, -1), R) + 1.0)) <= 1e-9
        assert rel_change(ref, model(x * 1.3)) > 1e-3  # an absolute cutoff sees the size


def test_readout_width_follows_the_symmetry():
    # convention: shapes/backbones/vector_gate.py, the readout: mean and max of s, |v| and, with se3, |a| and p
    handed, blind = make(), make(symmetry="e3")
    S, V = SMALL["scalars"], SMALL["vectors"]
    assert handed.out_features == 2 * (S + 3 * V)  # mean + max of s, |v|, |a|, p
    assert blind.out_features == 2 * (S + V)  # mean + max of s, |v|
    with torch.no_grad():
        assert handed(random_cloud(seed=3)).shape == (1, handed.out_features)
        assert blind(random_cloud(2, seed=3)).shape == (2, blind.out_features)
        assert handed.forward_features(random_cloud(seed=3))[0][(0, -1)].shape == (1, 64, V, 1)
        assert (0, -1) not in blind.forward_features(random_cloud(seed=3))[0]


@pytest.mark.parametrize(
    "options,match",
    [
        ({"scalars": 0}, r"backbone\.scalars should be an integer >= 1, got 0"),
        ({"vectors": -1}, r"backbone\.vectors"),
        ({"layers": 0}, r"backbone\.layers"),
        ({"k": 0}, r"backbone\.k"),
        ({"num_radial": 0}, r"backbone\.num_radial"),
        ({"scalars": 8.5}, r"an integer"),
        ({"k": True}, r"an integer"),
        ({"radius": -1.0}, r"backbone\.radius should be null or a finite number > 0"),
        ({"radius": 0}, r"backbone\.radius"),
        ({"cutoff": 0.0}, r"backbone\.cutoff"),
        ({"cutoff": float("inf")}, r"backbone\.cutoff"),
        ({"symmetry": "yes"}, r"backbone\.symmetry should be one of se3, e3, got 'yes'"),
        ({"handedness": False}, r"'handedness' is now symmetry"),
        ({"channels": 4}, r"no option"),
    ],
)
def test_bad_options_raise_config_error(options, match):
    # convention: DEVELOPERS.md, "Adding a backbone": each option checked by shapes/_checks.py, one line
    with pytest.raises(ConfigError, match=match):
        VectorGateBackbone(**options)
