"""ISO 68-1 external thread as an exact helical solid, and the double-ended threaded stud.

The threaded rod is the region r <= f(z - P theta / 2 pi) for z in [0, L], where f is the
basic profile over one pitch (crest flat P/8 at d/2, root flat P/4 at d/2 - 5H/8, straight
60 degree flanks). Its crest therefore follows (r cos t, r sin t, P t / 2 pi): a right-hand
helix. Vertices sit on the helices through the profile corners, so flanks are exact straight
lines in every axial half-plane and only the helices are replaced by chords.
"""

from __future__ import annotations

import math

import manifold3d as mf
import numpy as np
import trimesh

from shapes.errors import InputError
from shapes._checks import Scope
from shapes.parts._mesh import from_arrays, to_trimesh, with_hand
from shapes.parts._standards import COARSE_PITCH_ISO261

__all__ = ["thread_profile", "threaded_rod", "threaded_stud"]


def thread_profile(d: float, pitch: float) -> tuple[np.ndarray, np.ndarray]:
    """Corners of the ISO 68-1 basic external profile over one pitch.

    Returns
    -------
    u : (4,) float, axial positions in [0, P) of the corners (crest centred on u = 0)
    r : (4,) float, radius at each corner
    """
    h = math.sqrt(3.0) / 2.0 * pitch  # fundamental triangle height H
    r_major, r_minor = d / 2.0, d / 2.0 - 5.0 / 8.0 * h
    u = pitch * np.array([1.0, 6.0, 10.0, 15.0]) / 16.0  # crest end, root start, root end, crest start
    r = np.array([r_major, r_minor, r_minor, r_major])
    return u, r


def _profile_radius(z: np.ndarray, u_k: np.ndarray, r_k: np.ndarray, pitch: float) -> np.ndarray:
    """f(z) for the periodic piecewise-linear profile through corners (u_k, r_k)."""
    uu = np.concatenate([u_k - pitch, u_k, u_k + pitch])
    rr = np.concatenate([r_k, r_k, r_k])
    return np.interp(np.mod(z, pitch), uu, rr)


def threaded_rod(d: float, pitch: float, length: float, columns: int = 24) -> mf.Manifold:
    """Right-hand ISO 68-1 threaded rod on z in [0, length], flat ends.

    Parameters
    ----------
    d : major diameter
    pitch : thread pitch P
    length : rod length
    columns : axial half-planes per turn; helices become chords of 360/columns degrees
    """
    u_k, r_k = thread_profile(d, pitch)
    shift = pitch / columns  # helix rise between neighbouring half-planes
    cols = []  # per half-plane: (z, r) sorted by z
    for i in range(columns):
        theta = 2.0 * math.pi * i / columns
        offset = pitch * theta / (2.0 * math.pi)
        n0 = math.floor((0.0 - offset) / pitch) - 1
        n1 = math.ceil((length - offset) / pitch) + 1
        knots = (u_k[None, :] + offset + pitch * np.arange(n0, n1 + 1)[:, None]).ravel()
        knots = knots[(knots > 1e-9) & (knots < length - 1e-9)]
        z = np.concatenate([[0.0], np.sort(knots), [length]])
        r = _profile_radius(z - offset, u_k, r_k, pitch)
        cols.append((theta, z, r))

    vertices, starts = [], []
    for theta, z, r in cols:
        starts.append(sum(len(v) for v in vertices))
        vertices.append(np.stack([r * math.cos(theta), r * math.sin(theta), z], axis=1))
    n_side = sum(len(v) for v in vertices)
    bottom, top = n_side, n_side + 1
    vertices = np.concatenate(vertices + [np.array([[0.0, 0.0, 0.0], [0.0, 0.0, length]])])

    faces = []
    for i in range(columns):
        j = (i + 1) % columns
        za, zb = cols[i][1], cols[j][1] - shift  # compare along the helices
        a0, b0 = starts[i], starts[j]
        ia, ib = 0, 0
        while ia < len(za) - 1 or ib < len(zb) - 1:
            advance_a = ib == len(zb) - 1 or (ia < len(za) - 1 and za[ia + 1] <= zb[ib + 1] + 1e-12)
            if advance_a:  # outward: (a_i, b_j, a_i+1)
                faces.append((a0 + ia, b0 + ib, a0 + ia + 1))
                ia += 1
            else:  # outward: (a_i, b_j, b_j+1)
                faces.append((a0 + ia, b0 + ib, b0 + ib + 1))
                ib += 1
        # end caps: fans from the axis, normals -z at the bottom and +z at the top
        faces.append((bottom, b0, a0))
        faces.append((top, a0 + len(za) - 1, b0 + len(zb) - 1))
    return from_arrays(vertices, np.array(faces, dtype=np.int64))


def _chamfer_outline(r_minor: float, r_big: float, length: float, segments: int) -> mf.Manifold:
    """Solid of revolution cutting a 45 degree chamfer from the minor diameter at both ends."""
    c = r_big - r_minor
    pts = [(0.0, 0.0), (r_minor, 0.0), (r_big, c), (r_big, length - c), (r_minor, length), (0.0, length)]
    return mf.Manifold.revolve(mf.CrossSection([pts]), segments)


def threaded_stud(
    size: str = "M8",
    length: float = 40.0,
    thread_length: float = 12.0,
    hand: str = "right",
    columns: int = 24,
) -> trimesh.Trimesh:
    """Double-ended stud: ISO 68-1 thread of ISO 261 coarse pitch at both ends, reduced shank.

    The shank between the threads is turned to the pitch diameter d2 = d - 0.6495 P (common
    practice for rolled-thread studs). Axis +z, z in [0, length]. ``hand="left"`` is the exact
    mirror image (x -> -x) of the right-hand stud.

    Parameters
    ----------
    size : one of ``COARSE_PITCH_ISO261`` (``"M5"`` .. ``"M16"``, ISO 261 coarse pitch)
    length : overall length
    thread_length : threaded length at each end
    hand : ``"right"`` or ``"left"``
    columns : half-planes per turn of the helical mesh
    """
    check = Scope("threaded_stud: ", InputError, unit="mm")
    check.choice("size", size, COARSE_PITCH_ISO261)
    length = check.positive("length", length)
    thread_length = check.positive("thread_length", thread_length)
    check.choice("hand", hand, ("right", "left"))
    columns = check.integer("columns", columns, 8, 256)
    d, pitch = COARSE_PITCH_ISO261[size]["d"], COARSE_PITCH_ISO261[size]["P"]
    check.less_than("2 * thread_length + 2 * pitch", 2 * thread_length + 2 * pitch, "length", length)
    if thread_length < 2 * pitch:
        raise InputError(
            f"threaded_stud: thread_length should be >= 2 pitches ({2 * pitch:g} mm), got {thread_length:g} mm instead."
        )
    r_pitch = (d - 0.6495 * pitch) / 2.0
    _, r_k = thread_profile(d, pitch)
    r_minor = float(r_k.min())
    ends = threaded_rod(d, pitch, thread_length, columns)
    solid = ends + ends.translate((0.0, 0.0, length - thread_length))
    # Shank and chamfer facets are turned by a quarter column so their seams never lie in a
    # thread half-plane (coincident edges would leave zero-area faces after the boolean).
    quarter = 90.0 / columns
    shank = mf.Manifold.cylinder(length - 2 * thread_length + 2 * pitch, r_pitch, -1.0, 2 * columns)
    solid = solid + shank.translate((0.0, 0.0, thread_length - pitch)).rotate((0.0, 0.0, quarter))
    solid = solid ^ _chamfer_outline(r_minor, d / 2.0 + 0.3, length, 2 * columns).rotate((0.0, 0.0, quarter))
    return with_hand(to_trimesh(solid), hand)
