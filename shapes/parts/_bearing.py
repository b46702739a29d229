"""Deep-groove ball bearing with ISO 15 boundary dimensions, as one closed solid.

Open variant: outer ring and inner ring with raceway grooves and a ring of balls. The groove
radius is 0.45 of the ball diameter, under the ball's 0.5 by more than the faceting, so each
ball is fused into both rings and the bearing stays one solid. Sealed variant: a solid annulus
whose faces carry a recessed seal annulus bordered by two narrow grooves.
"""

from __future__ import annotations

import math

import manifold3d as mf
import numpy as np
import trimesh

from shapes._checks import Scope
from shapes.errors import InputError
from shapes.parts._mesh import to_trimesh
from shapes.parts._standards import BEARING_ISO15

__all__ = ["ball_bearing"]


def _chamfered_ring(r_in: float, r_out: float, width: float, c_in: float, c_out: float) -> list[tuple[float, float]]:
    """(r, z) outline of a ring with 45 degree chamfers on the inner and/or outer corners, CCW."""
    return [
        (r_in + c_in, 0.0), (r_out - c_out, 0.0), (r_out, c_out), (r_out, width - c_out),
        (r_out - c_out, width), (r_in + c_in, width), (r_in, width - c_in), (r_in, c_in),
    ]


def _groove_arc(centre_r: float, centre_z: float, radius: float, a0: float, a1: float, n: int) -> list[tuple[float, float]]:
    a = np.linspace(a0, a1, n)
    return [(centre_r + radius * math.cos(t), centre_z + radius * math.sin(t)) for t in a]


def ball_bearing(designation: str = "6202", sealed: bool = False, segments: int = 48) -> trimesh.Trimesh:
    """ISO 15 deep-groove ball bearing, axis +z, z in [0, B].

    Ball diameter 0.3 (D - d) on the pitch circle (d + D) / 2, with as many balls as fit at
    1.5 ball diameters apart (common practice proportions; ISO 15 fixes only d, D, B).

    Parameters
    ----------
    designation : one of ``BEARING_ISO15`` (e.g. ``"6000"``, ``"6202"``)
    sealed : model the sealed face (True) or show the balls (False)
    segments : facets around the axis
    """
    check = Scope("ball_bearing: ", InputError, unit="mm")
    check.choice("designation", designation, BEARING_ISO15)
    sealed = check.boolean("sealed", sealed)
    segments = check.integer("segments", segments, 16, 512)
    dims = BEARING_ISO15[designation]
    ri, ro, width = dims["d"] / 2.0, dims["D"] / 2.0, dims["B"]
    section = ro - ri
    rm = (ri + ro) / 2.0
    ball = 0.3 * 2.0 * section
    chamfer = 0.04 * section + 0.2  # corner chamfer r_s (from memory: ISO 15 r_s min is 0.3 to 1 mm at these sizes)
    r_inner_shoulder = rm - 0.32 * ball  # ring lands leave the balls showing between them
    r_outer_shoulder = rm + 0.32 * ball
    if sealed:
        g_depth, g_width, recess = 0.06 * width, 0.05 * section, 0.03 * width
        ra, rb = r_inner_shoulder, r_outer_shoulder
        top = [
            (ro - chamfer, width), (rb, width), (rb, width - g_depth), (rb - g_width, width - g_depth),
            (rb - g_width, width - recess), (ra + g_width, width - recess), (ra + g_width, width - g_depth),
            (ra, width - g_depth), (ra, width), (ri + chamfer, width),
        ]
        bottom = [(r, width - z) for r, z in top[::-1]]
        pts = bottom + [(ro, chamfer), (ro, width - chamfer)] + top + [(ri, width - chamfer), (ri, chamfer)]
        return to_trimesh(mf.Manifold.revolve(mf.CrossSection([pts]), segments))
    groove = 0.45 * ball
    zc = width / 2.0
    # outer ring: the groove opens toward the axis, from the top land down to the bottom land
    outer = [
        (r_outer_shoulder, 0.0), (ro - chamfer, 0.0), (ro, chamfer),
        (ro, width - chamfer), (ro - chamfer, width), (r_outer_shoulder, width),
    ]
    land = math.sqrt(max(groove**2 - (r_outer_shoulder - rm) ** 2, 0.0))
    a_top = math.atan2(land, r_outer_shoulder - rm)
    outer += _groove_arc(rm, zc, groove, a_top, -a_top, 7)[1:-1] if land > 0 else []
    inner = [(ri + chamfer, 0.0), (r_inner_shoulder, 0.0)]
    land_i = math.sqrt(max(groove**2 - (rm - r_inner_shoulder) ** 2, 0.0))
    a_i = math.atan2(land_i, r_inner_shoulder - rm)  # angle of the land point seen from the ball centre
    inner += _groove_arc(rm, zc, groove, -a_i, -(2 * math.pi - a_i), 7)[1:-1] if land_i > 0 else []
    inner += [(r_inner_shoulder, width), (ri + chamfer, width), (ri, width - chamfer), (ri, chamfer)]
    rings = mf.Manifold.revolve(mf.CrossSection([outer, inner]), segments)
    n_balls = int(math.floor(2.0 * math.pi * rm / (1.5 * ball)))
    angles = [2.0 * math.pi * k / n_balls for k in range(n_balls)]
    balls = [mf.Manifold.sphere(ball / 2.0, 16).translate((rm * math.cos(a), rm * math.sin(a), zc)) for a in angles]
    return to_trimesh(mf.Manifold.batch_boolean([rings] + balls, mf.OpType.Add))
