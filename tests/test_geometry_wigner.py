"""Real Wigner-D matrices: homomorphism, consistency with the harmonics, and sympy's complex D."""


import numpy as np
import pytest
import torch
from scipy.spatial.transform import Rotation
from sympy import N
from sympy.physics.quantum.spin import Rotation as SympyRotation

from shapes.errors import InputError
from shapes.geometry import (
    L_MAX,
    random_improper,
    uniform_rotations,
    real_basis_change,
    spherical_harmonics,
    wigner_d,
    wigner_d_list,
)
from shapes.seeding import torch_generator

F64 = torch.float64


@pytest.fixture(scope="module")
def rotations():
    return uniform_rotations(6, torch_generator(0), dtype=F64)


@pytest.mark.parametrize("l", range(7))
def test_harmonics_consistency_and_homomorphism(l, rotations):
    v = torch.randn(200, 3, generator=torch_generator(1), dtype=F64)
    D = wigner_d(l, rotations)  # (6, 2l+1, 2l+1)
    assert D.shape == (6, 2 * l + 1, 2 * l + 1)
    Y = spherical_harmonics(l, v)[l]
    for i in range(6):
        # definition: docs/design.md, "Wigner-D": Y_l(R v) = D_l(R) Y_l(v)
        Yr = spherical_harmonics(l, v @ rotations[i].T)[l]
        assert (Yr - Y @ D[i].T).abs().max() <= 1e-10
    # definition: D(R1 R2) = D(R1) D(R2), and D(R^T) = D(R)^T
    prod = wigner_d(l, rotations[:3] @ rotations[3:])
    assert (prod - D[:3] @ D[3:]).abs().max() <= 1e-10
    assert (wigner_d(l, rotations.transpose(-1, -2)) - D.transpose(-1, -2)).abs().max() <= 1e-10
    # closed form: real orthogonal
    eye = torch.eye(2 * l + 1, dtype=F64)
    assert (D @ D.transpose(-1, -2) - eye).abs().max() <= 1e-12
    if l >= 1:
        # the order matters: D(R1 R2) != D(R2 R1) for non-commuting rotations
        swapped = wigner_d(l, rotations[3:] @ rotations[:3])
        assert (prod - swapped).abs().max() > 1e-3


def test_degree_one_is_R_in_yzx_order(rotations):
    perm = [1, 2, 0]
    # convention: docs/design.md, "Spherical harmonics": degree 1 = sqrt(3/4pi) (y, z, x)/r, so D_1 = R permuted to (y, z, x)
    assert torch.equal(wigner_d(1, rotations), rotations[:, perm][:, :, perm])
    assert torch.equal(wigner_d(0, rotations), torch.ones(6, 1, 1, dtype=F64))


def test_identity_and_inversion():
    eye3 = torch.eye(3, dtype=F64)
    for l in range(L_MAX + 1):
        eye = torch.eye(2 * l + 1, dtype=F64)
        assert (wigner_d(l, eye3) - eye).abs().max() < 1e-13
        # closed form: Y_l(-v) = (-1)^l Y_l(v) (degree-l polynomial; tested against scipy in test_geometry_harmonics),
        # so D_l(-I) = (-1)^l I (docs/design.md, "Wigner-D")
        assert (wigner_d(l, -eye3) - (-1) ** l * eye).abs().max() < 1e-13


def test_improper_matrices(rotations):
    M = random_improper(3, torch_generator(2), dtype=F64)
    v = torch.randn(50, 3, generator=torch_generator(3), dtype=F64)
    for l in (2, 3):
        D = wigner_d(l, M)
        for i in range(3):
            # definition: Y_l(M v) = D_l(M) Y_l(v) also for reflections
            assert (spherical_harmonics(l, v @ M[i].T)[l] - spherical_harmonics(l, v)[l] @ D[i].T).abs().max() < 1e-10


def test_high_degrees_are_exact(rotations):
    v = torch.randn(100, 3, generator=torch_generator(4), dtype=F64)
    for l in range(7, L_MAX + 1):
        D = wigner_d(l, rotations[:2])
        Yr = spherical_harmonics(l, v @ rotations[0].T)[l]
        assert (Yr - spherical_harmonics(l, v)[l] @ D[0].T).abs().max() <= 1e-10
        assert (wigner_d(l, rotations[:1] @ rotations[1:2]) - D[:1] @ D[1:2]).abs().max() <= 1e-10


def test_list_matches_single_degrees(rotations):
    Ds = wigner_d_list(6, rotations)
    assert len(Ds) == 7
    for l, D in enumerate(Ds):
        assert (D - wigner_d(l, rotations)).abs().max() < 1e-13


def sympy_real_d(l, alpha, beta, gamma):
    """sympy's complex D carried into the real basis.

    sympy's ``Rotation.D(j, m, mp, a, b, g) = <j m | R(a, b, g) | j mp>`` is the active z-y-z
    rotation ``R = R_z(a) R_y(b) R_z(g)`` acting on kets. Harmonics as functions move the other
    way, ``Y(R v) = (R^-1 Y)(v)``, which conjugates the matrix: ``D_real = U conj(D_sympy) U^H``.
    (Checked at l = 1 against the rotation matrix itself in the test below.)
    """
    Dc = np.array(
        [[complex(N(SympyRotation.D(l, m, mp, alpha, beta, gamma).doit())) for mp in range(-l, l + 1)] for m in range(-l, l + 1)]
    )
    U = real_basis_change(l)
    return U @ Dc.conj() @ U.conj().T


EULER = [(0.3, 1.1, -0.7), (2.0, 0.4, 1.3), (-1.2, 2.9, 0.1)]


@pytest.mark.parametrize("alpha, beta, gamma", EULER)
def test_against_sympy_wigner_d(alpha, beta, gamma):
    # reference: scipy Rotation.from_euler("ZYZ") is intrinsic z-y-z, R = Rz(a) Ry(b) Rz(g)
    R = torch.from_numpy(Rotation.from_euler("ZYZ", [alpha, beta, gamma]).as_matrix())
    for l in (0, 1, 2):
        # reference: sympy.physics.quantum.spin.Rotation.D, in the real basis
        ref = sympy_real_d(l, alpha, beta, gamma)
        assert np.abs(ref.imag).max() < 1e-12
        assert np.abs(wigner_d(l, R).numpy() - ref.real).max() < 1e-12
    # the comparison can fail: the inverse rotation does not match at l = 2
    assert np.abs(wigner_d(2, R.T).numpy() - sympy_real_d(2, alpha, beta, gamma).real).max() > 1e-3


def test_gradient_and_float32(rotations):
    R = rotations[:2].clone().requires_grad_(True)
    D = wigner_d(3, R)
    (D * torch.randn(D.shape, generator=torch_generator(5), dtype=F64)).sum().backward()
    assert torch.isfinite(R.grad).all() and R.grad.abs().max() > 0
    D32 = wigner_d(4, rotations.float())
    assert D32.dtype == torch.float32
    assert (D32.double() - wigner_d(4, rotations)).abs().max() < 1e-5


@pytest.mark.parametrize(
    "l, R, message",
    [
        (-1, torch.eye(3), r"l should be an integer in \[0, \d+\], got -1"),
        (L_MAX + 1, torch.eye(3), rf"got {L_MAX + 1}"),
        (2, torch.zeros(4, 3), r"rotations should have shape \(\.\.\., 3, 3\), got \(4, 3\)"),
        (2, torch.zeros(2, 4, 4), r"got \(2, 4, 4\)"),
    ],
)
def test_bad_input(l, R, message):
    with pytest.raises(InputError, match=message):
        wigner_d(l, R)
