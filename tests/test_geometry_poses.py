"""Poses: Haar sampling, axis-angle, reflections, pose regimes."""

import math

import numpy as np
import pytest
import torch
from scipy.spatial.transform import Rotation
from scipy.stats import kstest

from shapes.errors import ConfigError, InputError
from shapes.geometry import (
    POSE_REGIMES,
    apply_pose,
    rotation_about_axis,
    axis_and_angle_of,
    rotation_from_quaternion,
    random_improper,
    random_poses,
    random_reflections,
    uniform_rotations,
    random_z_rotations,
    reflection,
    rotation_angle,
    rotations_about_z,
)
from shapes.seeding import torch_generator


def haar_angle_cdf(t):
    # source: Shoemake 1992, "Uniform random rotations" (Graphics Gems III); Miles 1965, "On random
    # rotations in R^3" (Biometrika 52): the Haar angle density is (1 - cos t)/pi on [0, pi], CDF (t - sin t)/pi
    return (t - np.sin(t)) / np.pi


def test_haar_rotation_angle_passes_ks():
    R = uniform_rotations(20_000, torch_generator(0), dtype=torch.float64)
    angles = rotation_angle(R).numpy()
    # reference: scipy.stats.kstest against the Haar angle CDF
    assert kstest(angles, haar_angle_cdf).pvalue > 0.01


def test_ks_rejects_uniform_euler_angles():
    # The same test must be able to fail: uniform Euler angles are not Haar-uniform.
    rng = np.random.default_rng(0)
    eul = rng.uniform(0, 2 * np.pi, size=(20_000, 3))
    eul[:, 1] = rng.uniform(0, np.pi, size=20_000)
    R = torch.from_numpy(Rotation.from_euler("zyz", eul).as_matrix())
    angles = rotation_angle(R).numpy()
    # reference: scipy.stats.kstest; non-Haar sampler must be rejected
    assert kstest(angles, haar_angle_cdf).pvalue < 1e-6


def test_haar_mean_angle():
    R = uniform_rotations(20_000, torch_generator(1), dtype=torch.float64)
    # closed form: int_0^pi t (1 - cos t)/pi dt = (pi^2/2 + 2)/pi = pi/2 + 2/pi ~ 2.2074 rad (density as above);
    # the angle's variance is pi^2/12 - 4/pi^2 ~ 0.417, so the mean of 20000 has std ~ 0.0046
    assert abs(rotation_angle(R).mean().item() - (math.pi / 2 + 2 / math.pi)) < 0.02


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_rotations_are_proper_and_orthogonal(dtype):
    R = uniform_rotations(500, torch_generator(2), dtype=dtype)
    assert R.shape == (500, 3, 3) and R.dtype == dtype
    eye = torch.eye(3, dtype=dtype)
    # closed form: R^T R = I and det R = +1 for a rotation
    assert (R.transpose(-1, -2) @ R - eye).abs().max() < 1e-6
    assert (torch.linalg.det(R) - 1).abs().max() < 1e-6


def test_improper_and_reflections_have_det_minus_one():
    for sampler in (random_improper, random_reflections):
        M = sampler(300, torch_generator(3), dtype=torch.float64)
        # closed form: an orientation-reversing orthogonal matrix has det -1
        assert (torch.linalg.det(M) + 1).abs().max() < 1e-12
        assert (M.transpose(-1, -2) @ M - torch.eye(3, dtype=torch.float64)).abs().max() < 1e-12
    # and a rotation does not: the check above can fail
    assert (torch.linalg.det(uniform_rotations(5, torch_generator(3))) + 1).abs().min() > 1


def test_reflection_is_householder():
    n = torch.tensor([[0.0, 0.0, 2.0], [1.0, 1.0, 0.0]], dtype=torch.float64)
    H = reflection(n)
    # closed form: I - 2 n n^T with unit n; z -> -z for the first, x <-> -y for the second
    assert torch.allclose(H[0], torch.diag(torch.tensor([1.0, 1.0, -1.0], dtype=torch.float64)))
    assert torch.allclose(H[1] @ torch.tensor([1.0, 0, 0], dtype=torch.float64), torch.tensor([0.0, -1.0, 0], dtype=torch.float64))
    assert torch.allclose(H @ H, torch.eye(3, dtype=torch.float64).expand(2, 3, 3))


def test_rotations_do_not_commute():
    # closed form: R_z(180) R_y(45) != R_y(45) R_z(180); +x ends on opposite sides (checked against scipy below)
    rz = rotation_about_axis(torch.tensor([0.0, 0, 1], dtype=torch.float64), torch.tensor(math.pi, dtype=torch.float64))
    ry = rotation_about_axis(torch.tensor([0.0, 1, 0], dtype=torch.float64), torch.tensor(math.pi / 4, dtype=torch.float64))
    ex = torch.tensor([1.0, 0, 0], dtype=torch.float64)
    a, b = rz @ ry @ ex, ry @ rz @ ex
    # closed form: (-c, 0, -s) against (-c, 0, +s) with c = s = cos 45: opposite sides of the xy-plane
    assert a[2] * b[2] < 0 and (a - b).abs().max() > 1
    # reference: scipy.spatial.transform.Rotation for the same products
    ref = (Rotation.from_euler("z", 180, degrees=True) * Rotation.from_euler("y", 45, degrees=True)).as_matrix()
    assert np.allclose((rz @ ry).numpy(), ref, atol=1e-12)


def test_axis_angle_matches_scipy_and_round_trips():
    rng = np.random.default_rng(4)
    axis = rng.normal(size=(200, 3))
    angle = rng.uniform(0, np.pi, size=200)
    angle[:3] = [0.0, np.pi, np.pi - 1e-9]  # identity and half-turns are the hard cases
    R = rotation_about_axis(torch.from_numpy(axis * 3.0), torch.from_numpy(angle))
    unit = axis / np.linalg.norm(axis, axis=1, keepdims=True)
    # reference: scipy.spatial.transform.Rotation.from_rotvec
    ref = Rotation.from_rotvec(unit * angle[:, None]).as_matrix()
    assert np.abs(R.numpy() - ref).max() < 1e-12
    ax2, an2 = axis_and_angle_of(R)
    assert np.abs(an2.numpy() - angle).max() < 1e-7
    assert (rotation_about_axis(ax2, an2) - R).abs().max() < 1e-12
    # reference: scipy's rotation vector magnitude is the angle
    assert np.abs(rotation_angle(R).numpy() - np.linalg.norm(Rotation.from_matrix(ref).as_rotvec(), axis=1)).max() < 1e-9


def test_quaternion_convention_matches_scipy():
    q = torch.tensor([[0.3, -0.2, 0.9, 0.1]], dtype=torch.float64)
    # reference: scipy Rotation.from_quat takes (x, y, z, w)
    ref = Rotation.from_quat(q[:, [1, 2, 3, 0]].numpy()).as_matrix()
    assert np.abs(rotation_from_quaternion(q).numpy() - ref).max() < 1e-12


def test_rotations_about_z():
    R = rotations_about_z(torch.tensor([math.pi / 2], dtype=torch.float64))
    # closed form: a quarter turn counter-clockwise about +z sends +x to +y
    assert torch.allclose(R[0] @ torch.tensor([1.0, 0, 0], dtype=torch.float64), torch.tensor([0.0, 1, 0], dtype=torch.float64))
    Z = random_z_rotations(100, torch_generator(5), dtype=torch.float64)
    ez = torch.tensor([0.0, 0, 1], dtype=torch.float64)
    assert torch.allclose(Z @ ez, ez.expand(100, 3))
    # a Haar rotation does move +z: the check above can fail
    assert (uniform_rotations(100, torch_generator(5), dtype=torch.float64) @ ez - ez).abs().max() > 0.5


def test_same_seed_same_rotations():
    a = uniform_rotations(10, torch_generator(7))
    b = uniform_rotations(10, torch_generator(7))
    c = uniform_rotations(10, torch_generator(8))
    assert torch.equal(a, b) and not torch.equal(a, c)
    for regime in POSE_REGIMES:
        assert torch.equal(random_poses(regime, 4, torch_generator(1)), random_poses(regime, 4, torch_generator(1)))


def test_pose_regimes():
    assert POSE_REGIMES == ("cad", "upright", "any", "mirrored")
    eye = torch.eye(3)
    assert torch.equal(random_poses("cad", 3), eye.expand(3, 3, 3))
    dets = {r: torch.linalg.det(random_poses(r, 50, torch_generator(0), torch.float64)) for r in POSE_REGIMES}
    assert torch.allclose(dets["any"], torch.ones(50, dtype=torch.float64))
    assert torch.allclose(dets["mirrored"], -torch.ones(50, dtype=torch.float64))
    assert random_poses("any", 2, dtype=torch.float64).dtype == torch.float64
    with pytest.raises(ConfigError, match=r"cad.*upright.*any.*mirrored.*'tumble'"):
        random_poses("tumble", 3)
    # an old name gets one line that names the new one
    for old, new in (("aligned", "cad"), ("z", "upright"), ("so3", "any"), ("mirror", "mirrored")):
        with pytest.raises(ConfigError, match=f"'{old}' is now called '{new}'"):
            random_poses(old, 1)


def test_apply_pose_convention():
    pts = torch.randn(2, 5, 3, generator=torch_generator(0), dtype=torch.float64)
    R = uniform_rotations(2, torch_generator(1), dtype=torch.float64)
    out = apply_pose(pts, R)
    # convention: docs/design.md, "Rotations": x' = R x for each point
    assert torch.allclose(out[1, 3], R[1] @ pts[1, 3])
    with pytest.raises(InputError, match=r"\(B, N, 3\).*\(2, 5, 4\)"):
        apply_pose(torch.zeros(2, 5, 4), R)
    with pytest.raises(InputError, match=r"\(B, 3, 3\).*\(3, 3\)"):
        apply_pose(pts, R[0])


def test_bad_counts_and_shapes():
    with pytest.raises(InputError, match="n should be an integer >= 0, got -1"):
        uniform_rotations(-1)
    with pytest.raises(InputError, match=r"\(\.\.\., 3\).*\(4, 2\)"):
        reflection(torch.zeros(4, 2))
    with pytest.raises(InputError, match=r"\(\.\.\., 3, 3\).*\(3, 4\)"):
        rotation_angle(torch.zeros(3, 4))


def test_axis_angle_is_differentiable():
    axis = torch.tensor([0.2, -0.5, 1.0], dtype=torch.float64, requires_grad=True)
    angle = torch.tensor(0.7, dtype=torch.float64, requires_grad=True)
    # reference: torch.autograd.gradcheck (finite differences)
    assert torch.autograd.gradcheck(rotation_about_axis, (axis, angle))
