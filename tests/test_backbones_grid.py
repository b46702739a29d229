"""Backbones on points that lie on a lattice, as a scan's points lie on the camera's grid.

On a lattice many neighbours tie in distance, and a hard k-nearest set keeps whichever tied point
rounding happens to put first: rotating the cloud changed the features far above round-off. With
``smooth_neighbours`` (the default) every neighbourhood is tapered to weight 0 at the (k+1)-th
neighbour's distance, so it is continuous in the points and blind to how ties were broken.

The cases are the table of tests/test_backbones.py, with the lattices below.
"""

import math

import numpy as np
import pytest
import torch
from scipy.spatial import cKDTree

from shapes.backbones import build_backbone
from shapes.errors import ConfigError
from shapes.geometry import neighbour_taper, random_improper, uniform_rotations, smooth_graph
from conftest import rel_change
from test_backbones import CASES  # the table of backbone cases (tests/ is on the path under pytest)

# on bare points (the lattices carry no normals, except where a test gives closed-form ones), once per symmetry
EQUIVARIANT = list({(c.name, c.symmetry): (c.name, c.bare, c.symmetry) for c in CASES if c.symmetry != "none"}.values())
EQ_IDS = [f"{n}-{s}" for n, _, s in EQUIVARIANT]
K = 8  # the table's k: every equivariant case uses k = 8
assert all(o["k"] == K for _, o, _ in EQUIVARIANT)


def normalised(points: torch.Tensor) -> torch.Tensor:
    """Centred on the centroid and scaled to unit RMS radius, as the data pipeline delivers parts."""
    points = points - points.mean(0)
    return (points / points.square().sum(-1).mean().sqrt())[None]


def box_lattice(n: int = 6) -> torch.Tensor:
    """The faces of a cube sampled on a square lattice: the integer points of [0, n]^3 on its boundary."""
    g = torch.arange(n + 1, dtype=torch.float64)
    pts = torch.cartesian_prod(g, g, g)
    return normalised(pts[((pts == 0) | (pts == n)).any(-1)])


def cylinder_lattice(m: int = 16, h: int = 8) -> torch.Tensor:
    """A cylinder on a lattice in angle x height, with the height step equal to the two-step chord.

    Then the two-step ring neighbours and the axial ones tie (slots 3..6) and the four diagonal ones
    tie (slots 7..10), so the k = 8 boundary falls inside a tied group at every interior point.
    """
    a = torch.arange(m, dtype=torch.float64) * 2 * math.pi / m
    step = 2 * math.sin(2 * math.pi / m)  # the chord two angle steps long
    z = torch.arange(h, dtype=torch.float64) * step
    A, Z = torch.meshgrid(a, z, indexing="ij")
    return normalised(torch.stack([A.cos(), A.sin(), Z], -1).reshape(-1, 3))


def cylinder_normals(points: torch.Tensor) -> torch.Tensor:
    # closed form: the outward normal of a cylinder about z is the radial direction (x, y, 0) / r
    n = points.clone()
    n[..., 2] = 0
    return n / n.norm(dim=-1, keepdim=True)


def helix_lattice(m: int = 16, h: int = 10, twist: float = 0.4) -> torch.Tensor:
    """A screw lattice: ring ``b`` at height ``b dz``, turned by ``twist * b`` radians; chiral (no mirror plane).

    Every point is equivalent under the screw, and ``dz`` makes the axial neighbour exactly as far as
    the two-step ring neighbour, so at most points the k = 8 boundary falls inside a tied group.
    """
    a = torch.arange(m, dtype=torch.float64) * 2 * math.pi / m
    b = torch.arange(h, dtype=torch.float64)
    dz = math.sqrt((2 * math.sin(2 * math.pi / m)) ** 2 - (2 * math.sin(twist / 2)) ** 2)
    A, Bb = torch.meshgrid(a, b, indexing="ij")
    A = A + twist * Bb
    return normalised(torch.stack([A.cos(), A.sin(), dz * Bb], -1).reshape(-1, 3))


def helix_normals(points: torch.Tensor) -> torch.Tensor:
    return cylinder_normals(points)  # closed form: the screw lattice lies on a cylinder about z


CLOUDS = {"box": box_lattice, "cylinder": cylinder_lattice, "helix": helix_lattice}


def make(name, options, **extra):
    torch.manual_seed(0)
    return build_backbone(name, **{**options, **extra}).to(torch.float64).eval()


def moved(points, n=50, seed=1):
    """``n`` copies of ``points`` rotated by Haar rotations and translated, with the rotations."""
    R = uniform_rotations(n, generator=torch.Generator().manual_seed(seed), dtype=torch.float64)
    t = torch.randn(n, 1, 3, generator=torch.Generator().manual_seed(seed + 100), dtype=torch.float64)
    return points.expand(n, -1, -1) @ R.transpose(-1, -2) + t, R


# -- the lattices really tie at the k-th neighbour ---------------------------------------------


@pytest.mark.parametrize("cloud", list(CLOUDS))
def test_lattices_tie_at_the_kth_neighbour(cloud):
    # reference: scipy.spatial.cKDTree distances; a tie at slots k, k+1 is what makes a hard kNN ambiguous
    pts = CLOUDS[cloud]()[0].numpy()
    d, _ = cKDTree(pts).query(pts, K + 2)  # column 0 is the point itself
    tied = np.isclose(d[:, K], d[:, K + 1], rtol=1e-12, atol=0)
    assert tied.mean() > 0.2


# -- rotations and translations ----------------------------------------------------------------


@pytest.mark.parametrize("name,options,symmetry", EQUIVARIANT, ids=EQ_IDS)
@pytest.mark.parametrize("cloud", list(CLOUDS))
def test_grid_features_unchanged_by_50_rotations_and_translations(name, options, symmetry, cloud):
    # reference: uniform_rotations (Haar, checked against scipy in test_geometry_poses); invariance is the
    # declared symmetry, to round-off in float64
    x = CLOUDS[cloud]()
    many, _ = moved(x)
    net = make(name, options)
    with torch.no_grad():
        base, turned = net(x), net(many)
    assert rel_change(base.expand_as(turned), turned) <= 1e-9
    # the other way: the hard kNN set of the old graph lets rounding choose among tied neighbours
    # (the lattices have such ties, see above), and its features move far above round-off
    hard = make(name, options, smooth_neighbours=False)
    with torch.no_grad():
        assert rel_change(hard(x).expand_as(turned), hard(many)) > 1e-6


@pytest.mark.parametrize("name,extra", [("vector_gate", {"normals": True}),
                                        ("harmonic_attention", {"normals": True})])
@pytest.mark.parametrize("cloud,normals", [("cylinder", cylinder_normals), ("helix", helix_normals)])
def test_grid_features_with_normals_unchanged_by_rotations(name, extra, cloud, normals):
    # reference: closed-form cylinder normals, which turn with the points (n -> R n)
    options = next(o for n, o, _ in EQUIVARIANT if n == name)
    net = make(name, options, **extra)
    x = CLOUDS[cloud]()
    nx = normals(x)
    many, R = moved(x, n=20)
    with torch.no_grad():
        base = net(x, normals=nx)
        turned = net(many, normals=nx.expand(20, -1, -1) @ R.transpose(-1, -2))
    assert rel_change(base.expand_as(turned), turned) <= 1e-9


@pytest.mark.parametrize("cloud", list(CLOUDS))
def test_plain_on_grids_sees_translations_not_rotations(cloud):
    # closed form: a per-point MLP of centred coordinates, f(x + t) = f(x) but f(R x) != f(x) in general
    # (it has no neighbourhoods, so nothing to taper and no option)
    name, options = next((c.name, c.options) for c in CASES if c.name == "plain")
    net = make(name, options)
    x = CLOUDS[cloud]()
    shift = torch.tensor([[[0.7, -1.3, 2.1]]], dtype=torch.float64)
    many, _ = moved(x, n=5)
    with torch.no_grad():
        assert rel_change(net(x), net(x + shift)) <= 1e-9
        assert rel_change(net(x).expand(5, -1), net(many)) > 1e-3
    with pytest.raises(ConfigError, match="no option"):
        build_backbone(name, smooth_neighbours=True)


# -- reflections ---------------------------------------------------------------------------------


@pytest.mark.parametrize("name,options,symmetry", EQUIVARIANT, ids=EQ_IDS)
def test_handed_grid_under_reflections_by_declared_symmetry(name, options, symmetry):
    # reference: random_improper (det -1); a screw lattice has no mirror plane (convention: docs/design.md,
    # "Parity and handedness": a helix and its mirror image are the two hands), so SE3 backbones must tell
    # them apart
    x = helix_lattice()
    Q = random_improper(10, generator=torch.Generator().manual_seed(4), dtype=torch.float64)
    net = make(name, options)
    with torch.no_grad():
        base, mirrored = net(x), net(x.expand(10, -1, -1) @ Q.transpose(-1, -2))
    change = rel_change(base.expand_as(mirrored), mirrored)
    if symmetry == "E3":
        assert change <= 1e-9
    else:
        assert change > 1e-3


# -- the taper -----------------------------------------------------------------------------------


def test_taper_values_and_zero_slope_at_the_edge():
    # closed form: 1 up to u = 1/2, then (1 + cos(pi (2u - 1))) / 2, 0 from u = 1 on
    u = torch.tensor([0.0, 0.25, 0.5, 0.625, 0.75, 0.875, 1.0, 1.5], dtype=torch.float64, requires_grad=True)
    w = neighbour_taper(u)
    expected = [1, 1, 1, 0.5 * (1 + math.cos(math.pi / 4)), 0.5, 0.5 * (1 + math.cos(3 * math.pi / 4)), 0, 0]
    np.testing.assert_allclose(w.detach().numpy(), expected, rtol=0, atol=1e-15)
    (grad,) = torch.autograd.grad(w.sum(), u)
    np.testing.assert_allclose(grad[[0, 2, 6, 7]].numpy(), 0.0, atol=1e-12)
    assert float(grad[4]) == pytest.approx(-math.pi)  # closed form: d/du at u = 3/4 is -pi / 2 * 2


def test_smooth_graph_scale_is_the_next_neighbour_and_ties_there_weigh_nothing():
    # reference: scipy.spatial.cKDTree for the (k+1)-th distance; on the lattice a slot tied with the
    # (k+1)-th neighbour sits at the edge of the taper and gets weight 0 whichever tied point it holds
    x = box_lattice()
    pts = x[0].numpy()
    d, _ = cKDTree(pts).query(pts, K + 2)
    nb = smooth_graph(x, K)
    np.testing.assert_allclose(nb.scale[0].numpy(), d[:, K + 1], rtol=1e-12)
    at_edge = np.isclose(d[:, 1:K + 1], d[:, K + 1:K + 2], rtol=1e-12, atol=0)
    assert at_edge.any()
    np.testing.assert_allclose(nb.weight[0].numpy()[at_edge], 0.0, atol=1e-25)
    expected = 0.5 * (1 + np.cos(np.pi * np.clip((d[:, 1:K + 1] ** 2 / d[:, K + 1:] ** 2 - 0.5) / 0.5, 0, 1)))
    np.testing.assert_allclose(np.sort(nb.weight[0].numpy(), 1), np.sort(expected, 1), atol=1e-12)
    # weights as a set per receiver do not depend on the order of the points (tie-breaking by index)
    perm = torch.randperm(x.shape[1], generator=torch.Generator().manual_seed(0))
    again = smooth_graph(x[:, perm], K)
    np.testing.assert_allclose(np.sort(again.weight[0].numpy(), 1), np.sort(nb.weight[0, perm].numpy(), 1), atol=1e-12)


def test_smooth_graph_masks_padding_and_handles_small_clouds_and_radius():
    # convention: docs/design.md, "Tensor shapes": padding never sends messages. With k + 1 points there is
    # no (k+1)-th neighbour, every other point is in, nothing can enter, and the scale is infinite (weights 1)
    x = torch.randn(1, 9, 3, generator=torch.Generator().manual_seed(1), dtype=torch.float64)
    padded = torch.cat([x, 100 + torch.randn(1, 4, 3, dtype=torch.float64)], 1)
    mask = torch.arange(13)[None] < 9
    nb = smooth_graph(padded, K, mask=mask)
    assert torch.isinf(nb.scale[0, :9]).all()
    assert torch.equal(nb.weight[0, :9], torch.ones(9, K, dtype=torch.float64))
    assert (nb.weight[0, 9:] == 0).all() and not nb.valid[0, 9:].any()
    assert (nb.index[0, :9] < 9).all()
    # with a radius the scale is at most the radius, and a sender at the radius weighs nothing
    nb = smooth_graph(x, 3, radius=0.5)
    d, _ = cKDTree(x[0].numpy()).query(x[0].numpy(), 5)  # reference: scipy.spatial.cKDTree
    np.testing.assert_allclose(nb.scale[0].numpy(), np.minimum(d[:, 4], 0.5), rtol=1e-12)
    assert (nb.weight[~nb.valid] == 0).all()


# -- continuity across the k-th / (k+1)-th boundary ------------------------------------------------


def boundary_family(seed=5):
    """A generic cloud and a path ``t -> cloud(t)`` on which one point passes receiver 0's k-th neighbour.

    The (k+1)-th neighbour of point 0 is moved along the ray from point 0 so that at ``t = 0`` it is
    exactly as far as the k-th one: for ``t < 0`` it is the k-th neighbour, for ``t > 0`` the (k+1)-th.
    """
    # unit RMS radius, as parts are normalised: the k-th neighbour lies well inside the distance cutoff
    x = normalised(torch.randn(96, 3, generator=torch.Generator().manual_seed(seed), dtype=torch.float64))
    d = (x[0] - x[0, 0]).norm(dim=-1)
    order = torch.argsort(d)  # order[0] is point 0 itself
    kth, nxt = order[K], order[K + 1]
    ray = (x[0, nxt] - x[0, 0]) * (d[kth] / d[nxt])

    def at(t):
        y = x.clone()
        y[0, nxt] = x[0, 0] + ray * (1 + t)
        return y

    return at


@pytest.mark.parametrize("name,options,symmetry", EQUIVARIANT, ids=EQ_IDS)
def test_crossing_the_kth_neighbour_changes_features_continuously(name, options, symmetry):
    # closed form: a Lipschitz map changes by O(eps) for a move of eps; the taper is C1 with slope 0
    # where the neighbours swap, so the change shrinks in step with eps
    at = boundary_family()
    net = make(name, options)
    with torch.no_grad():
        jumps = [float((net(at(eps)) - net(at(-eps))).abs().max()) for eps in (1e-4, 1e-6)]
    assert jumps[1] <= 1e-5
    assert jumps[1] <= 0.05 * jumps[0]
    # the other way: with the old hard graph the swap is a jump that does not shrink with eps
    hard = make(name, options, smooth_neighbours=False)
    with torch.no_grad():
        hard_jumps = [float((hard(at(eps)) - hard(at(-eps))).abs().max()) for eps in (1e-4, 1e-6)]
    assert hard_jumps[1] > 100 * jumps[1] and hard_jumps[1] > 0.5 * hard_jumps[0]


@pytest.mark.parametrize("name,options,symmetry", EQUIVARIANT, ids=EQ_IDS)
def test_option_is_in_the_config_and_the_yaml_and_is_checked(name, options, symmetry):
    # convention: docs/design.md, "Options": an option is a field of the Config dataclass and a key of the
    # shipped yaml alike; this one is on by default in both
    import dataclasses
    from pathlib import Path

    import yaml

    net = make(name, options)
    fields = {f.name: f.default for f in dataclasses.fields(type(net).Config)}
    assert fields["smooth_neighbours"] is True
    conf = yaml.safe_load((Path(__file__).parents[1] / f"shapes/conf/backbone/{name}.yaml").read_text())
    assert conf["smooth_neighbours"] is True
    with pytest.raises(ConfigError, match="smooth_neighbours"):
        build_backbone(name, **options, smooth_neighbours="yes")
