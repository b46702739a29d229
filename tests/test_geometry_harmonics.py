"""Real spherical harmonics against scipy, closed-form tables and sphere identities."""

import math

import numpy as np
import pytest
import torch
from numpy.polynomial.legendre import leggauss
from scipy.special import sph_harm_y

from shapes.errors import InputError
from shapes.geometry import L_MAX, random_improper, uniform_rotations, spherical_harmonics, wigner_d
from shapes.seeding import torch_generator


def real_reference(l, v):
    """The real basis of docs/design.md, "Spherical harmonics", built from scipy's complex harmonics
    (Condon-Shortley phase included)."""
    r = np.linalg.norm(v, axis=-1)
    theta = np.arccos(np.clip(v[:, 2] / r, -1, 1))
    phi = np.arctan2(v[:, 1], v[:, 0])
    cols = []
    for m in range(-l, l + 1):
        # reference: scipy.special.sph_harm_y(degree, order, polar, azimuth)
        if m > 0:
            cols.append(math.sqrt(2) * (-1) ** m * sph_harm_y(l, m, theta, phi).real)
        elif m == 0:
            cols.append(sph_harm_y(l, 0, theta, phi).real)
        else:
            cols.append(math.sqrt(2) * (-1) ** m * sph_harm_y(l, -m, theta, phi).imag)
    return np.stack(cols, -1)


@pytest.fixture(scope="module")
def directions():
    rng = np.random.default_rng(0)
    v = rng.normal(size=(2000, 3)) * rng.uniform(0.1, 10, size=(2000, 1))
    v[:4] = [[0, 0, 1], [0, 0, -1], [1, 0, 0], [0, -2, 0]]  # poles and the equator
    return v


def test_matches_scipy_up_to_l6(directions):
    Y = spherical_harmonics(6, torch.from_numpy(directions))
    for l in range(7):
        # reference: scipy.special.sph_harm_y carried into the real basis (docs/design.md, "Spherical harmonics")
        assert np.abs(Y[l].numpy() - real_reference(l, directions)).max() <= 1e-12, l


def test_matches_scipy_up_to_l_max(directions):
    Y = spherical_harmonics(L_MAX, torch.from_numpy(directions))
    for l in range(7, L_MAX + 1):
        # reference: scipy.special.sph_harm_y; the recurrence error grows slowly with l
        assert np.abs(Y[l].numpy() - real_reference(l, directions)).max() <= 1e-13 * (l + 1), l


def test_degree_one_and_two_tables(directions):
    v = directions
    x, y, z = (v / np.linalg.norm(v, axis=1, keepdims=True)).T
    Y = spherical_harmonics(2, torch.from_numpy(v))
    # convention: docs/design.md, "Spherical harmonics": degree 1 = sqrt(3/4pi) (y, z, x)/r.
    # reference: scipy.special.sph_harm_y(1, 0, theta, phi) = sqrt(3/4pi) cos theta, the middle entry
    assert np.abs(Y[1].numpy() - math.sqrt(3 / (4 * math.pi)) * np.stack([y, z, x], -1)).max() < 1e-14
    assert np.allclose(Y[1][:, 1].numpy(), sph_harm_y(1, 0, np.arccos(z), np.arctan2(y, x)).real, atol=1e-14)
    # source: the standard table of real spherical harmonics (Wikipedia, "Table of spherical harmonics",
    # real harmonics, l = 2), on the unit sphere:
    #   Y_2,-2 = 1/2 sqrt(15/pi) x y      Y_2,-1 = 1/2 sqrt(15/pi) y z      Y_2,0 = 1/4 sqrt(5/pi) (3 z^2 - 1)
    #   Y_2,1  = 1/2 sqrt(15/pi) x z      Y_2,2  = 1/4 sqrt(15/pi) (x^2 - y^2)
    c = 0.5 * math.sqrt(15 / math.pi)
    table = np.stack([c * x * y, c * y * z, 0.25 * math.sqrt(5 / math.pi) * (3 * z * z - 1), c * x * z, 0.5 * c * (x * x - y * y)], -1)
    # the table is re-checked against scipy.special.sph_harm_y in the real basis, so it rests on two references
    assert np.abs(table - real_reference(2, v)).max() < 1e-13
    assert np.abs(Y[2].numpy() - table).max() < 1e-14
    # constant degree 0: 1/sqrt(4 pi)
    assert np.allclose(Y[0].numpy(), 1 / math.sqrt(4 * math.pi))


def test_addition_theorem(directions):
    Y = spherical_harmonics(L_MAX, torch.from_numpy(directions))
    for l, y in enumerate(Y):
        # source: Unsold's theorem (the addition theorem at equal arguments): sum_m Y_lm(v)^2 = (2l+1)/(4 pi)
        assert torch.allclose((y * y).sum(-1), torch.full((len(directions),), (2 * l + 1) / (4 * math.pi), dtype=torch.float64), atol=1e-12)


def test_orthonormal_on_quadrature_grid():
    # Gauss-Legendre in cos(theta) x uniform phi integrates products of degree <= 2*L_MAX exactly.
    nodes, weights = leggauss(L_MAX + 2)  # reference: numpy.polynomial.legendre.leggauss
    n_phi = 2 * L_MAX + 3
    phi = 2 * np.pi * np.arange(n_phi) / n_phi
    ct, ph = np.meshgrid(nodes, phi, indexing="ij")
    st = np.sqrt(1 - ct**2)
    pts = np.stack([st * np.cos(ph), st * np.sin(ph), ct], -1).reshape(-1, 3)
    w = (weights[:, None] * np.full(n_phi, 2 * np.pi / n_phi)[None, :]).reshape(-1)
    Y = torch.cat(spherical_harmonics(L_MAX, torch.from_numpy(pts)), -1).numpy()
    gram = Y.T @ (w[:, None] * Y)
    # closed form: orthonormality of the spherical harmonics, int Y_lm Y_l'm' dOmega = delta_ll' delta_mm'
    assert np.abs(gram - np.eye(gram.shape[0])).max() < 1e-12


def test_parity_and_degree_one_equivariance():
    v = torch.randn(300, 3, generator=torch_generator(0), dtype=torch.float64)
    Y, Yneg = spherical_harmonics(5, v), spherical_harmonics(5, -v)
    for l in range(6):
        # closed form: Y_l is a homogeneous polynomial of degree l in v/|v|, so Y_l(-v) = (-1)^l Y_l(v)
        # (docs/design.md, "Parity and handedness")
        assert torch.allclose(Yneg[l], (-1) ** l * Y[l], atol=1e-13)
    # degree 1 rotates as R permuted to (y, z, x): Y_1(R v) = P R P^T Y_1(v)
    R = uniform_rotations(1, torch_generator(1), dtype=torch.float64)[0]
    perm = [1, 2, 0]
    D1 = R[perm][:, perm]
    Y1r = spherical_harmonics(1, v @ R.T)[1]
    assert torch.allclose(Y1r, Y[1] @ D1.T, atol=1e-14)
    # and not as R itself: the check can fail
    assert not torch.allclose(Y1r, Y[1] @ R.T, atol=1e-3)


def test_degree_two_is_not_reflection_invariant_in_general():
    # A generic improper matrix changes Y_2 (only the norm per degree is kept).
    v = torch.randn(50, 3, generator=torch_generator(2), dtype=torch.float64)
    M = random_improper(1, torch_generator(3), dtype=torch.float64)[0]
    a, b = spherical_harmonics(2, v)[2], spherical_harmonics(2, v @ M.T)[2]
    assert (a - b).abs().max() > 1e-2
    assert torch.allclose(a.norm(dim=-1), b.norm(dim=-1), atol=1e-13)


def test_solid_harmonics_are_homogeneous():
    v = torch.randn(100, 3, generator=torch_generator(4), dtype=torch.float64)
    r = v.norm(dim=-1, keepdim=True)
    S, Y = spherical_harmonics(6, v, normalize=False), spherical_harmonics(6, v)
    for l in range(7):
        # closed form: solid harmonic = r^l Y_l(v/r)
        assert torch.allclose(S[l], r**l * Y[l], atol=1e-12)
    assert torch.allclose(spherical_harmonics(3, 2 * v, normalize=False)[3], 8 * S[3], atol=1e-12)


@pytest.mark.parametrize("normalize", [True, False])
def test_zero_vector_is_finite_with_finite_gradient(normalize):
    v = torch.tensor([[0.0, 0.0, 0.0], [0.3, -0.1, 0.5]], dtype=torch.float64, requires_grad=True)
    Y = spherical_harmonics(6, v, normalize=normalize)
    for l, y in enumerate(Y):
        assert torch.isfinite(y).all()
        expected = 1 / math.sqrt(4 * math.pi) if l == 0 else 0.0
        assert torch.allclose(y[0], torch.full_like(y[0], expected))
    total = sum((y * torch.arange(1.0, y.shape[-1] + 1, dtype=torch.float64)).sum() for y in Y)
    (grad,) = torch.autograd.grad(total, v)
    assert torch.isfinite(grad).all()
    assert grad[1].abs().max() > 0  # a real direction does get a gradient


def test_gradient_matches_finite_differences():
    v = torch.tensor([[0.3, -0.7, 0.2], [-1.0, 0.4, 2.0]], dtype=torch.float64, requires_grad=True)
    # reference: torch.autograd.gradcheck (finite differences)
    assert torch.autograd.gradcheck(lambda t: torch.cat(spherical_harmonics(4, t), -1), (v,))


def test_float32_batched_shapes():
    v64 = torch.randn(4, 7, 3, generator=torch_generator(5), dtype=torch.float64)
    Y32 = spherical_harmonics(6, v64.float())
    Y64 = spherical_harmonics(6, v64)
    for l in range(7):
        assert Y32[l].shape == (4, 7, 2 * l + 1) and Y32[l].dtype == torch.float32
        assert torch.allclose(Y32[l].double(), Y64[l], atol=1e-5)


@pytest.mark.parametrize(
    "l_max, vectors, message",
    [
        (2, torch.zeros(10, 2), r"vectors should have shape \(\.\.\., 3\), got \(10, 2\)"),
        (2, torch.zeros(5, 10, 4), r"vectors should have shape \(\.\.\., 3\), got \(5, 10, 4\)"),
        (-1, torch.zeros(10, 3), r"l_max should be an integer in \[0, \d+\], got -1"),
        (L_MAX + 1, torch.zeros(10, 3), rf"l_max should be an integer in \[0, {L_MAX}\], got {L_MAX + 1}"),
        (2, torch.zeros(10, 3, dtype=torch.long), r"float32 or float64, got torch.int64"),
    ],
)
def test_bad_input(l_max, vectors, message):
    with pytest.raises(InputError, match=message):
        spherical_harmonics(l_max, vectors)


def test_equivariance_with_wigner_d():
    v = torch.randn(100, 3, generator=torch_generator(6), dtype=torch.float64)
    R = uniform_rotations(3, torch_generator(7), dtype=torch.float64)
    for l in range(7):
        D = wigner_d(l, R)
        for i in range(3):
            # definition: docs/design.md, "Wigner-D": Y_l(R v) = D_l(R) Y_l(v)
            moved = spherical_harmonics(l, v @ R[i].T)[l]
            assert (moved - spherical_harmonics(l, v)[l] @ D[i].T).abs().max() < 1e-12
            if l >= 1:  # and the harmonics do change: the check can fail
                assert (moved - spherical_harmonics(l, v)[l]).abs().max() > 1e-2


def test_blocked_and_autograd_paths_agree():
    # More vectors than one block (65536), so block boundaries are crossed; batched leading shape.
    v = torch.randn(3, 25_000, 3, generator=torch_generator(8), dtype=torch.float64)
    v[0, 0] = 0.0
    plain = spherical_harmonics(4, v)
    with_grad = spherical_harmonics(4, v.clone().requires_grad_(True))
    for a, b in zip(plain, with_grad):
        assert a.shape == b.shape and a.is_contiguous()
        assert (a - b.detach()).abs().max() < 1e-14
    # reference: scipy.special.sph_harm_y on a sample across the block boundary
    flat = v.reshape(-1, 3)[65_530:65_545].numpy()
    assert np.abs(spherical_harmonics(4, torch.from_numpy(flat))[4].numpy() - real_reference(4, flat)).max() < 1e-12
    assert np.abs(plain[4].reshape(-1, 9)[65_530:65_545].numpy() - real_reference(4, flat)).max() < 1e-12
