"""Rotations, reflections and random poses of point clouds.

Convention: a rotation acts on column vectors, ``x' = R x``; a batch of points ``(B, N, 3)``
rotates as ``points @ R.transpose(-1, -2)``. Random rotations are Haar-uniform (normalised
Gaussian quaternions), so their rotation angle has density ``(1 - cos t) / pi`` on ``[0, pi]``.
"""

from __future__ import annotations

import math

import torch

from shapes.errors import ConfigError, InputError
from shapes.geometry._checks import check_count, check_last_dim, check_matrices, shape_of

__all__ = [
    "POSE_REGIMES",
    "uniform_rotations",
    "rotation_from_quaternion",
    "rotation_about_axis",
    "axis_and_angle_of",
    "rotation_angle",
    "rotations_about_z",
    "random_z_rotations",
    "reflection",
    "random_reflections",
    "random_improper",
    "random_poses",
    "check_regime",
    "RENAMED_REGIMES",
    "apply_pose",
]

# Order matters for reports: from the easiest pose regime to the hardest.
POSE_REGIMES = ("cad", "upright", "any", "mirrored")
# Names used before the pose regimes got their own; an old name gives one line naming the new one.
RENAMED_REGIMES = {"aligned": "cad", "z": "upright", "so3": "any", "mirror": "mirrored"}



def _safe_normalize(v: torch.Tensor) -> torch.Tensor:
    """``v / |v|`` along the last axis; a zero vector stays zero with a finite gradient."""
    sq = (v * v).sum(-1, keepdim=True)
    nonzero = sq > torch.finfo(v.dtype).tiny
    norm = torch.sqrt(torch.where(nonzero, sq, torch.ones_like(sq)))
    return torch.where(nonzero, v / norm, torch.zeros_like(v))


def _device_of(generator: torch.Generator | None, device) -> torch.device:
    if device is not None:
        return torch.device(device)
    return generator.device if generator is not None else torch.device("cpu")


def _randn(shape, generator, dtype, device) -> torch.Tensor:
    """Gaussian samples drawn on the generator's device, then moved (so a CPU generator serves any device)."""
    gen_device = generator.device if generator is not None else _device_of(None, device)
    x = torch.randn(shape, generator=generator, dtype=dtype, device=gen_device)
    return x.to(_device_of(generator, device))


def _rand(shape, generator, dtype, device) -> torch.Tensor:
    gen_device = generator.device if generator is not None else _device_of(None, device)
    x = torch.rand(shape, generator=generator, dtype=dtype, device=gen_device)
    return x.to(_device_of(generator, device))


def rotation_from_quaternion(q: torch.Tensor) -> torch.Tensor:
    """Rotation matrices from quaternions ``(w, x, y, z)``.

    Parameters
    ----------
    q : (..., 4) float
        Quaternions, scalar part first; normalised here (a zero quaternion gives the zero matrix).

    Returns
    -------
    (..., 3, 3) float
        ``R`` with ``R v = q v q*``.
    """
    check_last_dim(q, "quaternions", "(..., 4)", 4)
    w, x, y, z = _safe_normalize(q).unbind(-1)
    rows = [
        1 - 2 * (y * y + z * z), 2 * (x * y - w * z), 2 * (x * z + w * y),
        2 * (x * y + w * z), 1 - 2 * (x * x + z * z), 2 * (y * z - w * x),
        2 * (x * z - w * y), 2 * (y * z + w * x), 1 - 2 * (x * x + y * y),
    ]
    return torch.stack(rows, -1).reshape(q.shape[:-1] + (3, 3))  # (..., 3, 3)


def uniform_rotations(
    n: int, generator: torch.Generator | None = None, dtype=torch.float32, device=None
) -> torch.Tensor:
    """Haar-uniform rotations from normalised Gaussian quaternions.

    Parameters
    ----------
    n : int
        Number of rotations.
    generator : torch.Generator, optional
        Source of randomness (see ``shapes.seeding.torch_generator``); same seed, same rotations.

    Returns
    -------
    (n, 3, 3) float
        Proper rotations (det +1).
    """
    n = check_count(n, "n")
    # The quaternion is drawn in float64 so float32 and float64 callers get the same rotations.
    q = _randn((n, 4), generator, torch.float64, device)
    return rotation_from_quaternion(q).to(dtype)


def _skew(v: torch.Tensor) -> torch.Tensor:
    """Cross-product matrices ``K`` with ``K w = v x w``; ``v (..., 3) -> (..., 3, 3)``."""
    x, y, z = v.unbind(-1)
    o = torch.zeros_like(x)
    return torch.stack([o, -z, y, z, o, -x, -y, x, o], -1).reshape(v.shape[:-1] + (3, 3))


def rotation_about_axis(axis: torch.Tensor, angle) -> torch.Tensor:
    """Rotation by ``angle`` (radians, right-hand rule) about ``axis`` (Rodrigues' formula).

    Parameters
    ----------
    axis : (..., 3) float
        Rotation axes; normalised here.
    angle : (...) float
        Angles in radians, broadcast against ``axis.shape[:-1]``.

    Returns
    -------
    (..., 3, 3) float
    """
    check_last_dim(axis, "axis")
    angle = torch.as_tensor(angle, dtype=axis.dtype, device=axis.device)
    k = _skew(_safe_normalize(axis))
    s = torch.sin(angle)[..., None, None]
    c = torch.cos(angle)[..., None, None]
    eye = torch.eye(3, dtype=axis.dtype, device=axis.device)
    return eye + s * k + (1 - c) * (k @ k)


def matrix_to_quaternion(R: torch.Tensor) -> torch.Tensor:
    """Unit quaternions ``(w, x, y, z)`` with ``w >= 0`` from rotation matrices ``(..., 3, 3)``.

    Shepperd's method: of the four algebraically equal formulas, each row uses the one with the
    largest pivot, so it stays accurate near 180 degrees where the antisymmetric part vanishes.
    """
    m = R
    t = m[..., 0, 0] + m[..., 1, 1] + m[..., 2, 2]
    cands = torch.stack(
        [
            torch.stack([1 + t, m[..., 2, 1] - m[..., 1, 2], m[..., 0, 2] - m[..., 2, 0], m[..., 1, 0] - m[..., 0, 1]], -1),
            torch.stack([m[..., 2, 1] - m[..., 1, 2], 1 + 2 * m[..., 0, 0] - t, m[..., 0, 1] + m[..., 1, 0], m[..., 0, 2] + m[..., 2, 0]], -1),
            torch.stack([m[..., 0, 2] - m[..., 2, 0], m[..., 0, 1] + m[..., 1, 0], 1 + 2 * m[..., 1, 1] - t, m[..., 1, 2] + m[..., 2, 1]], -1),
            torch.stack([m[..., 1, 0] - m[..., 0, 1], m[..., 0, 2] + m[..., 2, 0], m[..., 1, 2] + m[..., 2, 1], 1 + 2 * m[..., 2, 2] - t], -1),
        ],
        -2,
    )  # (..., 4 candidates, 4)
    pivots = torch.stack([1 + t, 1 + 2 * m[..., 0, 0] - t, 1 + 2 * m[..., 1, 1] - t, 1 + 2 * m[..., 2, 2] - t], -1)
    best = pivots.argmax(-1, keepdim=True)  # (..., 1)
    q = torch.gather(cands, -2, best[..., None].expand(best.shape[:-1] + (1, 4))).squeeze(-2)
    q = _safe_normalize(q)
    return torch.where(q[..., :1] < 0, -q, q)


def axis_and_angle_of(R: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Axis and angle of rotation matrices.

    Parameters
    ----------
    R : (..., 3, 3) float
        Proper rotations.

    Returns
    -------
    axis : (..., 3) float
        Unit axes (an arbitrary unit axis, +x, for the identity).
    angle : (...) float
        Angles in ``[0, pi]``, so that ``rotation_about_axis(axis, angle) == R``.
    """
    check_matrices(R)
    q = matrix_to_quaternion(R)
    v = q[..., 1:]
    vnorm = torch.sqrt((v * v).sum(-1))
    angle = 2 * torch.atan2(vnorm, q[..., 0])
    x_axis = torch.zeros_like(v)
    x_axis[..., 0] = 1
    axis = torch.where((vnorm > 0)[..., None], _safe_normalize(v), x_axis)
    return axis, angle


def rotation_angle(R: torch.Tensor) -> torch.Tensor:
    """Rotation angle in ``[0, pi]`` of rotation matrices ``(..., 3, 3) -> (...)``.

    ``atan2(|axial part|, (trace - 1) / 2)``, accurate at every angle (``acos`` of the trace loses
    half the digits near 0 and pi).
    """
    check_matrices(R)
    axial = torch.stack(
        [R[..., 2, 1] - R[..., 1, 2], R[..., 0, 2] - R[..., 2, 0], R[..., 1, 0] - R[..., 0, 1]], -1
    ) / 2
    sq = (axial * axial).sum(-1)
    nonzero = sq > torch.finfo(R.dtype).tiny
    sin = torch.where(nonzero, torch.sqrt(torch.where(nonzero, sq, torch.ones_like(sq))), torch.zeros_like(sq))
    cos = (R[..., 0, 0] + R[..., 1, 1] + R[..., 2, 2] - 1) / 2
    return torch.atan2(sin, cos)


def rotations_about_z(angle) -> torch.Tensor:
    """Rotations about +z by ``angle`` (radians, counter-clockwise seen from +z): ``(...) -> (..., 3, 3)``."""
    angle = torch.as_tensor(angle)
    if not angle.is_floating_point():
        angle = angle.to(torch.get_default_dtype())
    c, s = torch.cos(angle), torch.sin(angle)
    o, one = torch.zeros_like(c), torch.ones_like(c)
    return torch.stack([c, -s, o, s, c, o, o, o, one], -1).reshape(angle.shape + (3, 3))


def random_z_rotations(
    n: int, generator: torch.Generator | None = None, dtype=torch.float32, device=None
) -> torch.Tensor:
    """Rotations about +z by angles uniform in ``[0, 2 pi)``: ``(n, 3, 3)``."""
    n = check_count(n, "n")
    angle = _rand((n,), generator, torch.float64, device) * (2 * math.pi)
    return rotations_about_z(angle).to(dtype)


def reflection(normal: torch.Tensor) -> torch.Tensor:
    """Householder reflections ``I - 2 n n^T`` through the planes with unit normal ``n``.

    Parameters
    ----------
    normal : (..., 3) float
        Plane normals; normalised here.

    Returns
    -------
    (..., 3, 3) float
        Symmetric orthogonal matrices with det -1.
    """
    check_last_dim(normal, "normal")
    n = _safe_normalize(normal)
    eye = torch.eye(3, dtype=normal.dtype, device=normal.device)
    return eye - 2 * n[..., :, None] * n[..., None, :]


def random_reflections(
    n: int, generator: torch.Generator | None = None, dtype=torch.float32, device=None
) -> torch.Tensor:
    """Reflections through planes with uniformly random normals: ``(n, 3, 3)``, det -1."""
    n = check_count(n, "n")
    normals = _randn((n, 3), generator, torch.float64, device)
    return reflection(normals).to(dtype)


def random_improper(
    n: int, generator: torch.Generator | None = None, dtype=torch.float32, device=None
) -> torch.Tensor:
    """A reflection through a random plane followed by a Haar rotation: ``R H``, shape ``(n, 3, 3)``, det -1.

    The product is uniformly distributed over the improper half of O(3) (Haar measure times a fixed
    reflection), so the choice of the reflection's distribution does not matter.
    """
    n = check_count(n, "n")
    h = random_reflections(n, generator, torch.float64, device)
    r = uniform_rotations(n, generator, torch.float64, device)
    return (r @ h).to(dtype)


def check_regime(regime, allowed, option: str) -> str:
    """Return ``regime`` if it is one of ``allowed``; else raise one line naming the choices.

    An old regime name (``aligned``, ``z``, ``so3``, ``mirror``) gets its new name in the message.
    """
    if isinstance(regime, str) and regime in allowed:
        return regime
    if isinstance(regime, str) and regime in RENAMED_REGIMES:
        raise ConfigError(f"{option} '{regime}' is now called '{RENAMED_REGIMES[regime]}'; "
                          f"choose from {', '.join(allowed)}.")
    raise ConfigError(f"{option} should be one of {', '.join(allowed)}, got {regime!r} instead.")


def random_poses(
    regime: str, n: int, generator: torch.Generator | None = None, dtype=torch.float32, device=None
) -> torch.Tensor:
    """Random orthogonal matrices for a pose regime.

    Parameters
    ----------
    regime : {"cad", "upright", "any", "mirrored"}
        ``cad``: identity (as modelled); ``upright``: uniform turn about +z (as on a conveyor);
        ``any``: Haar rotation; ``mirrored``: reflection then Haar rotation (see :func:`random_improper`).
    n : int
        Number of poses.

    Returns
    -------
    (n, 3, 3) float
    """
    n = check_count(n, "n")
    check_regime(regime, POSE_REGIMES, "pose regime")
    if regime == "cad":
        eye = torch.eye(3, dtype=dtype, device=_device_of(generator, device))
        return eye.expand(n, 3, 3).clone()
    if regime == "upright":
        return random_z_rotations(n, generator, dtype, device)
    if regime == "any":
        return uniform_rotations(n, generator, dtype, device)
    if regime == "mirrored":
        return random_improper(n, generator, dtype, device)
    raise AssertionError(regime)  # unreachable: check_regime above


def apply_pose(points: torch.Tensor, R: torch.Tensor) -> torch.Tensor:
    """Rotate (or reflect) each cloud by its matrix: ``points @ R^T``.

    Parameters
    ----------
    points : (B, N, 3) float
    R : (B, 3, 3) float

    Returns
    -------
    (B, N, 3) float
    """
    if not isinstance(points, torch.Tensor) or points.dim() != 3 or points.shape[-1] != 3:
        raise InputError(f"points should have shape (B, N, 3), got {shape_of(points)} instead.")
    if not isinstance(R, torch.Tensor) or tuple(R.shape) != (points.shape[0], 3, 3):
        raise InputError(
            f"R should have shape (B, 3, 3) = {(points.shape[0], 3, 3)}, got {shape_of(R)} instead."
        )
    return points @ R.transpose(-1, -2).to(points.dtype)
