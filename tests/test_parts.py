"""Part generators: dimensions against published standards, closed solids, closed-form volumes,
helix handedness, bad parameters. Twin detection is in test_parts_twins.py, the written catalog
in test_parts_catalog.py."""

from __future__ import annotations

import io
import math

import numpy as np
import pytest
import trimesh

from shapes.errors import ConfigError, InputError, ShapesError
from shapes.parts import FAMILIES, HANDED_FAMILIES, build_part, demo_catalog_spec, mirror_mesh
from shapes.parts._ply import ply_bytes
from shapes.parts._standards import CLEARANCE_HOLE_ISO273, VBELT_GROOVE_ISO4183

SQRT3 = math.sqrt(3.0)


def radius_xy(mesh: trimesh.Trimesh) -> np.ndarray:
    return np.linalg.norm(mesh.vertices[:, :2], axis=1)


def polygon_factor(n: int) -> float:
    """Area of a regular n-gon inscribed in a unit circle over the circle's area: sin(2 pi/n) n / (2 pi)."""
    # reference: area of a regular polygon, (n/2) r^2 sin(2 pi / n)
    return n * math.sin(2.0 * math.pi / n) / (2.0 * math.pi)


def tooth_thickness_at(mesh: trimesh.Trimesh, teeth: int, radius: float, z: float) -> np.ndarray:
    """Arc thickness of each tooth at ``radius`` on the section of a gear (axis +z, tooth 0 on +x) at height ``z``.

    The section's edges are cut with the circle of that radius; each crossing belongs to the tooth whose
    centre (angle 2 pi k / teeth) is nearest, and a tooth's thickness is the arc between its two crossings.
    """
    segments = trimesh.intersections.mesh_plane(mesh, [0.0, 0.0, 1.0], [0.0, 0.0, z])[:, :, :2]  # (n, 2, 2)
    a, step = segments[:, 0], segments[:, 1] - segments[:, 0]
    # |a + t step| = radius for t in [0, 1]: a quadratic in t
    qa, qb, qc = (step * step).sum(1), 2.0 * (a * step).sum(1), (a * a).sum(1) - radius * radius
    disc = qb * qb - 4.0 * qa * qc
    angles = []
    for root in (-1.0, 1.0):
        t = (-qb + root * np.sqrt(np.clip(disc, 0.0, None))) / (2.0 * qa)
        hit = (disc >= 0.0) & (t >= 0.0) & (t <= 1.0)
        p = a[hit] + t[hit, None] * step[hit]
        angles.append(np.arctan2(p[:, 1], p[:, 0]))
    angles = np.unique(np.round(np.concatenate(angles), 10))  # a crossing at a shared vertex counts once
    pitch_angle = 2.0 * math.pi / teeth
    tooth = np.round(angles / pitch_angle)
    offset = angles - tooth * pitch_angle  # angle from the nearest tooth centre
    tooth = tooth.astype(int) % teeth
    assert np.bincount(tooth, minlength=teeth).tolist() == [2] * teeth, "two flank crossings per tooth"
    return np.array([radius * np.ptp(offset[tooth == k]) for k in range(teeth)])


def helicity(mesh: trimesh.Trimesh) -> float:
    """Area-weighted mean of n_theta * n_z over the surface, a pseudo-scalar.

    For a surface swept along a right-hand helix (r cos t, r sin t, p t / 2 pi) the tangent has
    positive azimuthal and axial parts, and normals are perpendicular to it, so n_theta n_z <= 0.
    A mirror x -> -x flips n_theta, so the sign flips; a part with a mirror plane gives 0.
    """
    c = mesh.triangles_center
    n = mesh.face_normals
    theta_hat = np.stack([-c[:, 1], c[:, 0], np.zeros(len(c))], axis=1)
    theta_hat /= np.linalg.norm(theta_hat, axis=1, keepdims=True) + 1e-12
    n_theta = (n * theta_hat).sum(1)
    return float((mesh.area_faces * n_theta * n[:, 2]).sum() / mesh.area)


# ---------------------------------------------------------------- every family is one closed solid


@pytest.mark.parametrize("family", sorted(FAMILIES))
def test_default_part_is_one_closed_solid(family):
    mesh = build_part(family)
    # reference: trimesh's own watertight / winding / volume checks
    assert mesh.is_watertight and mesh.is_winding_consistent
    assert mesh.volume > 0 and mesh.body_count == 1
    # the bytes we write read back as the same closed solid through a standard PLY reader
    back = trimesh.load(io.BytesIO(ply_bytes(mesh)), file_type="ply", process=True)
    assert back.is_watertight and back.is_winding_consistent
    assert back.volume == pytest.approx(mesh.volume, rel=1e-6)
    assert len(back.faces) == len(mesh.faces)


@pytest.mark.parametrize("family", sorted(HANDED_FAMILIES))
def test_left_hand_is_exact_mirror_with_outward_winding(family):
    right = build_part(family, hand="right")
    left = build_part(family, hand="left")
    # the mirror x -> -x applied to every vertex, same index order
    np.testing.assert_array_equal(left.vertices, right.vertices * np.array([-1.0, 1.0, 1.0]))
    np.testing.assert_array_equal(left.faces, right.faces[:, ::-1])
    assert left.volume == pytest.approx(right.volume, rel=1e-12) and left.volume > 0
    assert left.is_winding_consistent and left.is_watertight


def test_mirror_mesh_of_mirror_is_identity_and_keeps_volume():
    mesh = build_part("angle_bracket")
    twice = mirror_mesh(mirror_mesh(mesh))
    np.testing.assert_array_equal(twice.vertices, mesh.vertices)
    np.testing.assert_array_equal(twice.faces, mesh.faces)
    assert mirror_mesh(mesh).volume == pytest.approx(mesh.volume)


def test_same_parameters_give_identical_bytes():
    params = {"size": "M8", "length": 40.0, "thread_length": 12.0}
    assert ply_bytes(build_part("threaded_stud", **params)) == ply_bytes(build_part("threaded_stud", **params))


# ---------------------------------------------------------------- ISO 4032 hex nuts

NUTS = [  # source: ISO 4032, table of dimensions: s across flats, m height, e_min across corners (grade A);
    # pitch from ISO 261, table of diameter/pitch combinations (coarse)
    ("M6", 10.0, 5.2, 11.05, 6.0, 1.0),
    ("M8", 13.0, 6.8, 14.38, 8.0, 1.25),
    ("M10", 16.0, 8.4, 17.77, 10.0, 1.5),
    # from memory (ISO 4032 and ISO 261); e_min is re-checked by the hexagon
    # itself: e = 2 s / sqrt 3 must exceed it
    ("M5", 8.0, 4.7, 8.79, 5.0, 0.8),
    ("M12", 18.0, 10.8, 20.03, 12.0, 1.75),
    ("M14", 21.0, 12.8, 23.36, 14.0, 2.0),
    ("M16", 24.0, 14.8, 26.75, 16.0, 2.0),
]


@pytest.mark.parametrize("size,s,m,e_min,d,pitch", NUTS)
def test_hex_nut_dimensions(size, s, m, e_min, d, pitch):
    mesh = build_part("hex_nut", size=size, chamfer="both")
    v = mesh.vertices
    for k in range(3):  # extent along each of the three flat normals (0, 60, 120 degrees)
        normal = np.array([math.cos(math.radians(60 * k)), math.sin(math.radians(60 * k)), 0.0])
        assert np.ptp(v @ normal) == pytest.approx(s, abs=1e-4)
    assert np.ptp(v[:, 2]) == pytest.approx(m, abs=1e-4)
    assert 2.0 * radius_xy(mesh).max() >= e_min  # across corners
    # source: ISO 68-1, D1 = D - 2 * 5H/8 with H = (sqrt 3 / 2) P: the plain bore is the minor diameter
    d1 = d - 2.0 * 5.0 / 8.0 * SQRT3 / 2.0 * pitch
    assert 2.0 * radius_xy(mesh).min() == pytest.approx(d1, abs=1e-4)


@pytest.mark.parametrize("segments", [24, 48, 96])
def test_hex_nut_volume_is_hexagon_minus_bore(segments):
    mesh = build_part("hex_nut", size="M8", chamfer="none", segments=segments)
    s, m, d1 = 13.0, 6.8, 8.0 - 1.25 * 5.0 / 8.0 * SQRT3  # source: ISO 4032 M8; ISO 68-1 D1
    hexagon = SQRT3 / 2.0 * s**2  # reference: regular hexagon area from across-flats s
    circle = math.pi * d1**2 / 4.0
    exact_circle = (hexagon - circle) * m
    # The bore is an inscribed n-gon: it removes less than the circle by (1 - polygon_factor) of
    # its area, so the solid is larger than the circular closed form by exactly that much.
    facet = circle * (1.0 - polygon_factor(segments)) * m
    assert mesh.volume == pytest.approx(exact_circle + facet, rel=1e-5)
    assert abs(mesh.volume - exact_circle) <= facet * 1.001
    chamfered = build_part("hex_nut", size="M8", chamfer="both", segments=segments)
    assert 0.9 * mesh.volume < chamfered.volume < mesh.volume  # chamfers only remove corners


# ---------------------------------------------------------------- ISO 7089 washers, bushings

WASHERS = [  # source: ISO 7089, table of dimensions (normal series): d1 / d2 / h
    ("M6", 6.4, 12.0, 1.6),
    ("M8", 8.4, 16.0, 1.6),
    ("M10", 10.5, 20.0, 2.0),
    ("M5", 5.3, 10.0, 1.0),  # from memory (ISO 7089)
    ("M12", 13.0, 24.0, 2.5),  # from memory (ISO 7089)
    ("M14", 15.0, 28.0, 2.5),  # from memory (ISO 7089)
    ("M16", 17.0, 30.0, 3.0),  # from memory (ISO 7089)
]


@pytest.mark.parametrize("size,d1,d2,h", WASHERS)
@pytest.mark.parametrize("segments", [32, 96])
def test_washer_dimensions_and_volume(size, d1, d2, h, segments):
    mesh = build_part("plain_washer", size=size, segments=segments)
    r = radius_xy(mesh)
    assert 2.0 * r.min() == pytest.approx(d1, abs=1e-4)
    assert 2.0 * r.max() == pytest.approx(d2, abs=1e-4)
    assert np.ptp(mesh.vertices[:, 2]) == pytest.approx(h, abs=1e-5)
    closed = math.pi / 4.0 * (d2**2 - d1**2) * h  # reference: annulus volume
    # vertices sit on the circles, so faceting loses exactly (1 - polygon_factor) of the area
    deficit = 1.0 - polygon_factor(segments)
    assert mesh.volume == pytest.approx(closed * (1.0 - deficit), rel=1e-5)
    assert closed * (1.0 - 1.001 * deficit) <= mesh.volume <= closed


@pytest.mark.parametrize("size,d1,d2,h", WASHERS)
def test_chamfered_washer_profile_and_volume(size, d1, d2, h):
    n = 96
    mesh = build_part("plain_washer", size=size, chamfered=True, segments=n)
    rim = 3.0 / 8.0 * h  # from memory (ISO 7090): h/4 to h/2 of the rim stays square; we take the middle
    run = (h - rim) / math.tan(math.radians(30.0))  # from memory (ISO 7090): chamfer 30 degrees to the face
    r, z = radius_xy(mesh), mesh.vertices[:, 2]
    assert 2.0 * r.min() == pytest.approx(d1, abs=1e-4) and 2.0 * r.max() == pytest.approx(d2, abs=1e-4)
    assert np.ptp(z) == pytest.approx(h, abs=1e-5)
    assert r[np.abs(z - h) < 1e-6].max() == pytest.approx(d2 / 2.0 - run, abs=1e-4)  # top face ends where the chamfer starts
    assert z[np.abs(r - d2 / 2.0) < 1e-4].max() == pytest.approx(rim, abs=1e-5)
    # reference: Pappus, volume = 2 pi * (area of the profile) * (radius of its centroid); the
    # faceted solid keeps polygon_factor of it as every slice is an inscribed n-gon
    prof = np.array([(d1 / 2, 0.0), (d2 / 2, 0.0), (d2 / 2, rim), (d2 / 2 - run, h), (d1 / 2, h)])
    x, y = prof[:, 0], prof[:, 1]
    cross = x * np.roll(y, -1) - np.roll(x, -1) * y
    area = cross.sum() / 2.0  # reference: shoelace formula
    x_c = ((x + np.roll(x, -1)) * cross).sum() / (6.0 * area)
    assert mesh.volume == pytest.approx(2.0 * math.pi * area * x_c * polygon_factor(n), rel=1e-5)
    flat = build_part("plain_washer", size=size, segments=n)
    assert mesh.volume < flat.volume


def test_bushing_volume_plain_and_flanged():
    n = 64
    plain = build_part("bushing", outer_d=16.0, inner_d=10.0, length=20.0, segments=n)
    closed = math.pi / 4.0 * (16.0**2 - 10.0**2) * 20.0  # reference: tube volume
    assert plain.volume == pytest.approx(closed * polygon_factor(n), rel=1e-5)
    flanged = build_part("bushing", outer_d=16.0, inner_d=10.0, length=20.0, flange_d=24.0, flange_t=3.0, segments=n)
    collar = math.pi / 4.0 * (24.0**2 - 16.0**2) * 3.0  # reference: annulus volume of the collar
    assert flanged.volume == pytest.approx((closed + collar) * polygon_factor(n), rel=1e-5)


# ---------------------------------------------------------------- ISO 15 bearings

BEARINGS = [  # source: ISO 15, boundary dimensions of diameter series 0 and 2: bore / OD / width
    ("6000", 10.0, 26.0, 8.0),
    ("6001", 12.0, 28.0, 8.0),
    ("6202", 15.0, 35.0, 11.0),
    ("6203", 17.0, 40.0, 12.0),
    ("6205", 25.0, 52.0, 15.0),
]


@pytest.mark.parametrize("designation,d,D,B", BEARINGS)
@pytest.mark.parametrize("sealed", [False, True])
def test_bearing_boundary_dimensions(designation, d, D, B, sealed):
    mesh = build_part("ball_bearing", designation=designation, sealed=sealed)
    r = radius_xy(mesh)
    assert 2.0 * r.min() == pytest.approx(d, abs=1e-4)
    assert 2.0 * r.max() == pytest.approx(D, abs=1e-4)
    assert np.ptp(mesh.vertices[:, 2]) == pytest.approx(B, abs=1e-4)
    assert mesh.body_count == 1  # balls fused into the rings: one solid


# ---------------------------------------------------------------- ISO 53 / 54 gears


def _inv(a):
    return math.tan(a) - a  # reference: involute function inv(alpha) = tan(alpha) - alpha


@pytest.mark.parametrize("module,teeth", [(1.0, 23), (1.5, 30), (2.0, 18), (3.0, 40)])
def test_spur_gear_tip_root_teeth_and_involute(module, teeth):
    width = 10.0
    mesh = build_part("spur_gear", module=module, teeth=teeth, face_width=width, bore_d=0.3 * module * teeth)
    d = module * teeth
    r = radius_xy(mesh)
    # source: ISO 53 basic rack: tip d + 2m, root d - 2.5m
    assert 2.0 * r.max() == pytest.approx(d + 2.0 * module, abs=1e-4)
    outline = r > 0.3 * d / 2.0 + 1e-3
    assert 2.0 * r[outline].min() == pytest.approx(d - 2.5 * module, abs=1e-4)
    # tooth count: maxima of the radius profile around the top face
    top = mesh.vertices[(np.abs(mesh.vertices[:, 2] - width) < 1e-6) & (r > d / 2.0 + 0.5 * module)]
    ang = np.sort(np.arctan2(top[:, 1], top[:, 0]))
    gaps = np.diff(np.concatenate([ang, [ang[0] + 2.0 * math.pi]]))
    assert int((gaps > math.pi / teeth).sum()) == teeth
    # flank points lie on the involute: half tooth angle psi(r) = pi/(2z) + inv(20 deg) - inv(acos(rb/r))
    alpha = math.radians(20.0)  # source: ISO 53 pressure angle
    rb = d / 2.0 * math.cos(alpha)
    pts = mesh.vertices[(r > rb + 1e-3) & (r < d / 2.0 + module - 1e-3) & (np.abs(mesh.vertices[:, 2]) < 1e-6)]
    rr = np.linalg.norm(pts[:, :2], axis=1)
    phi = np.arctan2(pts[:, 1], pts[:, 0])
    rel = np.abs((phi + math.pi / teeth) % (2.0 * math.pi / teeth) - math.pi / teeth)  # angle from tooth centre
    expect = math.pi / (2.0 * teeth) + _inv(alpha) - np.array([_inv(math.acos(rb / x)) for x in rr])
    assert len(pts) >= 4 * teeth
    np.testing.assert_allclose(rel, expect, atol=1e-5)
    # source: ISO 53, the basic rack's tooth thickness on its datum line is half the pitch, pi m / 2; a gear
    # cut by it without profile shift has that arc thickness on its reference (pitch) circle. Measured on a
    # section of the mesh at mid-width: every tooth's arc between its two flanks at r = d/2.
    thickness = tooth_thickness_at(mesh, teeth, d / 2.0, width / 2.0)
    half_pitch = math.pi * module / 2.0
    assert len(thickness) == teeth
    # The flanks are polylines through points on the involute (checked above), and a chord of the
    # convex flank lies inside the tooth: the mesh's tooth is never thicker than the exact one, and
    # with five points per flank at most about 1% thinner (0.3-0.9% for these gears).
    assert (thickness <= half_pitch + 1e-6).all()
    assert (thickness >= half_pitch * (1.0 - 0.015)).all()


@pytest.mark.parametrize("hand,sign", [("right", 1.0), ("left", -1.0)])
def test_helical_gear_tip_diameter_and_hand(hand, sign):
    m_n, z, beta, width = 1.5, 24, 20.0, 12.0
    mesh = build_part("helical_gear", module=m_n, teeth=z, helix_deg=beta, face_width=width, bore_d=10.0, hand=hand)
    # source: ISO 21771 (cylindrical involute gears, geometry): reference diameter d = z m_n / cos(beta);
    # tip diameter d + 2 h_aP with the addendum h_aP = m_n of the ISO 53 basic rack, taken in the normal section
    d = z * m_n / math.cos(math.radians(beta))
    r = radius_xy(mesh)
    assert 2.0 * r.max() == pytest.approx(d + 2.0 * m_n, abs=1e-3)
    # common practice: a right-hand gear's teeth turn counter-clockwise going up, seen from +z.
    # closed form: a helix of angle beta on the reference cylinder (radius d/2) turns by
    # width * tan(beta) / (d/2) over the width, so tip points at the top face are the bottom ones turned by that
    tips = r > d / 2.0 + 0.9 * m_n
    v = mesh.vertices[tips]
    bottom, top = v[np.abs(v[:, 2]) < 1e-6], v[np.abs(v[:, 2] - width) < 1e-6]
    twist = width * math.tan(math.radians(beta)) / (d / 2.0)
    a_b = np.arctan2(bottom[:, 1], bottom[:, 0])
    a_t = np.arctan2(top[:, 1], top[:, 0])
    turned = np.angle(np.exp(1j * (a_b + sign * twist))[:, None] / np.exp(1j * a_t)[None, :])
    assert np.abs(turned).min(axis=1).max() < 2e-4  # every bottom tip lands on a top tip
    assert np.sign(helicity(mesh)) == -sign


# ---------------------------------------------------------------- ISO 68-1 / ISO 261 threads


THREADS = [  # source: ISO 261, table of diameter/pitch combinations: coarse pitch
    ("M6", 6.0, 1.0, 24),
    ("M8", 8.0, 1.25, 24),
    ("M10", 10.0, 1.5, 24),
    ("M5", 5.0, 0.8, 16),  # from memory (ISO 261); 16 columns as in the demo catalog
    ("M12", 12.0, 1.75, 16),  # from memory (ISO 261)
    ("M14", 14.0, 2.0, 16),  # from memory (ISO 261)
    ("M16", 16.0, 2.0, 16),  # from memory (ISO 261)
]


@pytest.mark.parametrize("size,d,pitch,columns", THREADS)
def test_thread_pitch_depth_and_hand(size, d, pitch, columns):
    b = max(10.0, 7.0 * pitch)  # at least 3 whole turns inside the checked zone
    length = 2.0 * b + 20.0
    right = build_part("threaded_stud", size=size, length=length, thread_length=b, hand="right", columns=columns)
    left = build_part("threaded_stud", size=size, length=length, thread_length=b, hand="left", columns=columns)
    h = SQRT3 / 2.0 * pitch  # source: ISO 68-1, H = (sqrt 3 / 2) P
    for mesh, sign in ((right, 1.0), (left, -1.0)):
        v = mesh.vertices
        r = radius_xy(mesh)
        inner = (v[:, 2] > pitch) & (v[:, 2] < b - pitch)  # threaded zone, away from chamfer and shank
        assert r[inner].max() == pytest.approx(d / 2.0, abs=1e-4)  # major diameter
        assert r[inner].min() == pytest.approx(d / 2.0 - 5.0 / 8.0 * h, abs=1e-4)  # depth 5H/8
        for deg in (0.0, 90.0, 180.0, 270.0):
            a = math.radians(deg)
            on_plane = inner & (np.abs(v[:, 0] * math.sin(a) - v[:, 1] * math.cos(a)) < 1e-4)
            on_plane &= (v[:, 0] * math.cos(a) + v[:, 1] * math.sin(a)) > 0
            crest = np.sort(v[on_plane & (r > d / 2.0 - 1e-4), 2])
            # crest flat of width P/8 centred where z = P theta / 2 pi (right hand); the mirror
            # x -> -x sends theta to pi - theta, so the left-hand crest is at z = P/2 - P theta / 2 pi
            centre = pitch * a / (2.0 * math.pi) if sign > 0 else pitch / 2.0 - pitch * a / (2.0 * math.pi)
            offset = np.mod(crest - centre + pitch / 2.0, pitch) - pitch / 2.0
            np.testing.assert_allclose(np.abs(offset), pitch / 16.0, atol=2e-4)
            starts = crest[offset < 0]
            assert len(starts) >= 3
            np.testing.assert_allclose(np.diff(starts), pitch, atol=2e-4)  # source: ISO 261 coarse pitch
        assert np.sign(helicity(mesh)) == -sign


@pytest.mark.parametrize("per_turn", [20, 16])  # the default and the demo catalog's tessellation
@pytest.mark.parametrize("ground", [True, False])
def test_spring_hand_and_size(per_turn, ground):
    kw = dict(wire_d=1.6, mean_d=12.0, coils=6, pitch=4.0, ground=ground, per_turn=per_turn)
    right = build_part("compression_spring", hand="right", **kw)
    left = build_part("compression_spring", hand="left", **kw)
    # source: EN 13906-1 symbols (from memory): mean coil diameter D, wire diameter d, outside diameter
    # D_e = D + d, inside diameter D_i = D - d; closed form too: a round wire of diameter d centred on the
    # circle of diameter D. The inside is looser: the wire's polygonal section cuts the inner corners.
    assert 2.0 * radius_xy(right).max() == pytest.approx(12.0 + 1.6, abs=0.01)  # outside diameter D + d
    assert 2.0 * radius_xy(right).min() == pytest.approx(12.0 - 1.6, abs=0.05)  # inside diameter D - d
    if ground:
        assert right.vertices[:, 2].min() == pytest.approx(0.0, abs=1e-6)  # ground end sits on z = 0
    else:  # the round wire rests on z = 0 (a polygonal section: its lowest vertex a little above)
        assert 0.0 <= right.vertices[:, 2].min() < 0.05 * 1.6
    # common practice: the right hand turns counter-clockwise rising, seen from +z (docs/design.md, "Parity and handedness")
    assert helicity(right) < -0.01 and helicity(left) > 0.01
    for family in ("spur_gear", "hex_nut", "v_pulley", "bolted_flange"):  # achiral parts: no helicity
        assert abs(helicity(build_part(family))) < 1e-3


# ---------------------------------------------------------------- ISO 4183 V-belt grooves, ISO 273 holes

GROOVES = [  # from memory (ISO 4183): width at the rim b1, depth c + t, groove angle
    ("SPZ", 9.7, 2.0 + 9.0, 34.0),
    ("SPA", 12.7, 2.75 + 11.0, 38.0),
]


@pytest.mark.parametrize("section,b1,depth,deg", GROOVES)
def test_pulley_grooves_follow_the_belt_section(section, b1, depth, deg):
    g = VBELT_GROOVE_ISO4183[section]
    assert g["b1"] == b1 and g["c"] + g["t"] == pytest.approx(depth)
    od, hub_h = 150.0, 8.0
    mesh = build_part("v_pulley", outer_d=od, bore_d=20.0, grooves=2, groove_top_w=b1, groove_depth=depth,
                      groove_deg=deg, hub_d=40.0, hub_h=hub_h)
    r, z = radius_xy(mesh), mesh.vertices[:, 2]
    edges = np.unique(np.round(z[np.abs(r - od / 2.0) < 1e-4], 4))  # rim: faces and groove edges
    assert len(edges) == 6 and edges[2] - edges[1] == pytest.approx(b1, abs=1e-3) and edges[4] - edges[3] == pytest.approx(b1, abs=1e-3)
    floor = np.unique(np.round(z[np.abs(r - (od / 2.0 - depth)) < 1e-4], 4))  # groove bottoms
    bottom = b1 - 2.0 * depth * math.tan(math.radians(deg / 2.0))  # reference: trapezoid of included angle deg
    assert len(floor) == 4 and floor[1] - floor[0] == pytest.approx(bottom, abs=1e-3)
    assert floor[0] - edges[1] == pytest.approx((b1 - bottom) / 2.0, abs=1e-3)  # symmetric flanks


def test_catalog_holes_are_iso273_clearance_holes():
    medium = {3.4, 4.5, 5.5, 6.6, 9.0, 11.0, 13.5, 17.5}  # from memory (ISO 273, medium series, M3..M16)
    assert set(CLEARANCE_HOLE_ISO273.values()) == medium
    assert CLEARANCE_HOLE_ISO273["M6"] == 6.6 and CLEARANCE_HOLE_ISO273["M8"] == 9.0  # from memory (ISO 273, medium)
    spec = {c["name"]: c for c in demo_catalog_spec(0)}
    for name in ("bolted_flange", "bracket_right"):
        assert {i["params"]["hole_d"] for i in spec[name]["instances"]} <= medium


# ---------------------------------------------------------------- bad parameters


@pytest.mark.parametrize(
    "family,params,error,words",
    [
        ("no_such_part", {}, ConfigError, ["unknown part family", "'no_such_part'", "hex_nut"]),
        ("hex_nut", {"size": "M7"}, ConfigError, ["size", "'M7'", "M5, M6, M8, M10, M12, M14, M16"]),
        ("plain_washer", {"size": "M4", "chamfered": True}, InputError, ["ISO 7090", "M5", "M4"]),
        ("plain_washer", {"chamfered": "yes"}, InputError, ["chamfered", "true or false", "'yes'"]),
        ("v_pulley", {"outer_d": 60.0, "hub_d": 35.0}, InputError, ["hub_d", "outer_d - 3 * groove_depth - 2", "35"]),
        ("ball_bearing", {"designation": "6999"}, ConfigError, ["designation", "'6999'", "6205"]),
        ("spur_gear", {"module": 1.1}, ConfigError, ["module", "1.1", "1.25"]),
        ("compression_spring", {"wire_d": -1.0}, InputError, ["wire_d", "> 0", "-1"]),
        ("bushing", {"outer_d": 10.0, "inner_d": 12.0}, InputError, ["inner_d", "outer_d", "12"]),
        ("threaded_stud", {"hand": "up"}, ConfigError, ["hand", "'up'", "right, left"]),
        ("threaded_stud", {"length": 10.0, "thread_length": 8.0}, InputError, ["length", "10"]),
        ("angle_bracket", {"leg_base": 40.0, "leg_upright": 40.0}, InputError, ["legs", "differ", "40"]),
        ("bolted_flange", {"holes": 2}, InputError, ["holes", "[3, 16]", "2"]),
        ("hex_nut", {"diameter": 8}, InputError, ["unknown parameter", "diameter", "size"]),
        ("compression_spring", {"pitch": 1.0, "wire_d": 1.6}, InputError, ["pitch", "1.15", "1"]),
    ],
)
def test_bad_parameters_raise_with_expected_and_found(family, params, error, words):
    with pytest.raises(error) as info:
        build_part(family, **params)
    assert isinstance(info.value, ShapesError)
    for w in words:
        assert w in str(info.value), (w, str(info.value))
