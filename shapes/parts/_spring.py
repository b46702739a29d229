"""Helical compression spring: a round wire swept along a right-hand helix, one closed end
coil at each end, ends ground flat."""

from __future__ import annotations

import math

import manifold3d as mf
import numpy as np
import trimesh

from shapes.errors import InputError
from shapes._checks import Scope
from shapes.parts._mesh import from_arrays, to_trimesh, with_hand

__all__ = ["compression_spring", "spring_centerline"]

# End coils close down to 1.15 wire diameters: a small gap keeps the swept wire from touching
# itself (touching coils would make the solid non-manifold).
_END_PITCH = 1.15


def spring_centerline(mean_d: float, wire_d: float, coils: float, pitch: float, per_turn: int) -> np.ndarray:
    """Points on the wire axis, (K, 3) float, turning counter-clockwise about +z (right hand).

    The pitch ramps linearly from 1.15 wire_d to ``pitch`` over the first turn and back over
    the last; z starts at 0.
    """
    total = 2.0 * math.pi * coils
    n = max(2, int(round(coils * per_turn))) + 1
    fine = 16  # integrate z(t) on a finer grid than the rings
    t = np.linspace(0.0, total, (n - 1) * fine + 1)
    p_end = _END_PITCH * wire_d
    ramp = np.clip(np.minimum(t, total - t) / (2.0 * math.pi), 0.0, 1.0)
    p = p_end + (pitch - p_end) * ramp  # pitch per turn at t
    dz = p / (2.0 * math.pi)
    z = np.concatenate([[0.0], np.cumsum(0.5 * (dz[1:] + dz[:-1]) * np.diff(t))])
    t, z = t[::fine], z[::fine]
    r = mean_d / 2.0
    return np.stack([r * np.cos(t), r * np.sin(t), z], axis=1)


def _sweep_tube(path: np.ndarray, radius: float, sides: int) -> tuple[np.ndarray, np.ndarray]:
    """Closed tube of circular section along a helix-like path, flat caps at both ends.

    The section frame is (N, B, T) with N the horizontal radial direction (always normal to a
    path that winds about z) and B = T x N, so rings are outward-wound.
    """
    tangent = np.gradient(path, axis=0)
    tangent /= np.linalg.norm(tangent, axis=1, keepdims=True)
    radial = path.copy()
    radial[:, 2] = 0.0
    radial /= np.linalg.norm(radial, axis=1, keepdims=True)
    radial -= (radial * tangent).sum(1, keepdims=True) * tangent  # exact orthogonality on ramps
    radial /= np.linalg.norm(radial, axis=1, keepdims=True)
    binormal = np.cross(tangent, radial)
    psi = 2.0 * math.pi * np.arange(sides) / sides
    rings = path[:, None, :] + radius * (
        np.cos(psi)[None, :, None] * radial[:, None, :] + np.sin(psi)[None, :, None] * binormal[:, None, :]
    )  # (K, S, 3)
    k = len(path)
    vertices = np.concatenate([rings.reshape(-1, 3), path[[0, -1]]])
    idx = np.arange(k * sides).reshape(k, sides)
    a, b = idx[:-1], np.roll(idx[:-1], -1, axis=1)
    c, d = np.roll(idx[1:], -1, axis=1), idx[1:]
    faces = [np.stack([a, b, c], -1).reshape(-1, 3), np.stack([a, c, d], -1).reshape(-1, 3)]
    start, end = k * sides, k * sides + 1
    j = np.arange(sides)
    faces.append(np.stack([np.full(sides, start), idx[0, (j + 1) % sides], idx[0, j]], 1))
    faces.append(np.stack([np.full(sides, end), idx[-1, j], idx[-1, (j + 1) % sides]], 1))
    return vertices, np.concatenate(faces)


def compression_spring(
    wire_d: float = 1.6, mean_d: float = 12.0, coils: float = 6.0, pitch: float = 4.0,
    ground: bool = True, hand: str = "right", per_turn: int = 20, sides: int = 10,
) -> trimesh.Trimesh:
    """Helical compression spring with closed (and optionally ground) ends, axis +z.

    Parameters
    ----------
    wire_d : wire diameter
    mean_d : mean coil diameter (centre of the wire)
    coils : total coils, including one closed end coil at each end (>= 3)
    pitch : pitch of the active coils, > 1.15 wire_d
    ground : grind both ends flat (a quarter wire removed at each tip)
    hand : ``"right"`` (counter-clockwise rising seen from +z) or ``"left"`` (the exact mirror image)
    per_turn, sides : sweep resolution along the wire and around it
    """
    check = Scope("compression_spring: ", InputError, unit="mm")
    wire_d = check.positive("wire_d", wire_d)
    mean_d = check.positive("mean_d", mean_d)
    coils = check.number("coils", coils, low=3.0, unit="")
    pitch = check.positive("pitch", pitch)
    ground = check.boolean("ground", ground)
    check.choice("hand", hand, ("right", "left"))
    per_turn = check.integer("per_turn", per_turn, 8, 256)
    sides = check.integer("sides", sides, 6, 64)
    if mean_d < 3.0 * wire_d:
        raise InputError(f"compression_spring: mean_d should be >= 3 wire_d ({3 * wire_d:g} mm), got {mean_d:g} mm instead.")
    if pitch <= _END_PITCH * wire_d:
        raise InputError(
            f"compression_spring: pitch should be > {_END_PITCH} wire_d ({_END_PITCH * wire_d:g} mm), got {pitch:g} mm instead."
        )
    path = spring_centerline(mean_d, wire_d, coils, pitch, per_turn)
    solid = from_arrays(*_sweep_tube(path, wire_d / 2.0, sides))
    if ground:
        # Grind to a quarter of the wire below the first and above the last centreline point.
        z0, z1 = 0.0 - 0.25 * wire_d, path[-1, 2] + 0.25 * wire_d
        r = mean_d / 2.0 + wire_d + 1.0
        slab = mf.Manifold.cube((2 * r, 2 * r, z1 - z0)).translate((-r, -r, z0))
        solid = solid ^ slab
        solid = solid.translate((0.0, 0.0, -z0))
    else:
        solid = solid.translate((0.0, 0.0, wire_d / 2.0))
    return with_hand(to_trimesh(solid), hand)
