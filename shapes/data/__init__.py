"""The data room: read meshes and scans, sample and scan them, write and load point-cloud shards.

Meshes come in (STL, OBJ, PLY, OFF, GLB), clouds go out: :func:`build_dataset` turns a catalog
folder into ``meta.json`` and one folder of plain ``.npy`` arrays per split (``train/points.npy``, ...);
:func:`load_split` maps them read-only and :class:`CloudDataset` serves them to torch. Every user
mistake raises :class:`~shapes.errors.MeshError` or :class:`~shapes.errors.DataError` with a one-line
message naming the file.
"""

from shapes.data._build import (
    DEFAULT_COPIES,
    MODES,
    NORMAL_SOURCES,
    NORMALS_K,
    NORMALS_POINTS,
    SCAN,
    SURFACE,
    build_dataset,
    dense_normals,
    draw_cloud,
    sample_cloud,
)
from shapes.data._catalog import Catalog, Instance, read_catalog
from shapes.data._clean import CleanSettings, Cleaned, clean_points, neighbour_spacing
from shapes.data._load import CloudDataset, CloudSplit, collate_clouds, load_split, read_meta
from shapes.data._normals import estimate_normals
from shapes.data._prepare import Cloud, CloudRecipe, prepare_cloud
from shapes.data._read import (
    MESH_SUFFIXES,
    MIN_SCAN_POINTS,
    SCAN_MESH_POINTS,
    SCAN_SUFFIXES,
    read_mesh,
    read_scan,
)
from shapes.data._twins import TWIN_MODES, resolve_twins, twin_lines, twin_printer
from shapes.data._scanfile import (
    MAX_FILE_BYTES,
    MAX_FILE_POINTS,
    READ_POINTS,
    READ_SUFFIXES,
    UNITS,
    ScanFile,
    check_spread,
    orient_toward,
    read_points,
)
from shapes.data._sample import farthest_point_subsample, normalise, sample_surface
from shapes.data._scan import random_direction, ray_backend, scan_view
from shapes.data._scan import CAMERA_PLACEMENTS, SCAN_LABELS, ScannerSettings, ScanResult, scan_part
from shapes.data._split import SPLITS, split_groups

__all__ = [
    "read_mesh",
    "read_scan",
    "read_points",
    "prepare_cloud",
    "CloudRecipe",
    "Cloud",
    "ScanFile",
    "check_spread",
    "orient_toward",
    "UNITS",
    "READ_SUFFIXES",
    "READ_POINTS",
    "MAX_FILE_BYTES",
    "MAX_FILE_POINTS",
    "CleanSettings",
    "Cleaned",
    "clean_points",
    "neighbour_spacing",
    "MESH_SUFFIXES",
    "SCAN_SUFFIXES",
    "MIN_SCAN_POINTS",
    "SCAN_MESH_POINTS",
    "Catalog",
    "Instance",
    "read_catalog",
    "resolve_twins",
    "twin_lines",
    "twin_printer",
    "TWIN_MODES",
    "sample_surface",
    "farthest_point_subsample",
    "normalise",
    "estimate_normals",
    "dense_normals",
    "scan_view",
    "random_direction",
    "ray_backend",
    "ScannerSettings",
    "ScanResult",
    "scan_part",
    "SCAN_LABELS",
    "CAMERA_PLACEMENTS",
    "SPLITS",
    "split_groups",
    "build_dataset",
    "sample_cloud",
    "draw_cloud",
    "NORMAL_SOURCES",
    "NORMALS_K",
    "NORMALS_POINTS",
    "SCAN",
    "SURFACE",
    "DEFAULT_COPIES",
    "MODES",
    "read_meta",
    "load_split",
    "CloudSplit",
    "CloudDataset",
    "collate_clouds",
]
