"""Involute spur and helical gears on the ISO 53 basic rack (20 degrees, addendum m,
dedendum 1.25 m) with ISO 54 modules.

The transverse tooth is bounded by two involutes of the base circle, a tip arc and a root arc.
Where the root circle lies inside the base circle the flank continues as a radial line down to
the root (an approximation of the generated trochoid fillet). A helical gear is the transverse
profile extruded with a twist: its teeth follow right-hand helices when the twist is
counter-clockwise seen from +z (positive angle).
"""

from __future__ import annotations

import math

import manifold3d as mf
import numpy as np
import trimesh

from shapes.errors import InputError
from shapes._checks import Scope
from shapes.parts._mesh import to_trimesh, with_hand
from shapes.parts._standards import GEAR_MODULES_ISO54

__all__ = ["gear_profile", "spur_gear", "helical_gear"]

_PRESSURE_DEG = 20.0  # ISO 53 basic rack


def _inv(alpha: np.ndarray) -> np.ndarray:
    return np.tan(alpha) - alpha


def gear_profile(
    module: float, teeth: int, pressure_deg: float = _PRESSURE_DEG, addendum: float | None = None,
    dedendum: float | None = None, flank_points: int = 5, tip_points: int = 3, root_points: int = 4,
) -> np.ndarray:
    """Closed counter-clockwise outline of a gear in its transverse plane.

    Parameters
    ----------
    module : transverse module m (pitch diameter d = m z)
    teeth : tooth count z
    addendum, dedendum : default m and 1.25 m (ISO 53)

    Returns
    -------
    outline : (teeth * points_per_tooth, 2) float, tooth 0 centred on +x
    """
    addendum = module if addendum is None else addendum
    dedendum = 1.25 * module if dedendum is None else dedendum
    alpha = math.radians(pressure_deg)
    rp = module * teeth / 2.0
    rb, ra, rf = rp * math.cos(alpha), rp + addendum, rp - dedendum
    half_pitch = math.pi / (2.0 * teeth)  # half tooth thickness at the pitch circle, as an angle

    def half_angle(r: np.ndarray) -> np.ndarray:
        ar = np.arccos(np.clip(rb / r, -1.0, 1.0))
        return half_pitch + _inv(alpha) - _inv(ar)

    r_lo = max(rb, rf)
    radii = np.linspace(r_lo, ra, flank_points)
    psi = half_angle(radii)
    if psi[-1] <= 0:
        raise InputError(f"gear with {teeth} teeth: tooth tip should have positive thickness, got a pointed tooth instead.")
    if rf < rb:  # radial line from the base circle down to the root circle
        radii = np.concatenate([[rf], radii])
        psi = np.concatenate([[psi[0]], psi])
    # one tooth, counter-clockwise: right flank (angle -psi) up, tip arc, left flank down
    right = np.stack([radii, -psi], axis=1)
    tip = np.stack([np.full(tip_points, ra), np.linspace(-psi[-1], psi[-1], tip_points + 2)[1:-1]], axis=1)
    left = right[::-1] * np.array([1.0, -1.0])
    gap = 2.0 * math.pi / teeth - 2.0 * psi[0]  # root arc to the next tooth's right flank
    root = np.stack([np.full(root_points, rf), psi[0] + gap * np.arange(1, root_points + 1) / (root_points + 1)], axis=1)
    tooth = np.concatenate([right, tip, left, root])  # (P, 2) as (r, angle)
    out = []
    for k in range(teeth):
        a = tooth[:, 1] + 2.0 * math.pi * k / teeth
        out.append(np.stack([tooth[:, 0] * np.cos(a), tooth[:, 0] * np.sin(a)], axis=1))
    return np.concatenate(out)  # (teeth * P, 2)


def _circle(r: float, n: int) -> np.ndarray:
    t = 2.0 * math.pi * np.arange(n) / n
    return np.stack([r * np.cos(t), r * np.sin(t)], axis=1)


def _gear_section(outline: np.ndarray, bore_d: float) -> mf.CrossSection:
    hole = _circle(bore_d / 2.0, 48)[::-1]  # clockwise: a hole under the positive fill rule
    return mf.CrossSection([outline, hole], mf.FillRule.Positive)


def _check_gear(family: str, module, teeth, face_width, bore_d, root_d_of) -> tuple[float, int, float, float]:
    check = Scope(f"{family}: ", InputError, unit="mm")
    module = float(check.choice("module (ISO 54)", module, GEAR_MODULES_ISO54))
    teeth = check.integer("teeth", teeth, 12, 200)
    face_width = check.positive("face_width", face_width)
    bore_d = check.positive("bore_d", bore_d)
    check.less_than("bore_d", bore_d, "0.8 * root diameter", 0.8 * root_d_of(module, teeth))
    return module, teeth, face_width, bore_d


def spur_gear(module: float = 2.0, teeth: int = 24, face_width: float = 12.0, bore_d: float = 12.0) -> trimesh.Trimesh:
    """ISO 53 spur gear, axis +z, z in [0, face_width].

    Tip diameter d + 2m, root diameter d - 2.5m, pitch diameter d = m z.

    Parameters
    ----------
    module : ISO 54 module m
    teeth : tooth count z
    face_width : axial width
    bore_d : plain bore diameter
    """
    module, teeth, face_width, bore_d = _check_gear(
        "spur_gear", module, teeth, face_width, bore_d, lambda m, z: m * z - 2.5 * m
    )
    section = _gear_section(gear_profile(module, teeth), bore_d)
    return to_trimesh(mf.Manifold.extrude(section, face_width))


def helical_gear(
    module: float = 2.0, teeth: int = 20, helix_deg: float = 20.0, face_width: float = 12.0,
    bore_d: float = 10.0, hand: str = "right",
) -> trimesh.Trimesh:
    """Helical gear on the ISO 53 rack in the normal plane, axis +z, z in [0, face_width].

    With normal module m_n and helix angle beta the transverse module is m_n / cos(beta), the
    transverse pressure angle atan(tan 20 deg / cos beta), the pitch diameter z m_n / cos(beta)
    and the tip diameter d + 2 m_n. The profile turns by face_width * tan(beta) / r_pitch over
    the width, counter-clockwise (seen from +z) for a right-hand gear.

    Parameters
    ----------
    module : ISO 54 normal module m_n
    teeth : tooth count z
    helix_deg : helix angle beta at the pitch circle, (0, 45] degrees
    face_width : axial width
    bore_d : plain bore diameter
    hand : ``"right"`` or ``"left"`` (the exact mirror image)
    """
    check = Scope("helical_gear: ", InputError, unit="mm")
    helix_deg = check.positive("helix_deg", helix_deg)
    if helix_deg > 45.0:
        raise InputError(f"helical_gear: helix_deg should be in (0, 45], got {helix_deg:g} instead.")
    check.choice("hand", hand, ("right", "left"))
    cos_b = math.cos(math.radians(helix_deg))
    module, teeth, face_width, bore_d = _check_gear(
        "helical_gear", module, teeth, face_width, bore_d, lambda m, z: m * z / cos_b - 2.5 * m
    )
    m_t = module / cos_b
    alpha_t = math.degrees(math.atan(math.tan(math.radians(_PRESSURE_DEG)) / cos_b))
    outline = gear_profile(
        m_t, teeth, alpha_t, addendum=module, dedendum=1.25 * module, flank_points=4, tip_points=2, root_points=3
    )
    r_pitch = m_t * teeth / 2.0
    twist = math.degrees(face_width * math.tan(math.radians(helix_deg)) / r_pitch)
    divisions = max(1, math.ceil(twist / 5.0)) - 1  # <= 5 degrees between slices: chord sag < 1e-3 r
    solid = mf.Manifold.extrude(_gear_section(outline, bore_d), face_width, divisions, twist)
    return with_hand(to_trimesh(solid), hand)
