"""Shared fixtures."""

from pathlib import Path

import pytest

DEMO = Path(__file__).resolve().parent.parent / "demo_meshes"


@pytest.fixture(scope="session")
def tiny_surface_data(tmp_path_factory):
    """The demo catalog as 64-point surface clouds, one copy per instance: 128 training clouds in 16 classes."""
    from shapes.cli import main

    root = tmp_path_factory.mktemp("tiny_surface")
    assert main(["sample", f"meshes={DEMO}", f"data={root / 'data'}", "sample.points=64", "sample.mode=surface",
                 "sample.copies={train: 1, val: 1, test: 1}", "sample.oversample=1",
                 "sample.twins=declared"]) == 0
    return root / "data"


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
