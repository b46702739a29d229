"""Angle (L) bracket with unequal legs, an off-centre gusset and an uneven hole pattern, so it
has no mirror plane: the right bracket and its mirror image, the left bracket, are different
parts."""

from __future__ import annotations


import manifold3d as mf
import numpy as np
import trimesh

from shapes.errors import InputError
from shapes._checks import Scope
from shapes.parts._mesh import to_trimesh, with_hand

__all__ = ["angle_bracket"]


def _box(x0, y0, z0, x1, y1, z1) -> mf.Manifold:
    return mf.Manifold.cube((x1 - x0, y1 - y0, z1 - z0)).translate((x0, y0, z0))


def _hole_z(x: float, y: float, d: float, z0: float, z1: float, n: int) -> mf.Manifold:
    return mf.Manifold.cylinder(z1 - z0, d / 2.0, -1.0, n).translate((x, y, z0))


def angle_bracket(
    width: float = 40.0, leg_base: float = 50.0, leg_upright: float = 35.0, thickness: float = 4.0,
    hole_d: float = 6.6, base_holes: int = 2, hand: str = "right", segments: int = 48,
) -> trimesh.Trimesh:
    """Right-hand angle bracket; ``hand="left"`` is its exact mirror image (x -> -x).

    The base leg lies on z in [0, thickness], x in [0, leg_base]; the upright leg on
    x in [0, thickness], z in [0, leg_upright]; both span y in [0, width]. The base holes sit in
    the first 60 % of the width, the upright has one hole at 35 % and a slot at 80 %, and the
    gusset stands at 75 % of the width: no plane maps the part onto itself.

    Parameters
    ----------
    width : extent along y
    leg_base, leg_upright : leg lengths; they must differ by at least a thickness
    thickness : plate thickness
    hole_d : clearance hole diameter (6.6 mm is the medium clearance for M6, common practice)
    base_holes : holes in the base leg, 1 to 4
    hand : ``"right"`` or ``"left"``
    """
    f = "angle_bracket"
    check = Scope(f"{f}: ", InputError, unit="mm")
    width = check.positive("width", width)
    leg_base = check.positive("leg_base", leg_base)
    leg_upright = check.positive("leg_upright", leg_upright)
    thickness = check.positive("thickness", thickness)
    hole_d = check.positive("hole_d", hole_d)
    base_holes = check.integer("base_holes", base_holes, 1, 4)
    check.choice("hand", hand, ("right", "left"))
    segments = check.integer("segments", segments, 8, 256)
    if abs(leg_base - leg_upright) < thickness:
        raise InputError(
            f"{f}: legs should differ by >= thickness ({thickness:g} mm) so the bracket is handed, "
            f"got {leg_base:g} and {leg_upright:g} mm instead."
        )
    short = min(leg_base, leg_upright)
    if hole_d > 0.3 * min(width, short) or short < 3.0 * thickness + 2.0 * hole_d:
        raise InputError(f"{f}: hole_d {hole_d:g} mm should fit the legs ({width:g} x {short:g} mm), got too large a hole instead.")
    t = thickness
    body = _box(0, 0, 0, leg_base, width, t) + _box(0, 0, 0, t, width, leg_upright)
    # gusset: triangle in the xz corner, thickness t, centred at 75 % of the width
    g = 0.6 * (short - t)
    tri = mf.CrossSection([[(t - 0.01, t - 0.01), (t + g, t - 0.01), (t - 0.01, t + g)]])
    gusset = mf.Manifold.extrude(tri, t).rotate((90.0, 0.0, 0.0))  # extrusion along -y
    gusset = gusset.translate((0.0, 0.75 * width + t / 2.0, 0.0))
    body = body + gusset
    cutters = []
    x_base = t + 0.5 * (leg_base - t) + 0.15 * (leg_base - t)  # off the leg centre, away from the gusset toe
    ys = np.linspace(0.15, 0.6, base_holes) if base_holes > 1 else np.array([0.3])
    for y in ys:
        cutters.append(_hole_z(x_base, float(y * width), hole_d, -1.0, t + 1.0, segments))
    z_up = t + 0.6 * (leg_upright - t)
    hole_up = mf.Manifold.cylinder(t + 2.0, hole_d / 2.0, -1.0, segments).rotate((0.0, 90.0, 0.0))
    cutters.append(hole_up.translate((-1.0, 0.35 * width, z_up)))
    # slot: two circles joined by a box, elongated along z
    slot_len = 0.25 * (leg_upright - t)
    slot = mf.CrossSection.circle(hole_d / 2.0, segments) + mf.CrossSection.circle(hole_d / 2.0, segments).translate((slot_len, 0.0))
    slot = slot + mf.CrossSection.square((slot_len, hole_d)).translate((0.0, -hole_d / 2.0))
    slot = slot.hull()
    slot3 = mf.Manifold.extrude(slot, t + 2.0).rotate((0.0, -90.0, 0.0))  # long axis along z, depth along -x
    slot3 = slot3.translate((t + 1.0, 0.8 * width, t + 0.35 * (leg_upright - t)))
    cutters.append(slot3)
    body = body - mf.Manifold.batch_boolean(cutters, mf.OpType.Add)
    return with_hand(to_trimesh(body), hand)
