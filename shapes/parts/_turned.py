"""Turned and drilled parts without a published dimension table: bolted flange, stepped shaft
with a keyway, V-belt pulley, plain or flanged bushing. Proportions are common practice."""

from __future__ import annotations

import math
from typing import Sequence

import manifold3d as mf
import trimesh

from shapes.errors import InputError
from shapes._checks import Scope
from shapes.parts._mesh import to_trimesh

__all__ = ["bolted_flange", "stepped_shaft", "v_pulley", "bushing"]


def _revolve(points: list[tuple[float, float]], segments: int) -> mf.Manifold:
    """Solid of revolution about +z of a CCW (r, z) outline."""
    return mf.Manifold.revolve(mf.CrossSection([points]), segments)


def bolted_flange(
    outer_d: float = 80.0, bore_d: float = 25.0, thickness: float = 10.0, holes: int = 4,
    bolt_circle_d: float = 60.0, hole_d: float = 9.0, hub_d: float = 40.0, hub_h: float = 8.0,
    segments: int = 64,
) -> trimesh.Trimesh:
    """Flat flange with a raised hub and ``holes`` equally spaced bolt holes, axis +z.

    Parameters
    ----------
    outer_d, thickness : flange disc
    bore_d : through bore
    holes : bolt holes on the bolt circle (3 to 16)
    bolt_circle_d, hole_d : bolt circle and hole diameters
    hub_d, hub_h : raised hub diameter and height above the disc
    """
    f = "bolted_flange"
    check = Scope(f"{f}: ", InputError, unit="mm")
    outer_d, bore_d = check.positive("outer_d", outer_d), check.positive("bore_d", bore_d)
    thickness = check.positive("thickness", thickness)
    holes = check.integer("holes", holes, 3, 16)
    bolt_circle_d, hole_d = check.positive("bolt_circle_d", bolt_circle_d), check.positive("hole_d", hole_d)
    hub_d, hub_h = check.positive("hub_d", hub_d), check.positive("hub_h", hub_h)
    segments = check.integer("segments", segments, 16, 512)
    check.less_than("bore_d", bore_d, "hub_d", hub_d)
    check.less_than("hub_d + hole_d", hub_d + hole_d, "bolt_circle_d", bolt_circle_d)
    check.less_than("bolt_circle_d + hole_d", bolt_circle_d + hole_d, "outer_d", outer_d)
    if math.pi * bolt_circle_d / holes < 1.5 * hole_d:
        raise InputError(
            f"{f}: {holes} holes of {hole_d:g} mm should leave material between them, got overlapping holes instead."
        )
    rb, ro, rh = bore_d / 2.0, outer_d / 2.0, hub_d / 2.0
    top = thickness + hub_h
    body = _revolve([(rb, 0.0), (ro, 0.0), (ro, thickness), (rh, thickness), (rh, top), (rb, top)], segments)
    hole = mf.Manifold.cylinder(thickness + 2.0, hole_d / 2.0, -1.0, 24).translate((0.0, 0.0, -1.0))
    r = bolt_circle_d / 2.0
    angles = [2.0 * math.pi * k / holes for k in range(holes)]
    cutters = [hole.translate((r * math.cos(a), r * math.sin(a), 0.0)) for a in angles]
    return to_trimesh(body - mf.Manifold.batch_boolean(cutters, mf.OpType.Add))


def stepped_shaft(
    diameters: Sequence[float] = (16.0, 20.0, 16.0), lengths: Sequence[float] = (20.0, 30.0, 25.0),
    keyway_width: float = 5.0, keyway_depth: float = 3.0, chamfer: float = 0.8, segments: int = 48,
) -> trimesh.Trimesh:
    """Shaft of coaxial steps along +z with end chamfers and a closed keyway in the widest step.

    The keyway is a round-ended slot cut from the +x side, 70 % of the step's length long.

    Parameters
    ----------
    diameters, lengths : one entry per step, from z = 0 upward (2 to 6 steps)
    keyway_width, keyway_depth : keyway section (common practice: width ~ d/4, depth ~ 0.15 d)
    chamfer : 45 degree chamfer at both shaft ends
    """
    f = "stepped_shaft"
    if not isinstance(diameters, (list, tuple)) or not isinstance(lengths, (list, tuple)) or len(diameters) != len(lengths):
        raise InputError(
            f"{f}: diameters and lengths should be lists of the same length, got {diameters!r} and {lengths!r} instead."
        )
    if not 2 <= len(diameters) <= 6:
        raise InputError(f"{f}: should have 2 to 6 steps, got {len(diameters)} instead.")
    check = Scope(f"{f}: ", InputError, unit="mm")
    diameters = [check.positive(f"diameters[{i}]", d) for i, d in enumerate(diameters)]
    lengths = [check.positive(f"lengths[{i}]", x) for i, x in enumerate(lengths)]
    keyway_width, keyway_depth = check.positive("keyway_width", keyway_width), check.positive("keyway_depth", keyway_depth)
    chamfer = check.positive("chamfer", chamfer)
    segments = check.integer("segments", segments, 16, 512)
    k = max(range(len(diameters)), key=lambda i: (diameters[i], -i))
    dk, lk = diameters[k], lengths[k]
    check.less_than("keyway_width", keyway_width, "0.5 * widest diameter", 0.5 * dk)
    check.less_than("keyway_depth", keyway_depth, "0.3 * widest diameter", 0.3 * dk)
    check.less_than("keyway_width", keyway_width, "0.7 * widest step length", 0.7 * lk)
    check.less_than("chamfer", chamfer, "0.4 * end diameters", 0.4 * min(diameters[0], diameters[-1]))
    pts, z = [(0.0, 0.0)], 0.0
    for i, (d, length) in enumerate(zip(diameters, lengths)):
        r = d / 2.0
        if i == 0:
            pts += [(r - chamfer, 0.0), (r, chamfer)]
        else:
            pts += [(r, z)]
        z += length
        pts += [(r, z - chamfer), (r - chamfer, z)] if i == len(diameters) - 1 else [(r, z)]
    pts += [(0.0, z)]
    body = _revolve(pts, segments)
    z0 = sum(lengths[:k])
    slot_len = 0.7 * lk
    w = keyway_width
    slot = mf.CrossSection.circle(w / 2.0, 24) + mf.CrossSection.circle(w / 2.0, 24).translate((slot_len - w, 0.0))
    slot = slot.hull()  # (x along the axis, y across), long axis along section x
    cut = mf.Manifold.extrude(slot, keyway_depth + 1.0).rotate((0.0, 90.0, 0.0))  # depth along +x
    # after the rotation the section x runs along -z; place the slot centred on the step
    cut = cut.translate((dk / 2.0 - keyway_depth, 0.0, z0 + lk / 2.0 + (slot_len - w) / 2.0))
    return to_trimesh(body - cut)


def v_pulley(
    outer_d: float = 60.0, bore_d: float = 14.0, grooves: int = 1, groove_top_w: float = 10.0,
    groove_depth: float = 9.0, groove_deg: float = 38.0, hub_d: float = 30.0, hub_h: float = 8.0,
    segments: int = 64,
) -> trimesh.Trimesh:
    """V-belt pulley: rim with ``grooves`` V grooves, web, hub on one side, plain bore; axis +z.

    Parameters
    ----------
    outer_d : rim outside diameter
    bore_d : bore
    grooves : number of grooves (1 to 4)
    groove_top_w, groove_depth, groove_deg : groove width at the rim, depth and included angle
        (38 degrees: common practice for narrow V belts on mid-size pulleys)
    hub_d, hub_h : hub diameter and its projection beyond the rim
    """
    f = "v_pulley"
    check = Scope(f"{f}: ", InputError, unit="mm")
    outer_d, bore_d = check.positive("outer_d", outer_d), check.positive("bore_d", bore_d)
    grooves = check.integer("grooves", grooves, 1, 4)
    groove_top_w, groove_depth = check.positive("groove_top_w", groove_top_w), check.positive("groove_depth", groove_depth)
    groove_deg = check.positive("groove_deg", groove_deg)
    hub_d, hub_h = check.positive("hub_d", hub_d), check.positive("hub_h", hub_h)
    segments = check.integer("segments", segments, 16, 512)
    check.less_than("bore_d", bore_d, "hub_d", hub_d)
    check.less_than("hub_d", hub_d, "outer_d - 3 * groove_depth - 2", outer_d - 3.0 * groove_depth - 2.0)  # hub inside the rim
    bottom_w = groove_top_w - 2.0 * groove_depth * math.tan(math.radians(groove_deg / 2.0))
    if bottom_w <= 0.1:
        raise InputError(
            f"{f}: groove bottom width should be > 0.1 mm, got {bottom_w:.3g} mm (groove too deep for its width) instead."
        )
    land = 0.3 * groove_top_w + 1.0
    rim_w = grooves * groove_top_w + (grooves + 1) * land
    ro, rg = outer_d / 2.0, outer_d / 2.0 - groove_depth
    r_rim_in = rg - 0.5 * groove_depth - 1.0
    web = 0.3 * rim_w + 1.0
    rb, rh = bore_d / 2.0, hub_d / 2.0
    zw0 = (rim_w - web) / 2.0
    # outline CCW: bore bottom, hub, web, rim (grooves on the outside), back down
    pts = [(rb, -hub_h), (rh, -hub_h), (rh, zw0), (r_rim_in, zw0), (r_rim_in, 0.0), (ro, 0.0)]
    z = 0.0
    for _ in range(grooves):
        z += land
        flank = (groove_top_w - bottom_w) / 2.0
        pts += [(ro, z), (rg, z + flank), (rg, z + flank + bottom_w), (ro, z + groove_top_w)]
        z += groove_top_w
    pts += [(ro, rim_w), (r_rim_in, rim_w), (r_rim_in, zw0 + web), (rh, zw0 + web), (rh, rim_w), (rb, rim_w)]
    return to_trimesh(_revolve(pts, segments).translate((0.0, 0.0, hub_h)))


def bushing(
    outer_d: float = 16.0, inner_d: float = 10.0, length: float = 20.0, flange_d: float = 0.0,
    flange_t: float = 0.0, segments: int = 64,
) -> trimesh.Trimesh:
    """Plain (``flange_d = 0``) or flanged bushing / spacer tube, axis +z, z in [0, length].

    Parameters
    ----------
    outer_d, inner_d, length : tube
    flange_d, flange_t : collar at z = 0; both 0 for a plain spacer
    """
    f = "bushing"
    check = Scope(f"{f}: ", InputError, unit="mm")
    outer_d, inner_d = check.positive("outer_d", outer_d), check.positive("inner_d", inner_d)
    length = check.positive("length", length)
    flange_d, flange_t = check.number("flange_d", flange_d, low=0.0, unit=""), check.number("flange_t", flange_t, low=0.0, unit="")
    segments = check.integer("segments", segments, 12, 1024)
    check.less_than("inner_d", inner_d, "outer_d", outer_d)
    ri, ro = inner_d / 2.0, outer_d / 2.0
    if flange_d == 0.0 and flange_t == 0.0:
        pts = [(ri, 0.0), (ro, 0.0), (ro, length), (ri, length)]
    else:
        check.less_than("outer_d", outer_d, "flange_d", flange_d)
        check.less_than("flange_t", flange_t, "length", length)
        if flange_t <= 0:
            raise InputError(f"{f}: flange_t should be > 0 mm with a flange, got {flange_t:g} instead.")
        pts = [(ri, 0.0), (flange_d / 2.0, 0.0), (flange_d / 2.0, flange_t), (ro, flange_t), (ro, length), (ri, length)]
    return to_trimesh(_revolve(pts, segments))
