"""The mirror-twin map a dataset records, decided from the catalog and its geometry (``sample.twins``).

A catalog may declare which class is the mirror image of which (``twins.json``, or ``twin`` fields
in ``catalog.json``); a folder of meshes often declares nothing, and then every class would read as
its own mirror image. :func:`resolve_twins` runs the twin detector
(:func:`shapes.parts.check_twins`) over every instance of the catalog and decides by ``mode``:

- ``auto`` (the default): a catalog that declares no twins gets the map the geometry gives; a
  declared map is kept and checked, and each disagreement becomes a warning line;
- ``derived``: the geometry's map is used even where one is declared (disagreements still warned);
- ``declared``: the detector is off; the declared map is used as it is (none: every class achiral).

Handed classes whose mirror image is no class of the catalog are listed as ``unpaired``: their mirror
images are no known part, so ``train.mirror`` never reflects them and ``shapes eval`` scores them apart.
"""

from __future__ import annotations

import os
import sys
import time
from typing import Callable

from shapes import _checks as check
from shapes.data._catalog import Catalog, read_catalog
from shapes.data._read import read_mesh

__all__ = ["TWIN_MODES", "resolve_twins", "twin_lines", "twin_printer"]

TWIN_MODES = ("auto", "derived", "declared")


def resolve_twins(catalog: Catalog | str | os.PathLike, mode: str = "auto") -> dict:
    """Decide the twin map of a catalog (read, or a folder); returns the record ``meta.json`` stores.

    Returns
    -------
    dict with ``map`` (class -> twin, complete), ``source`` (where the map came from, in words),
    ``mode``, ``declared`` (whether the catalog states twins), ``checked`` (whether the detector ran),
    ``pairs`` (detected twin pairs), ``achiral``, ``unpaired`` (handed, mirror image not in the
    catalog), ``warnings`` (one line per disagreement with the declared map) and ``seconds`` (the
    detector's wall time; 0 when it did not run).
    """
    check.choice("sample.twins", mode, TWIN_MODES)
    if not isinstance(catalog, Catalog):
        catalog = read_catalog(catalog)
    record = {"mode": mode, "declared": catalog.twins_declared, "checked": False, "map": dict(catalog.twins),
              "pairs": [], "achiral": [], "unpaired": [], "warnings": [], "seconds": 0.0}
    if mode == "declared":
        record["source"] = ("declared in the catalog (not checked: sample.twins=declared)" if catalog.twins_declared
                            else "none declared, every class taken as its own mirror image (not checked: "
                                 "sample.twins=declared)")
        return record
    from shapes.parts import check_twins  # the detector (trimesh registration): loaded only when it runs

    t0 = time.perf_counter()
    meshes = {c: [read_mesh(inst.file) for inst in catalog.of_class(c)] for c in catalog.classes}
    report = check_twins(meshes, declared=catalog.twins if catalog.twins_declared else None)
    record["seconds"] = time.perf_counter() - t0
    use_geometry = mode == "derived" or not catalog.twins_declared
    used = dict(report.twins) if use_geometry else dict(catalog.twins)
    record.update(
        checked=True, map=used, pairs=[list(p) for p in report.pairs], achiral=list(report.achiral),
        unpaired=[c for c in report.unpaired if used[c] == c], warnings=list(report.warnings),
        source=("derived from geometry" if not catalog.twins_declared else
                "derived from geometry (the catalog's declared map is not used: sample.twins=derived)"
                if mode == "derived" else "declared in the catalog, checked against the geometry"))
    return record


def twin_lines(record: dict) -> list[str]:
    """What ``shapes sample`` says about the twin map: its source, one line per pair found, the
    handed classes without a twin, and one ``warning:`` line per disagreement."""
    if not record.get("checked"):
        return [f"mirror twins: {record['source']}"]
    lines = [f"mirror twins: {record['source']} ({record['seconds']:.1f} s; sample.twins=declared skips the check)"]
    lines += [f"  mirror twins found: {a} <-> {b}" for a, b in record["pairs"]]
    if record["achiral"]:
        lines.append(f"  achiral: {', '.join(record['achiral'])}")
    lines += [f"  handed, its mirror twin is not in the catalog: {c} (its mirror image is not a known part)"
              for c in record["unpaired"]]
    lines += [f"warning: {w}" for w in record["warnings"]]
    return lines


def twin_printer(prefix: str = "") -> Callable[[str], None]:
    """A ``say`` for :func:`shapes.data.build_dataset`: each line printed with ``prefix``, the
    ``warning:`` lines on standard error, the others on standard output."""

    def say(line: str) -> None:
        print(prefix + line, file=sys.stderr if line.startswith("warning:") else sys.stdout, flush=True)

    return say
