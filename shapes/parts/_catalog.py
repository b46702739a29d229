"""The demo catalog: a maintenance store sorting a mixed bin of returned parts.

``demo_catalog_spec`` lists the classes and instance parameters (no meshes); the seed picks
the free parameters (lengths, tooth and coil counts, hole counts) inside fixed ranges.
``write_demo_catalog`` builds every instance, writes binary PLY files plus ``catalog.json`` and
``README.md`` into a folder that replaces the old one whole.
"""

from __future__ import annotations

import io
import json
import os
from pathlib import Path

import trimesh

from shapes._atomic import atomic_dir, write_json, write_text
from shapes.errors import DataError
from shapes.parts._families import FAMILIES, build_part
from shapes.parts._ply import ply_bytes, write_ply
from shapes.seeding import rng

__all__ = ["CATALOG_TITLE", "demo_catalog_spec", "write_demo_catalog", "summarize_catalog"]

CATALOG_TITLE = "Returned-parts bin, maintenance store demo"
_COMMON = "none (common practice)"


def _r(x: float, step: float = 0.5) -> float:
    """Round to a tidy workshop value so names and params stay readable."""
    return float(round(round(float(x) / step) * step, 6))


def _tag(x: float) -> str:
    return f"{x:g}".replace(".", "p")


def _achiral(name, family, standard, description, instances):
    return [{
        "name": name, "family": family, "standard": standard, "twin": name, "handed": False,
        "description": description,
        "instances": [{"file": f"{name}/{name}_{tag}.ply", "group": f"{name}_{tag}", "params": p} for tag, p in instances],
    }]


def _pair(right, left, stem, family, standard, descriptions, instances):
    """Two mirror-twin classes sharing groups: the left instance mirrors the right one."""
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


def _nuts(gen):
    rows = [(s, c) for s in ("M6", "M8", "M10") for c in ("both", "one")]
    return [(f"{s.lower()}_c{2 if c == 'both' else 1}", {"size": s, "chamfer": c}) for s, c in rows]


def _washers(gen):
    return [(s.lower(), {"size": s}) for s in ("M4", "M5", "M6", "M8", "M10", "M12")]


def _bearings(gen):
    rows = [("6000", False), ("6001", True), ("6002", False), ("6201", True), ("6203", False), ("6204", True)]
    return [(f"{d}_{'2rs' if s else 'open'}", {"designation": d, "sealed": s}) for d, s in rows]


def _spur(gen):
    out = []
    for m in (1.0, 1.5, 2.0):
        for teeth in (int(gen.integers(18, 25)), int(gen.integers(30, 41))):
            d = m * teeth
            params = {"module": m, "teeth": teeth, "face_width": _r(m * gen.uniform(6, 9)), "bore_d": _r(0.3 * d, 1.0)}
            out.append((f"m{_tag(m)}_z{teeth}", params))
    return out


def _flanges(gen):
    sizes = [  # outer, bore, thickness, bolt circle, hole, hub, hub height
        (65.0, 20.0, 10.0, 50.0, 9.0, 32.0), (90.0, 30.0, 12.0, 72.0, 11.0, 45.0), (120.0, 45.0, 14.0, 98.0, 14.0, 62.0),
    ]
    out = []
    for od, bore, t, bc, hd, hub in sizes:
        for holes in (4, int(gen.choice([6, 8]))):
            params = {"outer_d": od, "bore_d": bore, "thickness": t, "holes": holes, "bolt_circle_d": bc,
                      "hole_d": hd, "hub_d": hub, "hub_h": _r(gen.uniform(0.4, 0.8) * t)}
            out.append((f"d{_tag(od)}_h{holes}", params))
    return out


def _shafts(gen):
    out = []
    for d in (12.0, 20.0, 30.0):
        for steps in (3, 4):
            if steps == 3:
                dia = [d, _r(d * 1.25, 1.0), d]
            else:
                dia = [_r(d * 0.8, 1.0), d, _r(d * 1.25, 1.0), d]
            lengths = [_r(d * gen.uniform(1.0, 2.0), 1.0) for _ in dia]
            k = dia.index(max(dia))
            lengths[k] = _r(d * gen.uniform(2.0, 3.0), 1.0)
            dk = max(dia)
            params = {"diameters": dia, "lengths": lengths, "keyway_width": _r(0.28 * dk), "keyway_depth": _r(0.15 * dk),
                      "chamfer": _r(0.06 * d, 0.1)}
            out.append((f"d{_tag(d)}_s{steps}", params))
    return out


def _pulleys(gen):
    sizes = [(50.0, 10.0, 24.0), (80.0, 16.0, 40.0), (112.0, 24.0, 56.0)]
    out = []
    for od, bore, hub in sizes:
        for grooves in (1, 2):
            params = {"outer_d": od, "bore_d": bore, "grooves": grooves, "groove_top_w": 9.7, "groove_depth": 9.0,
                      "groove_deg": 38.0, "hub_d": hub, "hub_h": _r(gen.uniform(5.0, 12.0))}
            out.append((f"d{_tag(od)}_g{grooves}", params))
    return out


def _bushings(gen):
    out = []
    for od, idia in ((10.0, 6.0), (16.0, 10.0), (25.0, 16.0)):
        for flanged in (False, True):
            length = _r(od * gen.uniform(0.8, 2.0))
            params = {"outer_d": od, "inner_d": idia, "length": length,
                      "flange_d": _r(od * 1.5) if flanged else 0.0, "flange_t": _r(0.15 * od) if flanged else 0.0}
            out.append((f"d{_tag(od)}_l{_tag(length)}_{'f' if flanged else 'p'}", params))
    return out


def _studs(gen):
    out = []
    for size, d in (("M6", 6.0), ("M8", 8.0), ("M10", 10.0)):
        for length in (_r(d * gen.uniform(4.0, 5.0), 5.0), _r(d * gen.uniform(6.0, 8.0), 5.0)):
            params = {"size": size, "length": length, "thread_length": _r(d * gen.uniform(1.5, 2.0), 1.0)}
            out.append((f"{size.lower()}_l{_tag(length)}", params))
    return out


def _springs(gen):
    out = []
    for wire, mean in ((1.0, 8.0), (1.6, 12.0), (2.5, 20.0)):
        for coils in (int(gen.integers(5, 7)), int(gen.integers(8, 11))):
            params = {"wire_d": wire, "mean_d": mean, "coils": coils, "pitch": _r(mean * gen.uniform(0.3, 0.4), 0.1)}
            out.append((f"d{_tag(mean)}_n{coils}", params))
    return out


def _helical(gen):
    out = []
    for m in (1.0, 1.5, 2.0):
        for teeth in (int(gen.integers(16, 23)), int(gen.integers(26, 33))):
            params = {"module": m, "teeth": teeth, "helix_deg": float(gen.choice([15.0, 20.0, 25.0])),
                      "face_width": _r(m * gen.uniform(7, 10)), "bore_d": _r(0.3 * m * teeth, 1.0)}
            out.append((f"m{_tag(m)}_z{teeth}", params))
    return out


def _brackets(gen):
    sizes = [(30.0, 40.0, 30.0, 3.0, 5.5), (40.0, 55.0, 40.0, 4.0, 6.6), (60.0, 80.0, 60.0, 5.0, 9.0)]
    out = []
    for width, a, b, t, hd in sizes:
        for holes in (2, 3):
            w = _r(width + gen.uniform(0.0, 10.0), 5.0)
            params = {"width": w, "leg_base": a, "leg_upright": b, "thickness": t, "hole_d": hd, "base_holes": holes}
            out.append((f"w{_tag(w)}_a{_tag(a)}_h{holes}", params))
    return out


# Achiral classes: (name = family, standard, description, instance table).
_ACHIRAL = [
    ("hex_nut", "ISO 4032", "regular hex nut, plain bore at the thread minor diameter (thread not modelled)", _nuts),
    ("plain_washer", "ISO 7089", "plain washer", _washers),
    ("ball_bearing", "ISO 15", "deep-groove ball bearing, open (balls shown) or sealed faces", _bearings),
    ("spur_gear", "ISO 53 / ISO 54", "involute spur gear with plain bore", _spur),
    ("bolted_flange", _COMMON, "flat flange with raised hub and a bolt circle of holes", _flanges),
    ("stepped_shaft", _COMMON, "stepped shaft with end chamfers and a closed keyway", _shafts),
    ("v_pulley", _COMMON, "V-belt pulley with one or two grooves and a hub", _pulleys),
    ("bushing", _COMMON, "plain spacer tube or flanged bushing", _bushings),
]

# Mirror-twin pairs: (right class, left class, group stem, family, standard, descriptions, instance table).
_HANDED = [
    ("stud_rh", "stud_lh", "stud", "threaded_stud", "ISO 68-1 / ISO 261",
     ("double-ended stud, right-hand ISO metric coarse thread",
      "double-ended stud, left-hand ISO metric coarse thread"), _studs),
    ("spring_rh", "spring_lh", "spring", "compression_spring", _COMMON,
     ("right-hand helical compression spring, closed and ground ends",
      "left-hand helical compression spring, closed and ground ends"), _springs),
    ("helical_gear_rh", "helical_gear_lh", "helical_gear", "helical_gear", "ISO 53 / ISO 54",
     ("right-hand involute helical gear (normal module)",
      "left-hand involute helical gear (normal module)"), _helical),
    ("bracket_right", "bracket_left", "bracket", "angle_bracket", _COMMON,
     ("right angle bracket: unequal legs, off-centre gusset, uneven holes and a slot",
      "left angle bracket: mirror image of the right one"), _brackets),
]



def demo_catalog_spec(seed: int = 0) -> list[dict]:
    """Classes and instances of the demo catalog, without meshes.

    Parameters
    ----------
    seed : picks the free parameters; the same seed always gives the same list

    Returns
    -------
    classes : list of dicts with ``name, family, standard, twin, handed, description, instances``;
        each instance is ``{"file", "group", "params"}`` and ``build_part(family, **params)``
        rebuilds it. Mirror-twin instances share their original's group.
    """
    gen = rng(seed)  # drawn in table order: reordering the tables changes the free parameters
    classes = []
    for name, standard, description, instances in _ACHIRAL:
        classes += _achiral(name, name, standard, description, instances(gen))
    for right, left, stem, family, standard, descriptions, instances in _HANDED:
        classes += _pair(right, left, stem, family, standard, descriptions, instances(gen))
    for c in classes:
        assert c["family"] in FAMILIES, c["family"]
    return classes


def _readme(spec: list[dict], faces: dict[str, list[int]], seed: int) -> str:
    lines = [
        f"# {CATALOG_TITLE}",
        "",
        "A maintenance store is sorting a mixed bin of returned parts: fasteners, bearings, gears,",
        "springs, shafts and brackets, some of them in left- and right-hand versions that differ only",
        "by a mirror image. This folder holds one CAD-like mesh per part instance, dimensioned in mm",
        "from the published standards where one exists, and `catalog.json` describing the classes.",
        "",
        f"Generated by `shapes.parts.write_demo_catalog(seed={seed})` (the `shapes parts` command); the",
        "same seed gives byte-identical files. Meshes are binary PLY, float32 vertices shared between",
        "faces, watertight and outward-wound. Turned parts have their axis along +z. A left-hand",
        "instance is the right-hand one mirrored by x -> -x and shares its `group`, so a split by",
        "group never puts a part and its mirror image on different sides.",
        "",
        "| class | family | standard | twin | instances | faces |",
        "|---|---|---|---|---|---|",
    ]
    for c in spec:
        f = faces[c["name"]]
        lines.append(f"| {c['name']} | {c['family']} | {c['standard']} | {c['twin']} | {len(c['instances'])} | {min(f)}-{max(f)} |")
    lines += ["", "Hex nuts have a plain bore at the thread's minor diameter: the internal thread is not modelled.", ""]
    return "\n".join(lines)


def _read_back_ok(data: bytes) -> bool:
    mesh = trimesh.load(io.BytesIO(data), file_type="ply", process=True)
    return bool(mesh.is_watertight and mesh.is_winding_consistent and mesh.volume > 0)


def write_demo_catalog(out_dir: str | os.PathLike = "demo_meshes", seed: int = 0) -> Path:
    """Build every demo instance and write the folder ``out_dir`` (replaced whole on success).

    Returns
    -------
    folder : the written folder; :func:`summarize_catalog` gives rows a caller can print
    """
    out_dir = Path(out_dir)
    spec = demo_catalog_spec(seed)
    faces: dict[str, list[int]] = {}
    with atomic_dir(out_dir) as tmp:
        for c in spec:
            faces[c["name"]] = []
            for inst in c["instances"]:
                mesh = build_part(c["family"], **inst["params"])
                data = ply_bytes(mesh)
                if not _read_back_ok(data):
                    raise DataError(f"{inst['file']}: written mesh should read back as a closed solid, got an open one instead.")
                write_ply(tmp / inst["file"], mesh)
                faces[c["name"]].append(len(mesh.faces))
        write_json(tmp / "catalog.json", {"format": 1, "title": CATALOG_TITLE, "units": "mm", "classes": spec})
        write_text(tmp / "README.md", _readme(spec, faces, seed))
    return out_dir


def _ply_face_count(path: Path) -> int:
    with open(path, "rb") as fh:
        for raw in fh:
            line = raw.decode("ascii", "replace").strip()
            if line.startswith("element face"):
                return int(line.split()[-1])
            if line == "end_header":
                break
    raise DataError(f"{path}: PLY header should declare a face element, got none instead.")


def summarize_catalog(folder: str | os.PathLike = "demo_meshes") -> list[dict]:
    """One row per class of a written catalog: name, family, standard, twin, instances, faces, bytes."""
    folder = Path(folder)
    path = folder / "catalog.json"
    if not path.is_file():
        raise DataError(f"{path}: catalog file should exist, got no such file instead.")
    catalog = json.loads(path.read_text(encoding="utf-8"))
    rows = []
    for c in catalog["classes"]:
        files = [folder / i["file"] for i in c["instances"]]
        counts = [_ply_face_count(f) for f in files]
        rows.append({
            "name": c["name"], "family": c["family"], "standard": c["standard"], "twin": c["twin"],
            "instances": len(files), "faces_min": min(counts), "faces_max": max(counts),
            "bytes": sum(f.stat().st_size for f in files),
        })
    return rows
