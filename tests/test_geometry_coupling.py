"""Real coupling (Clebsch-Gordan) tensors: equivariance, sympy's complex table, closed-form values."""

import itertools
import math

import numpy as np
import pytest
import torch
from scipy.special import sph_harm_y
from sympy.physics.quantum.cg import CG
from sympy.physics.wigner import clebsch_gordan as sympy_clebsch_gordan
from sympy.physics.wigner import wigner_3j

from shapes.errors import InputError
from shapes.geometry import (
    L_MAX,
    clebsch_gordan,
    complex_clebsch_gordan,
    random_improper,
    uniform_rotations,
    real_basis_change,
    wigner_d,
)
from shapes.seeding import torch_generator

F64 = torch.float64
TRIPLES = [t for t in itertools.product(range(4), repeat=3)]
ALLOWED = [t for t in TRIPLES if abs(t[0] - t[1]) <= t[2] <= t[0] + t[1]]


def couple(C, a, b):
    return torch.einsum("abc,...a,...b->...c", C, a, b)


@pytest.fixture(scope="module")
def poses():
    R = uniform_rotations(4, torch_generator(0), dtype=F64)
    M = random_improper(4, torch_generator(1), dtype=F64)
    return R, M


@pytest.mark.parametrize("l1, l2, l3", ALLOWED)
def test_equivariance(l1, l2, l3, poses):
    R, M = poses
    C = clebsch_gordan(l1, l2, l3)
    a = torch.randn(4, 2 * l1 + 1, generator=torch_generator(2), dtype=F64)
    b = torch.randn(4, 2 * l2 + 1, generator=torch_generator(3), dtype=F64)
    D1, D2, D3 = (wigner_d(l, R) for l in (l1, l2, l3))
    lhs = couple(C, (D1 @ a[..., None])[..., 0], (D2 @ b[..., None])[..., 0])
    rhs = (D3 @ couple(C, a, b)[..., None])[..., 0]
    # definition: docs/design.md, "Coupling coefficients": C(D a x D b) = D C(a x b)
    assert (lhs - rhs).abs().max() <= 1e-10
    # reflections: a path with odd l1 + l2 + l3 is a pseudo-quantity and flips sign
    E1, E2, E3 = (wigner_d(l, M) for l in (l1, l2, l3))
    lhs_m = couple(C, (E1 @ a[..., None])[..., 0], (E2 @ b[..., None])[..., 0])
    rhs_m = (E3 @ couple(C, a, b)[..., None])[..., 0]
    parity = (-1) ** (l1 + l2 + l3)
    assert (lhs_m - parity * rhs_m).abs().max() <= 1e-10
    if parity == -1:
        assert (lhs_m - rhs_m).abs().max() > 1e-3  # the pseudo-quantity really is not mirror-invariant
    # a coupling tensor with the wrong l3 block is not equivariant: the check can fail
    if l3 >= 1 and l1 >= 1 and l2 >= 1:
        assert (couple(C, (D1 @ a[..., None])[..., 0], b) - rhs).abs().max() > 1e-3


def sympy_real_table(l1, l2, l3):
    # reference: sympy.physics.quantum.cg.CG(j1, m1, j2, m2, j3, m3).doit()
    t = np.zeros((2 * l1 + 1, 2 * l2 + 1, 2 * l3 + 1))
    for m1, m2 in itertools.product(range(-l1, l1 + 1), range(-l2, l2 + 1)):
        m3 = m1 + m2
        if abs(m3) <= l3:
            t[m1 + l1, m2 + l2, m3 + l3] = float(CG(l1, m1, l2, m2, l3, m3).doit())
    u1, u2, u3 = (real_basis_change(l) for l in (l1, l2, l3))
    return np.einsum("am,bn,cp,mnp->abc", u1.conj(), u2.conj(), u3, t)


@pytest.mark.parametrize("l1, l2, l3", ALLOWED)
def test_matches_sympy_up_to_sign(l1, l2, l3):
    ref = sympy_real_table(l1, l2, l3)
    # one phase per triple: real for even l1 + l2 + l3, imaginary for odd (then one sign)
    part = ref.imag if (l1 + l2 + l3) % 2 else ref.real
    other = ref.real if (l1 + l2 + l3) % 2 else ref.imag
    assert np.abs(other).max() < 1e-12
    ours = clebsch_gordan(l1, l2, l3).numpy()
    err = min(np.abs(ours - part).max(), np.abs(ours + part).max())
    assert err < 1e-12
    # documented convention (module docstring): exactly Re / Im, no extra sign
    assert np.abs(ours - part).max() < 1e-12


@pytest.mark.parametrize("l1, l2, l3", ALLOWED)
def test_orthonormal_columns(l1, l2, l3):
    C = clebsch_gordan(l1, l2, l3).reshape(-1, 2 * l3 + 1)  # (m1 m2, m3)
    # property of the unitary CG matrix: its columns stay orthonormal in the real basis
    assert torch.allclose(C.T @ C, torch.eye(2 * l3 + 1, dtype=F64), atol=1e-13)
    assert math.isclose(float((C**2).sum()), 2 * l3 + 1, rel_tol=1e-13)


def test_zero_outside_triangle():
    for l1, l2, l3 in TRIPLES:
        C = clebsch_gordan(l1, l2, l3)
        assert C.shape == (2 * l1 + 1, 2 * l2 + 1, 2 * l3 + 1)
        inside = abs(l1 - l2) <= l3 <= l1 + l2
        # selection rule: |l1 - l2| <= l3 <= l1 + l2
        assert bool(C.abs().max() > 0.1) == inside, (l1, l2, l3)


def test_one_one_one_is_the_cross_product():
    perm = [1, 2, 0]  # degree 1 is (y, z, x)
    a = torch.randn(20, 3, generator=torch_generator(4), dtype=F64)
    b = torch.randn(20, 3, generator=torch_generator(5), dtype=F64)
    c = couple(clebsch_gordan(1, 1, 1), a[:, perm], b[:, perm])
    # closed form: 1 x 1 -> 1 is the cross product times |<1 1; 1 0 | 1 1>| (= 1/sqrt 2; reference:
    # sympy.physics.quantum.cg.CG), the sign being the one fixed in the module docstring
    cross_factor = float(abs(CG(1, 1, 1, 0, 1, 1).doit()))
    assert torch.allclose(c, torch.linalg.cross(a, b)[:, perm] * cross_factor, atol=1e-14)
    # closed form: 1 x 1 -> 0 is the dot product times the m = 0 entry, real in both bases:
    # <1 0; 1 0 | 0 0> (= -1/sqrt 3; reference: sympy.physics.quantum.cg.CG)
    dot_factor = float(CG(1, 0, 1, 0, 0, 0).doit())
    s = couple(clebsch_gordan(1, 1, 0), a[:, perm], b[:, perm])[:, 0]
    assert torch.allclose(s, (a * b).sum(-1) * dot_factor, atol=1e-14)
    # closed form: a x a = 0, while the symmetric 1 x 1 -> 2 part of (a, a) is not zero
    assert couple(clebsch_gordan(1, 1, 1), a, a).abs().max() < 1e-14
    assert couple(clebsch_gordan(1, 1, 2), a, a).abs().max() > 0.1


def test_complex_values_against_sympy():
    # reference: sympy.physics.quantum.cg.CG(j1, m1, j2, m2, j3, m3).doit(); the closed forms beside each
    # from memory
    assert math.isclose(complex_clebsch_gordan(1, 0, 1, 0, 2, 0), float(CG(1, 0, 1, 0, 2, 0).doit()), rel_tol=1e-15)
    assert math.isclose(complex_clebsch_gordan(1, 0, 1, 0, 2, 0), math.sqrt(2 / 3), rel_tol=1e-15)
    assert math.isclose(complex_clebsch_gordan(1, 1, 1, -1, 1, 0), float(CG(1, 1, 1, -1, 1, 0).doit()), rel_tol=1e-15)
    assert math.isclose(complex_clebsch_gordan(1, 1, 1, -1, 1, 0), 1 / math.sqrt(2), rel_tol=1e-15)
    # reference: sympy.physics.wigner.wigner_3j (= sqrt(30)/15 here), and the relation
    # 3j = (-1)^(j1 - j2 - m3) / sqrt(2 j3 + 1) <j1 m1 j2 m2 | j3 -m3> (from memory)
    three_j = float(wigner_3j(1, 1, 2, 0, 0, 0))
    assert math.isclose(complex_clebsch_gordan(1, 0, 1, 0, 2, 0) / math.sqrt(5), three_j, rel_tol=1e-15)
    # reference: sympy.physics.wigner.clebsch_gordan over every entry with j <= 3
    for j1, j2, j3 in ALLOWED:
        for m1, m2 in itertools.product(range(-j1, j1 + 1), range(-j2, j2 + 1)):
            m3 = m1 + m2
            if abs(m3) <= j3:
                ref = float(sympy_clebsch_gordan(j1, j2, j3, m1, m2, m3))
                assert abs(complex_clebsch_gordan(j1, m1, j2, m2, j3, m3) - ref) < 1e-15
    assert complex_clebsch_gordan(1, 0, 1, 1, 2, 0) == 0.0  # m1 + m2 != m3


def test_real_basis_change_is_unitary_and_gives_the_design_basis():
    for l in range(5):
        U = real_basis_change(l)
        assert np.abs(U @ U.conj().T - np.eye(2 * l + 1)).max() < 1e-15
    # convention: docs/design.md, "Spherical harmonics": Y_{1,-1} = sqrt 2 (-1)^-1 Im Y_1^1;
    # reference: scipy.special.sph_harm_y(1, +-1) = -+ sqrt(3/8pi) sin(theta) e^{+-i phi} (Condon-Shortley), checked below
    U1 = real_basis_change(1)
    c = math.sqrt(3 / (8 * math.pi))
    theta, phi = 0.7, 1.9
    y_complex = np.array([c * math.sin(theta) * np.exp(-1j * phi), math.sqrt(3 / (4 * math.pi)) * math.cos(theta), -c * math.sin(theta) * np.exp(1j * phi)])
    assert np.abs(y_complex - np.array([sph_harm_y(1, m, theta, phi) for m in (-1, 0, 1)])).max() < 1e-15
    yzx = math.sqrt(3 / (4 * math.pi)) * np.array([math.sin(theta) * math.sin(phi), math.cos(theta), math.sin(theta) * math.cos(phi)])
    assert np.abs(U1 @ y_complex - yzx).max() < 1e-15


def test_dtype_device_and_cache():
    a = clebsch_gordan(2, 1, 2, dtype=torch.float32, device="cpu")
    b = clebsch_gordan(2, 1, 2)
    assert a.dtype == torch.float32 and b.dtype == F64
    b.zero_()  # callers get their own copy: the cached master is untouched
    assert clebsch_gordan(2, 1, 2).abs().max() > 0.1


@pytest.mark.parametrize("args", [(-1, 0, 1), (1, L_MAX + 1, 1), (1, 1, 1.5)])
def test_bad_degrees(args):
    with pytest.raises(InputError, match=r"should be an integer in \[0, \d+\], got"):
        clebsch_gordan(*args)
