"""Parametric CAD-like parts with real dimensions, the demo catalog, and mirror-twin detection.

Families (``FAMILIES``) build one watertight solid each, in mm, from published standards where
one exists (ISO 4032 nuts, ISO 7089/7090 washers, ISO 15 bearings, ISO 53/54 gears, ISO 68-1/261
threads, ISO 4183 V-belt grooves, ISO 273 clearance holes). Handed families take ``hand="right"|"left"``; left is the exact mirror image
(x -> -x) of right. Right-hand helices advance along +z turning counter-clockwise seen from +z.
"""

from shapes.parts._align import Alignment, align_rigid
from shapes.parts._catalog import (
    CATALOG_TITLE, MAX_PER_CLASS, demo_catalog_spec, describe_instances, summarize_catalog, write_demo_catalog,
)
from shapes.parts._families import FAMILIES, HANDED_FAMILIES, build_part
from shapes.parts._mesh import MIRROR, mirror_mesh
from shapes.parts._ply import write_ply
from shapes.parts._twins import DEFAULT_TOL, TwinReport, check_twins, find_mirror_twins, is_chiral, is_rotation_of

__all__ = [
    "FAMILIES",
    "HANDED_FAMILIES",
    "build_part",
    "mirror_mesh",
    "MIRROR",
    "demo_catalog_spec",
    "describe_instances",
    "MAX_PER_CLASS",
    "write_demo_catalog",
    "summarize_catalog",
    "CATALOG_TITLE",
    "write_ply",
    "Alignment",
    "align_rigid",
    "is_rotation_of",
    "is_chiral",
    "find_mirror_twins",
    "check_twins",
    "TwinReport",
    "DEFAULT_TOL",
]
