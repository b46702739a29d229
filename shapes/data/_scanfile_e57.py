"""E57 scan files (ASTM E2807) through ``pye57``: every scan turned into the file's frame by its pose
and merged, Cartesian or spherical coordinates, invalid points dropped (see :mod:`shapes.data._scanfile`)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from shapes.errors import MeshError
from shapes.data._scanfile_rows import CHUNK_ROWS, _first_line, _too_many


def _quaternion_matrix(q: np.ndarray) -> np.ndarray:
    """Rotation matrix of the unit quaternion (w, x, y, z) (Hamilton convention, as E57 uses)."""
    w, x, y, z = q
    return np.array([
        [1 - 2 * (y * y + z * z), 2 * (x * y - w * z), 2 * (x * z + w * y)],
        [2 * (x * y + w * z), 1 - 2 * (x * x + z * z), 2 * (y * z - w * x)],
        [2 * (x * z - w * y), 2 * (y * z + w * x), 1 - 2 * (x * x + y * y)],
    ])


def _e57_pose(path: Path, node, index: int) -> tuple[np.ndarray, np.ndarray, bool]:
    if not node.isDefined("pose"):
        return np.eye(3), np.zeros(3), False
    pose = node["pose"]
    q = np.array([1.0, 0.0, 0.0, 0.0])
    t = np.zeros(3)
    if pose.isDefined("rotation"):
        q = np.array([pose["rotation"][k].value() for k in ("w", "x", "y", "z")], dtype=np.float64)
    if pose.isDefined("translation"):
        t = np.array([pose["translation"][k].value() for k in ("x", "y", "z")], dtype=np.float64)
    norm = float(np.linalg.norm(q))
    if not np.isfinite(norm) or norm < 1e-12 or not np.isfinite(t).all():
        raise MeshError(f"scan file {path}: scan {index} has an unusable pose (rotation {q.tolist()}, "
                        f"translation {t.tolist()}); expected a unit quaternion and a finite translation.")
    return _quaternion_matrix(q / norm), t, True


def _read_e57(path: Path, collector_for) -> tuple[np.ndarray, np.ndarray | None, list[str], np.ndarray | None]:
    try:
        import pye57
    except ImportError:  # a declared dependency; only a broken install lands here
        raise MeshError(f"scan file {path}: reading E57 needs the 'pye57' package (pip install pye57).") from None
    try:
        e57 = pye57.E57(str(path))
    except Exception as exc:
        raise MeshError(f"scan file {path} could not be read as E57: {_first_line(exc)}") from None
    try:
        count = e57.scan_count
        if count == 0:
            raise MeshError(f"scan file {path} is an E57 file with no scans (data3D is empty).")
        headers = [e57.get_header(i) for i in range(count)]
        total = sum(int(h.point_count) for h in headers)
        _too_many(path, total)
        collector = collector_for(total)
        sensors, posed = [], []
        for i, header in enumerate(headers):
            fields = header.point_fields
            if all(f in fields for f in ("cartesianX", "cartesianY", "cartesianZ")):
                names, spherical, invalid = ["cartesianX", "cartesianY", "cartesianZ"], False, "cartesianInvalidState"
            elif all(f in fields for f in ("sphericalRange", "sphericalAzimuth", "sphericalElevation")):
                names, spherical = ["sphericalRange", "sphericalAzimuth", "sphericalElevation"], True
                invalid = "sphericalInvalidState"
            else:
                raise MeshError(f"scan file {path}: scan {i} has point fields {fields}; expected cartesianX/Y/Z "
                                "or sphericalRange/Azimuth/Elevation.")
            if invalid in fields:
                names = names + [invalid]
            rotation, translation, has_pose = _e57_pose(path, header.node, i)
            sensors.append(translation)
            posed.append(has_pose or spherical)
            n = int(header.point_count)
            if n == 0:
                continue
            data, buffers = e57.make_buffers(names, min(CHUNK_ROWS, n))
            reader = header.points.reader(buffers)
            try:
                while (got := reader.read()) > 0:
                    a, b, c = (data[k][:got].astype(np.float64) for k in names[:3])
                    if spherical:  # ASTM E2807: azimuth from +x toward +y, elevation from the xy-plane
                        xyz = np.stack([a * np.cos(c) * np.cos(b), a * np.cos(c) * np.sin(b), a * np.sin(c)], axis=1)
                    else:
                        xyz = np.stack([a, b, c], axis=1)
                    if invalid in data:
                        xyz = xyz[data[invalid][:got] == 0]
                    collector.add(xyz @ rotation.T + translation, index=np.full(len(xyz), i, np.int32))
            finally:
                reader.close()
    except MeshError:
        raise
    except Exception as exc:
        raise MeshError(f"scan file {path} could not be read as E57: {_first_line(exc)}") from None
    finally:
        e57.close()
    points, _, index = collector.arrays()
    notes = collector.note() + ["E57 coordinates are metres (ASTM E2807); converted to mm"]
    if count > 1:
        notes.append(f"{count} scans merged into one frame by their poses")
    sensors_arr = np.array(sensors) if all(posed) else None
    if sensors_arr is None:
        notes.append("no scan pose: sensor positions unknown")
    return points, None, notes, (sensors_arr, index)
