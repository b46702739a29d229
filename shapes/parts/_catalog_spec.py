"""The demo catalog's classes and instance tables: a maintenance store sorting a mixed bin of returned parts.

:func:`demo_catalog_spec` lists the classes and instance parameters (no meshes); the seed picks
the free parameters (lengths, tooth and coil counts, diameters) inside fixed ranges. Each class
spreads its ``per_class`` instances evenly over its range (see ``_design``): discrete traits
take balanced levels, continuous ones one draw per stratum, so a held-out instance lies
between training ones rather than beyond them. ``_catalog`` builds and writes the meshes.
"""

from __future__ import annotations

import math
import numbers

from shapes.errors import ConfigError
from shapes.parts._design import grid_strata, levels, pick_spread, strata
from shapes.parts._families import FAMILIES
from shapes.parts._standards import (
    BEARING_ISO15, CLEARANCE_HOLE_ISO273, COARSE_PITCH_ISO261, GEAR_MODULES_ISO54, VBELT_GROOVE_ISO4183,
)
from shapes.seeding import rng

__all__ = ["MAX_PER_CLASS", "demo_catalog_spec"]

_COMMON = "none (common practice)"
# Tessellation of the two helical families, below their generators' defaults: 16 half-planes
# (or rings) per turn still resolve the thread and the coils and their hand, and keep the
# folder of 192 meshes under 10 MB.
_STUD_COLUMNS = 16
_SPRING_PER_TURN = 16


def _r(x: float, step: float = 0.5) -> float:
    """Round to a tidy workshop value so names and params stay readable."""
    return float(round(round(float(x) / step) * step, 6))


def _tag(x: float) -> str:
    return f"{x:g}".replace(".", "p")


def _unique(name, instances):
    tags = [tag for tag, _ in instances]
    assert len(set(tags)) == len(tags), f"{name}: repeated instance tags {sorted(t for t in tags if tags.count(t) > 1)}"
    return instances


def _achiral(name, family, standard, description, instances):
    _unique(name, instances)
    return [{
        "name": name, "family": family, "standard": standard, "twin": name, "handed": False,
        "description": description,
        "instances": [{"file": f"{name}/{name}_{tag}.ply", "group": f"{name}_{tag}", "params": p} for tag, p in instances],
    }]


def _pair(right, left, stem, family, standard, descriptions, instances):
    """Two mirror-twin classes sharing groups: the left instance mirrors the right one."""
    _unique(right, instances)
    out = []
    for name, twin, hand, desc in ((right, left, "right", descriptions[0]), (left, right, "left", descriptions[1])):
        out.append({
            "name": name, "family": family, "standard": standard, "twin": twin, "handed": True,
            "description": desc,
            "instances": [
                {"file": f"{name}/{name}_{tag}.ply", "group": f"{stem}_{tag}", "params": {**p, "hand": hand}}
                for tag, p in instances
            ],
        })
    return out


# ISO metric sizes of the demo's nuts, washers and studs (ISO 4032, ISO 7089/7090, ISO 261).
_SIZES = ("M5", "M6", "M8", "M10", "M12", "M14", "M16")
# Largest per_class with no repeated instance: 7 nut and washer sizes x 2 variants each.
MAX_PER_CLASS = 2 * len(_SIZES)


def _nuts(gen, n):
    # Sizes as even as the count allows, extremes first; the two instances of a size differ in
    # chamfer because neighbours in the list alternate.
    out = []
    for i, s in enumerate(levels(_SIZES, n)):
        chamfer = ("both", "one")[i % 2]
        out.append((f"{s.lower()}_c{2 if chamfer == 'both' else 1}", {"size": s, "chamfer": chamfer}))
    return out


def _washers(gen, n):
    out = []
    for i, s in enumerate(levels(_SIZES, n)):
        chamfered = i % 2 == 1  # ISO 7090 (chamfered) or ISO 7089 (flat)
        out.append((f"{s.lower()}_{'chamfered' if chamfered else 'flat'}", {"size": s, "chamfered": chamfered}))
    return out


def _bearings(gen, n):
    # All twelve ISO 15 sizes by bore, then series (6000, 6200, 6001, 6201, ...); sealed and open
    # alternate so that each series and each pair of bores has both.
    order = sorted(BEARING_ISO15, key=lambda k: (BEARING_ISO15[k]["d"], k))
    rows = [(d, (i // 2 + i) % 2 == 1) for i, d in enumerate(order)]
    rows = pick_spread(rows, n) if n <= len(rows) else rows + [(d, not s) for d, s in rows][: n - len(rows)]
    return [(f"{d}_{'2rs' if s else 'open'}", {"designation": d, "sealed": s}) for d, s in rows]


def _teeth(gen, n, bands):
    """Tooth counts: instance i in band i % 3, drawn evenly and without repeats inside its band."""
    teeth = [0] * n
    for b, (lo, hi) in enumerate(bands):
        idx = list(range(b, n, len(bands)))
        for i, z in zip(idx, grid_strata(gen, len(idx), lo, hi, 1.0, shuffle=True)):
            teeth[i] = int(z)
    return teeth


def _spur(gen, n):
    modules = levels(GEAR_MODULES_ISO54, n)  # neighbours share a module and differ in tooth band
    teeth = _teeth(gen, n, ((17, 24), (25, 34), (35, 48)))
    width, bore = strata(gen, n, 6.0, 10.0), strata(gen, n, 0.22, 0.38)
    out = []
    for m, z, w, b in zip(modules, teeth, width, bore):
        params = {"module": m, "teeth": z, "face_width": _r(m * w), "bore_d": _r(b * m * z, 1.0)}
        out.append((f"m{_tag(m)}_z{z}", params))
    return out


def _flanges(gen, n):
    outer = grid_strata(gen, n, 60.0, 140.0, 1.0)
    thick, hub_h, bore = strata(gen, n, 0.10, 0.16), strata(gen, n, 0.4, 1.0), strata(gen, n, 0.45, 0.7)
    out = []
    for i, od in enumerate(outer):
        holes = (4, 6, 8)[i % 3]
        bolt = ("M8", "M10", "M12", "M16")[4 * i // n]  # bolt size grows with the flange, a quarter each
        hd = CLEARANCE_HOLE_ISO273[bolt]
        bc = _r(od - 2.4 * hd, 1.0)  # hole edge 0.7 hole_d from the rim
        hub_d = _r(bc - 2.2 * hd, 1.0)  # and 0.6 hole_d from the hub
        t = _r(od * thick[i])
        params = {"outer_d": od, "bore_d": _r(bore[i] * hub_d, 1.0), "thickness": t, "holes": holes,
                  "bolt_circle_d": bc, "hole_d": hd, "hub_d": hub_d, "hub_h": _r(hub_h[i] * t)}
        out.append((f"d{_tag(od)}_h{holes}", params))
    return out


def _shafts(gen, n):
    seat = grid_strata(gen, n, 10.0, 40.0, 1.0)
    shoulder, end, wide = strata(gen, n, 1.15, 1.4), strata(gen, n, 0.7, 0.85), strata(gen, n, 2.0, 3.5)
    out = []
    for i, d in enumerate(seat):
        steps = (3, 4, 5)[i % 3]
        big, small = _r(d * shoulder[i]), _r(d * end[i])  # 0.5 mm: whole mm would bunch the ratios of thin shafts
        dia = {3: [d, big, d], 4: [small, d, big, d], 5: [small, d, big, d, small]}[steps]
        lengths = [_r(d * x, 1.0) for x in gen.uniform(0.8, 2.0, size=steps)]
        k = dia.index(big)
        lengths[k] = _r(d * wide[i], 1.0)
        params = {"diameters": dia, "lengths": lengths, "keyway_width": _r(0.28 * big), "keyway_depth": _r(0.15 * big),
                  "chamfer": _r(0.06 * min(dia[0], dia[-1]), 0.1)}
        out.append((f"d{_tag(d)}_s{steps}", params))
    return out


def _pulleys(gen, n):
    rows = [((1, 2, 3)[i % 3], ("SPZ", "SPA")[i % 2]) for i in range(n)]  # every pairing, as often as n allows
    span = {"SPZ": (70.0, 150.0), "SPA": (100.0, 200.0)}  # outside diameters of stock pulleys (common practice)
    outer = [0.0] * n
    for section, (lo, hi) in span.items():
        idx = [i for i, r in enumerate(rows) if r[1] == section]
        for i, od in zip(idx, grid_strata(gen, len(idx), lo, hi, 1.0, shuffle=True)):
            outer[i] = od
    bore, hub, hub_h = strata(gen, n, 0.12, 0.2), strata(gen, n, 1.7, 2.2), strata(gen, n, 4.0, 14.0)
    out = []
    for i, ((grooves, section), od) in enumerate(zip(rows, outer)):
        g = VBELT_GROOVE_ISO4183[section]
        bore_d = _r(bore[i] * od, 1.0)
        params = {"outer_d": od, "bore_d": bore_d, "grooves": grooves, "groove_top_w": g["b1"],
                  "groove_depth": g["c"] + g["t"], "groove_deg": 34.0 if od - 2.0 * g["c"] <= g["d_34"] else 38.0,
                  "hub_d": _r(hub[i] * bore_d, 1.0), "hub_h": _r(hub_h[i])}
        out.append((f"{section.lower()}_d{_tag(od)}_g{grooves}", params))
    return out


def _bushings(gen, n):
    outer = grid_strata(gen, n, 8.0, 40.0, 1.0)
    # Length from half the outside diameter (short spacers, the length of a nut) to twice it, drawn
    # apart for plain (even i) and flanged (odd i) bushings so that each style spans the whole range:
    # a short plain tube is the part most easily taken for a hex nut.
    inner, length = strata(gen, n, 0.55, 0.8), [0.0] * n
    for style in (0, 1):
        length[style::2] = strata(gen, len(range(style, n, 2)), 0.5, 2.0)
    collar, collar_t = strata(gen, n, 1.35, 1.7), strata(gen, n, 0.12, 0.2)
    out = []
    for i, od in enumerate(outer):
        flanged = i % 2 == 1
        length_i = _r(od * length[i])
        params = {"outer_d": od, "inner_d": _r(od * inner[i]), "length": length_i,
                  "flange_d": _r(od * collar[i]) if flanged else 0.0, "flange_t": _r(od * collar_t[i]) if flanged else 0.0}
        out.append((f"d{_tag(od)}_l{_tag(length_i)}_{'f' if flanged else 'p'}", params))
    return out


def _studs(gen, n):
    # Short (4-6 d) and long (7-9 d) studs alternate along the sizes: the two studs of a size
    # differ in length by at least a diameter, so their names differ too. Each thread covers at
    # least 22 % of the length: only the threads tell a stud from its mirror image, and a long
    # stud with short threads is the subtlest handed part of the catalog.
    short, long, fill = strata(gen, n, 4.0, 6.0), strata(gen, n, 7.0, 9.0), strata(gen, n, 0.0, 1.0)
    out = []
    for i, size in enumerate(levels(_SIZES, n)):
        d, pitch = COARSE_PITCH_ISO261[size]["d"], COARSE_PITCH_ISO261[size]["P"]
        length = _r(d * (short if i % 2 == 0 else long)[i], 5.0)  # stud lengths come in 5 mm steps
        hi = min(2.5 * d, (length - d) / 2.0 - pitch)  # leave a shank of at least d between the threads
        lo = min(max(1.25 * d, 0.22 * length), hi)
        params = {"size": size, "length": length, "thread_length": _r(lo + fill[i] * (hi - lo)), "columns": _STUD_COLUMNS}
        out.append((f"{size.lower()}_l{_tag(length)}", params))
    return out


def _springs(gen, n):
    mean = grid_strata(gen, n, 6.0, 40.0, 0.5)
    index, pitch = strata(gen, n, 5.0, 10.0), strata(gen, n, 0.28, 0.45)  # spring index D/d, pitch/D
    coils = [0.0] * n
    for b, (lo, hi) in enumerate(((4.5, 6.5), (7.0, 9.0), (9.5, 12.0))):
        idx = list(range(b, n, 3))
        for i, c in zip(idx, grid_strata(gen, len(idx), lo, hi, 0.5, shuffle=True)):
            coils[i] = c
    out = []
    for i, dm in enumerate(mean):
        ground = i % 2 == 0  # with the coil band i % 3: every pairing, along the whole range of diameters
        wire = _r(dm / index[i], 0.1)
        params = {"wire_d": wire, "mean_d": dm, "coils": coils[i], "pitch": max(_r(dm * pitch[i], 0.1), _r(1.6 * wire, 0.1)),
                  "ground": ground, "per_turn": _SPRING_PER_TURN}
        out.append((f"d{_tag(dm)}_n{_tag(coils[i])}_{'ground' if ground else 'closed'}", params))
    return out


def _helical(gen, n):
    modules = levels(GEAR_MODULES_ISO54, n)
    teeth = _teeth(gen, n, ((14, 21), (22, 31), (32, 44)))
    helix, width, bore = strata(gen, n, 12.0, 30.0), strata(gen, n, 6.0, 11.0), strata(gen, n, 0.22, 0.38)
    out = []
    for m, z, beta, w, b in zip(modules, teeth, helix, width, bore):
        d = m * z / math.cos(math.radians(beta))
        params = {"module": m, "teeth": z, "helix_deg": _r(beta, 0.1), "face_width": _r(m * w), "bore_d": _r(b * d, 1.0)}
        out.append((f"m{_tag(m)}_z{z}", params))
    return out


def _bracket_hole(width: float, short: float, t: float) -> float:
    """Largest ISO 273 clearance hole that leaves material around it on the legs."""
    fits = [hd for hd in CLEARANCE_HOLE_ISO273.values() if hd <= 0.15 * width and hd <= 0.25 * short and 3 * t + 2 * hd <= short]
    assert fits, (width, short, t)
    return max(fits)


def _brackets(gen, n):
    base = grid_strata(gen, n, 35.0, 100.0, 1.0)
    upright, wide, thick = strata(gen, n, 0.5, 0.8), strata(gen, n, 0.7, 1.3), strata(gen, n, 0.05, 0.08)
    out = []
    for i, a in enumerate(base):
        holes = (1, 2, 3)[i % 3]
        b, w, t = _r(a * upright[i], 1.0), _r(a * wide[i], 1.0), _r(a * thick[i])
        params = {"width": w, "leg_base": a, "leg_upright": b, "thickness": t, "hole_d": _bracket_hole(w, b, t),
                  "base_holes": holes}
        out.append((f"w{_tag(w)}_a{_tag(a)}_h{holes}", params))
    return out


# Achiral classes: (name = family, standard, description, instance table).
_ACHIRAL = [
    ("hex_nut", "ISO 4032", "regular hex nut, plain bore at the thread minor diameter (thread not modelled)", _nuts),
    ("plain_washer", "ISO 7089 / ISO 7090", "plain washer, flat (ISO 7089) or with a chamfered rim (ISO 7090)", _washers),
    ("ball_bearing", "ISO 15", "deep-groove ball bearing, open (balls shown) or sealed faces", _bearings),
    ("spur_gear", "ISO 53 / ISO 54", "involute spur gear with plain bore", _spur),
    ("bolted_flange", _COMMON, "flat flange with raised hub and a bolt circle of holes", _flanges),
    ("stepped_shaft", _COMMON, "stepped shaft with end chamfers and a closed keyway", _shafts),
    ("v_pulley", "ISO 4183", "V-belt pulley for SPZ or SPA belts with one to three grooves and a hub", _pulleys),
    ("bushing", _COMMON, "plain spacer tube or flanged bushing", _bushings),
]

# Mirror-twin pairs: (right class, left class, group stem, family, standard, descriptions, instance table).
_HANDED = [
    ("stud_rh", "stud_lh", "stud", "threaded_stud", "ISO 68-1 / ISO 261",
     ("double-ended stud, right-hand ISO metric coarse thread",
      "double-ended stud, left-hand ISO metric coarse thread"), _studs),
    ("spring_rh", "spring_lh", "spring", "compression_spring", _COMMON,
     ("right-hand helical compression spring, closed ends, ground or not",
      "left-hand helical compression spring, closed ends, ground or not"), _springs),
    ("helical_gear_rh", "helical_gear_lh", "helical_gear", "helical_gear", "ISO 53 / ISO 54",
     ("right-hand involute helical gear (normal module)",
      "left-hand involute helical gear (normal module)"), _helical),
    ("bracket_right", "bracket_left", "bracket", "angle_bracket", _COMMON,
     ("right angle bracket: unequal legs, off-centre gusset, uneven holes and a slot",
      "left angle bracket: mirror image of the right one"), _brackets),
]


def _check_per_class(per_class) -> int:
    if isinstance(per_class, bool) or not isinstance(per_class, numbers.Integral) or not 3 <= per_class <= MAX_PER_CLASS:
        raise ConfigError(
            f"per_class should be an integer in [3, {MAX_PER_CLASS}] (3 so that train, val and test each get an "
            f"instance; at most {MAX_PER_CLASS} distinct standard nuts and washers), got {per_class!r} instead."
        )
    return int(per_class)


def demo_catalog_spec(seed: int = 0, per_class: int = 12) -> list[dict]:
    """Classes and instances of the demo catalog, without meshes.

    Parameters
    ----------
    seed : picks the free parameters; the same seed always gives the same list
    per_class : instances of every class, 3 to ``MAX_PER_CLASS``; a handed pair shares its groups

    Returns
    -------
    classes : list of dicts with ``name, family, standard, twin, handed, description, instances``;
        each instance is ``{"file", "group", "params"}`` and ``build_part(family, **params)``
        rebuilds it. Mirror-twin instances share their original's group.
    """
    per_class = _check_per_class(per_class)
    gen = rng(seed)  # drawn in table order: reordering the tables changes the free parameters
    classes = []
    for name, standard, description, instances in _ACHIRAL:
        classes += _achiral(name, name, standard, description, instances(gen, per_class))
    for right, left, stem, family, standard, descriptions, instances in _HANDED:
        classes += _pair(right, left, stem, family, standard, descriptions, instances(gen, per_class))
    for c in classes:
        assert c["family"] in FAMILIES, c["family"]
        assert len(c["instances"]) == per_class, (c["name"], len(c["instances"]))
    return classes
