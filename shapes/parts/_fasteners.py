"""Hex nuts (ISO 4032) and plain washers (ISO 7089, chamfered version ISO 7090).

The nut has a plain bore at the minor diameter of its internal thread, D1 = D - 1.0825 P
(ISO 68-1: D1 = D - 2 * 5H/8); the thread itself is not modelled.
"""

from __future__ import annotations

import math

import manifold3d as mf
import trimesh

from shapes.errors import InputError
from shapes._checks import Scope
from shapes.parts._mesh import to_trimesh
from shapes.parts._standards import COARSE_PITCH_ISO261, HEX_NUT_ISO4032, WASHER_CHAMFER_ISO7090, WASHER_ISO7089

__all__ = ["hex_nut", "plain_washer", "hex_prism", "minor_diameter"]

# 30 degrees between the bearing-face chamfer cone and the face: common practice for hex nuts.
_CHAMFER_DEG = 30.0


def minor_diameter(d: float, pitch: float) -> float:
    """Basic minor diameter of an ISO metric thread: d - 2 * (5/8) H with H = (sqrt 3 / 2) P."""
    return d - 2.0 * (5.0 / 8.0) * (math.sqrt(3.0) / 2.0) * pitch


def hex_prism(across_flats: float, height: float) -> mf.Manifold:
    """Hexagonal prism on z in [0, height]; the flats face +-x (corners on +-y)."""
    r = across_flats / math.sqrt(3.0)  # circumradius = e / 2
    pts = [(r * math.cos(math.radians(30 + 60 * k)), r * math.sin(math.radians(30 + 60 * k))) for k in range(6)]
    return mf.Manifold.extrude(mf.CrossSection([pts]), height)


def _chamfer_cutter(across_flats: float, height: float, bottom: bool, top: bool, segments: int) -> mf.Manifold:
    """Solid of revolution whose intersection with the prism gives the bearing-face chamfers."""
    rc = 0.475 * across_flats  # chamfer starts just inside the flats (common practice ~0.95 s)
    rout = across_flats / math.sqrt(3.0) + 0.5
    rise = (rout - rc) * math.tan(math.radians(_CHAMFER_DEG))
    z0, z1 = -0.01, height + 0.01
    pts = [(0.0, z0)]
    pts += [(rc, z0), (rout, z0 + rise)] if bottom else [(rout, z0)]
    pts += [(rout, z1 - rise), (rc, z1)] if top else [(rout, z1)]
    pts += [(0.0, z1)]
    # Turned by half a facet so no seam of the cone falls on a hexagon corner: exactly
    # coincident edges would leave zero-area faces in the boolean result.
    return mf.Manifold.revolve(mf.CrossSection([pts]), segments).rotate((0.0, 0.0, 180.0 / segments))


def hex_nut(size: str = "M8", chamfer: str = "both", segments: int = 48) -> trimesh.Trimesh:
    """ISO 4032 regular hex nut, axis along +z, bottom face at z = 0, flats facing +-x.

    Parameters
    ----------
    size : one of ``HEX_NUT_ISO4032`` (``"M5"`` .. ``"M16"``)
    chamfer : ``"both"``, ``"one"`` (bottom face only) or ``"none"``: the 30 degree bearing-face chamfer
    segments : facets of the bore circle
    """
    check = Scope("hex_nut: ", InputError, unit="mm")
    check.choice("size", size, HEX_NUT_ISO4032)
    check.choice("chamfer", chamfer, ("both", "one", "none"))
    segments = check.integer("segments", segments, 12, 512)
    s, m = HEX_NUT_ISO4032[size]["s"], HEX_NUT_ISO4032[size]["m"]
    thread = COARSE_PITCH_ISO261[size]
    body = hex_prism(s, m)
    if chamfer != "none":
        body = body ^ _chamfer_cutter(s, m, True, chamfer == "both", 4 * segments)
    bore = mf.Manifold.cylinder(m + 2.0, minor_diameter(thread["d"], thread["P"]) / 2.0, -1.0, segments).translate((0, 0, -1.0))
    return to_trimesh(body - bore)


def plain_washer(size: str = "M8", chamfered: bool = False, segments: int = 96) -> trimesh.Trimesh:
    """ISO 7089 plain washer, or its chamfered version ISO 7090: annulus d1..d2, thickness h on z in [0, h].

    The ISO 7090 chamfer is on the outside edge of the top face, 30 degrees to the face, leaving
    3h/8 of the rim square (``WASHER_CHAMFER_ISO7090``).

    Parameters
    ----------
    size : one of ``WASHER_ISO7089`` (``"M4"`` .. ``"M16"``; ISO 7090 starts at M5)
    chamfered : ISO 7090 (True) or the flat ISO 7089 washer (False)
    segments : facets of each circle (vertices lie on the true circles)
    """
    check = Scope("plain_washer: ", InputError, unit="mm")
    check.choice("size", size, WASHER_ISO7089)
    chamfered = check.boolean("chamfered", chamfered)
    segments = check.integer("segments", segments, 12, 1024)
    dims = WASHER_ISO7089[size]
    r1, r2, h = dims["d1"] / 2.0, dims["d2"] / 2.0, dims["h"]
    if not chamfered:
        outline = [(r1, 0.0), (r2, 0.0), (r2, h), (r1, h)]
    else:
        sizes = list(WASHER_ISO7089)
        if sizes.index(size) < sizes.index(WASHER_CHAMFER_ISO7090["from"]):
            raise InputError(
                f"plain_washer: chamfered (ISO 7090) size should be {WASHER_CHAMFER_ISO7090['from']} or larger, got {size} instead."
            )
        rim = WASHER_CHAMFER_ISO7090["rim"] * h
        run = (h - rim) / math.tan(math.radians(WASHER_CHAMFER_ISO7090["deg"]))  # radial width of the chamfer
        outline = [(r1, 0.0), (r2, 0.0), (r2, rim), (r2 - run, h), (r1, h)]
    return to_trimesh(mf.Manifold.revolve(mf.CrossSection([outline]), segments))
