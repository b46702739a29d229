"""Shared fixtures and helpers. Test files import the helpers by name (``from conftest import DEMO``):
pytest puts tests/ on the path, and this module is the one pytest itself loaded."""

import functools
from pathlib import Path

import numpy as np
import pytest

DEMO = Path(__file__).resolve().parent.parent / "demo_meshes"
# `shapes sample` options of the tiny end-to-end pipeline (test_cli, test_compare): default mode (mixed)
TINY_SAMPLE = ["sample.points=96", "sample.copies={train: 2, val: 1, test: 1}", "sample.oversample=1",
               "sample.twins=declared"]  # the demo's declared map; checking it is tested in test_parts_check_twins
# `shapes train` options of the smallest network the training tests run: one distance layer of 8 features
TINY_DISTANCE = ["backbone=distance", "backbone.hidden=8", "backbone.k=4", "backbone.layers=1"]


@pytest.fixture(scope="session")
def tiny_surface_data(tmp_path_factory):
    """The demo catalog as 64-point surface clouds, one copy per instance: 128 training clouds in 16 classes."""
    from shapes.cli import main

    root = tmp_path_factory.mktemp("tiny_surface")
    assert main(["sample", f"meshes={DEMO}", f"data={root / 'data'}", "sample.points=64", "sample.mode=surface",
                 "sample.copies={train: 1, val: 1, test: 1}", "sample.oversample=1",
                 "sample.twins=declared"]) == 0
    return root / "data"


def demo_file(name: str) -> Path:
    """The first mesh file (by name) of demo class ``name``."""
    return sorted((DEMO / name).glob("*.ply"))[0]


# ---------------------------------------------------------------- one-line errors


def one_error_line(capsys) -> str:
    """The command's standard error is one line starting "error: "; returns it."""
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: "), err
    return err[0]


def one_line_naming(exc_info, path) -> str:
    """The raised error's message is one line that names ``path``; returns it."""
    message = str(exc_info.value)
    assert "\n" not in message and str(path) in message, message
    return message


# ---------------------------------------------------------------- meshes and clouds


def sphere_points(n: int, radius: float = 1.0, seed: int = 0) -> np.ndarray:
    """``n`` points uniform on a sphere about the origin: normalised Gaussian vectors (Muller 1959, "A note on
    a method for generating points uniformly on n-dimensional spheres", Comm. ACM 2(4))."""
    v = np.random.default_rng(seed).normal(size=(n, 3))
    return radius * v / np.linalg.norm(v, axis=1, keepdims=True)


def surface_points(mesh, n: int, seed: int) -> np.ndarray:
    """``n`` points on the surface of ``mesh``. reference: trimesh's area-weighted sampler."""
    import trimesh

    return np.asarray(trimesh.sample.sample_surface(mesh, n, seed=seed)[0])


def surface_distance(mesh, points, chunk: int = 40) -> tuple[np.ndarray, np.ndarray]:
    """Distance of each point to the mesh and the index of the nearest face, by brute force over every
    (point, face) pair. reference: trimesh.triangles.closest_point (trimesh.proximity needs rtree, not
    installed here)."""
    import trimesh

    tri = np.asarray(mesh.triangles)
    dist, face = [np.zeros(0)], [np.zeros(0, dtype=int)]
    for start in range(0, len(points), chunk):
        block = np.asarray(points[start:start + chunk])
        n, f = len(block), len(tri)
        closest = trimesh.triangles.closest_point(np.tile(tri, (n, 1, 1)), np.repeat(block, f, axis=0))
        d = np.linalg.norm(closest - np.repeat(block, f, axis=0), axis=1).reshape(n, f)
        dist.append(d.min(axis=1))
        face.append(d.argmin(axis=1))
    return np.concatenate(dist), np.concatenate(face)


def posed_mesh(mesh, seed: int, shift=(12.0, -7.0, 3.0)):
    """A copy of ``mesh`` turned by a Haar-random rotation and shifted. reference: scipy Rotation.random."""
    from scipy.spatial.transform import Rotation

    out = mesh.copy()
    t = np.eye(4)
    t[:3, :3] = Rotation.random(random_state=seed).as_matrix()
    t[:3, 3] = shift
    out.apply_transform(t)
    return out


# ---------------------------------------------------------------- solids of a known hand (twisted extrusion)


def helix_turn(mesh) -> float:
    """Turn (radians) of the cross-section's centre about +z from the bottom to the top layer,
    counter-clockwise seen from +z positive; the vertices of one layer share one height."""
    v = np.asarray(mesh.vertices)
    levels = np.unique(np.round(v[:, 2], 6))
    centres = np.array([v[np.isclose(v[:, 2], z, atol=1e-5), :2].mean(0) for z in levels])
    return float(np.unwrap(np.arctan2(centres[:, 1], centres[:, 0]))[-1] - np.arctan2(centres[0, 1], centres[0, 0]))


def _twisted(section, height: float, turn_degrees: float, hand: str):
    """Extrude ``section`` (a manifold3d CrossSection) along +z, turning it by ``turn_degrees`` with the given hand.

    from memory: ISO 5408 (screw thread vocabulary): a right-hand helix turns clockwise as it
    recedes from the viewer, i.e. counter-clockwise seen from +z as it rises along +z.
    """
    import manifold3d as mf

    from shapes.parts._mesh import to_trimesh

    probe = to_trimesh(mf.Manifold.extrude(mf.CrossSection.circle(0.5, 16).translate((3.0, 0.0)), 1.0, 4, 30.0))
    sign = 1.0 if helix_turn(probe) > 0 else -1.0  # the sign manifold3d gives a positive twist
    twist = sign * turn_degrees * (1.0 if hand == "right" else -1.0)
    # one layer per degree of turn: each ruled side face is split into nearly flat triangles, so a
    # right- and a left-hand build differ by less than the detector's tolerance
    mesh = to_trimesh(mf.Manifold.extrude(section, height, int(abs(turn_degrees)), twist))
    assert mesh.is_watertight
    return mesh


@functools.lru_cache(maxsize=None)
def coil(hand: str, turns: float = 2.0, pitch: float = 8.0):
    """A helical rod: a round section 4 mm off the axis, swept ``turns`` times around it."""
    import manifold3d as mf

    section = mf.CrossSection.circle(1.2, 24).translate((4.0, 0.0))
    mesh = _twisted(section, turns * pitch, 360.0 * turns, hand)
    turn = helix_turn(mesh)
    assert (turn > 0) == (hand == "right") and abs(abs(turn) - 2 * np.pi * turns) < 1e-6  # the hand is as named
    return mesh


@functools.lru_cache(maxsize=None)
def twisted_bar(hand: str):
    """A 6 x 3 mm bar, 30 mm long, twisted a third of a turn; its sides are split every 0.5 mm so
    that the twisted side faces are followed closely."""
    import manifold3d as mf

    x = np.linspace(-3.0, 3.0, 13)[:-1]
    y = np.linspace(-1.5, 1.5, 7)[:-1]
    outline = np.concatenate([
        np.stack([x, np.full_like(x, -1.5)], 1), np.stack([np.full_like(y, 3.0), y], 1),
        np.stack([-x, np.full_like(x, 1.5)], 1), np.stack([np.full_like(y, -3.0), -y], 1),
    ])  # counter-clockwise
    return _twisted(mf.CrossSection([outline]), 30.0, 120.0, hand)


# -- helpers shared by the backbone tests (import them: `from conftest import rotate, rel_change`) --------

import torch  # noqa: E402

SHIPPED_BACKBONES = Path(__file__).resolve().parent.parent / "shapes" / "conf" / "backbone"


def shipped_options(name: str) -> dict:
    """The options ``shapes/conf/backbone/<name>.yaml`` ships (``_target_`` left out), as YAML reads them."""
    import yaml  # installed with hydra-core (omegaconf depends on it)

    conf = yaml.safe_load((SHIPPED_BACKBONES / f"{name}.yaml").read_text(encoding="utf-8"))
    conf.pop("_target_")
    return conf


def rotate(points: torch.Tensor, Q: torch.Tensor) -> torch.Tensor:
    """``points`` (or normals, or vectors in any row layout ``(..., 3)``) under ``Q``."""
    return points @ Q.transpose(-1, -2)  # convention: docs/design.md, "Rotations": x' = Q x on column vectors


def rel_change(a: torch.Tensor, b: torch.Tensor) -> float:
    """``max |a - b| / max |a|``: 0 for equal tensors, O(1) for unrelated ones."""
    a, b = a.detach(), b.detach()
    return float((a - b).abs().max() / a.abs().max().clamp_min(1e-30))


def random_cloud(b: int = 1, n: int = 64, seed: int = 7, dtype=torch.float64) -> torch.Tensor:
    """Gaussian points ``(b, n, 3)``: a generic cloud, chiral (no mirror symmetry)."""
    return torch.randn(b, n, 3, generator=torch.Generator().manual_seed(seed), dtype=dtype)


def random_normals(b: int = 1, n: int = 64, seed: int = 17, dtype=torch.float64) -> torch.Tensor:
    """Unit vectors ``(b, n, 3)`` in random directions."""
    v = torch.randn(b, n, 3, generator=torch.Generator().manual_seed(seed), dtype=dtype)
    return v / v.norm(dim=-1, keepdim=True)


def transform_features(features: dict, Q: torch.Tensor) -> dict:
    """Expected features ``{(l, p): (B, N, C, 2l+1)}`` after the orthogonal map ``Q (B, 3, 3)``.

    Type ``(l, p)`` goes to ``D_l(R) x`` with ``R = Q`` for a rotation, and to ``p D_l(R) x`` with
    ``R = -Q`` for an improper map (docs/design.md, "Wigner-D" and "Parity and handedness":
    ``Y_l(R v) = D_l(R) Y_l(v)``, and the inversion multiplies a parity-p feature by p).
    """
    from shapes.geometry import wigner_d  # checked against sympy in tests/test_geometry_wigner.py

    improper = torch.det(Q) < 0  # (B,)
    R = torch.where(improper[:, None, None], -Q, Q)
    out = {}
    for (l, p), x in features.items():
        D = wigner_d(l, R)  # (B, 2l+1, 2l+1)
        sign = torch.where(improper, float(p), 1.0).to(x.dtype)[:, None, None, None]
        out[(l, p)] = sign * torch.einsum("bnci,bji->bncj", x, D)  # (B, N, C, 2l+1)
    return out
