"""Benchmark: scans as they arrive — normal estimation and each clean-up step in points per second, and the
peak memory of reading and thinning a 10-million-point file.

Speed: a 20 mm cylinder standing on a 120 mm table with a second object beside it and stray points above
(``--points`` in all, default 200 000, the number ``read_points`` keeps). Each clean-up step
(stray points, support plane, largest cluster) is timed alone, and ``estimate_normals`` (k = 16, its default
orientation and with a viewpoint, timed as in ``bench_normals.py``) on the same cloud; the figure is
N / median wall-clock seconds over ``--repeats`` runs after a warm-up.

Memory: for each file (binary PLY and NPY of 10 M points, an XYZ text file of ``--text-points``) a fresh
Python process imports ``shapes.data``, resets the kernel's high-water mark (writes ``5`` to
``/proc/self/clear_refs``), then reads the file with ``read_points`` (thinned to 200 000 while reading)
and thins it to 1024 points by farthest-point subsampling, and reports ``VmHWM`` from
``/proc/self/status`` minus the ``VmRSS`` before the read. A second fresh process does the same around
``numpy.load`` of the whole NPY array, the in-memory baseline, and a third around
``shapes.data.prepare_cloud`` of the binary PLY (1024 points, normals estimated): what ``shapes predict``
does to a point file before the network (read and thin, clean-up, normals, farthest-point thinning).

Writes ``bench/results/cleanup.json``.

    .venv/bin/python bench/bench_cleanup.py              # about two minutes on 2 cores
    .venv/bin/python bench/bench_cleanup.py --quick      # 20 000 points, 1 M-point files: a smoke test
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import trimesh

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_normals import VIEWPOINT, machine, timed  # noqa: E402  (the existing normals bench, reused)
from shapes._atomic import write_json  # noqa: E402
from shapes.data import CleanSettings, clean_points  # noqa: E402

OUT = Path(__file__).resolve().parent / "results" / "cleanup.json"

_MEASURE = r"""
import json, sys, time
import numpy as np
from shapes.data import CloudRecipe, farthest_point_subsample, prepare_cloud, read_points

def status(key):
    for line in open("/proc/self/status"):
        if line.startswith(key + ":"):
            return int(line.split()[1]) / 1024.0  # kB -> MB

path, how = sys.argv[1], sys.argv[2]
with open("/proc/self/clear_refs", "w") as handle:
    handle.write("5")  # reset VmHWM to the current RSS (Linux, proc(5))
before = status("VmRSS")
start = time.perf_counter()
if how == "read_points":
    scan = read_points(path, seed=0)
    keep = farthest_point_subsample(scan.points, 1024, seed=0)
    kept, rows = len(scan.points), scan.rows
elif how == "prepare_cloud":  # what shapes predict does to a point file before the network: read, clean, normals, thin
    cloud = prepare_cloud(path, CloudRecipe(points=1024), seed=0, needs_normals=True)
    kept, rows = len(cloud.points), int(sys.argv[3])  # the file's rows, as the caller wrote them
else:
    array = np.load(path)
    kept, rows = len(array), len(array)
seconds = time.perf_counter() - start
print(json.dumps({"rss_before_mb": before, "peak_mb": status("VmHWM"), "peak_over_start_mb": status("VmHWM") - before,
                  "seconds": seconds, "rows": rows, "kept": kept}))
"""


def scene(n: int, seed: int = 0) -> np.ndarray:
    gen = np.random.default_rng(seed)
    part = trimesh.sample.sample_surface(trimesh.creation.cylinder(radius=10, height=20).apply_translation([0, 0, 10]),
                                         n * 3 // 10, seed=1)[0]
    other = trimesh.sample.sample_surface(trimesh.creation.box(extents=(8, 8, 8)).apply_translation([40, 40, 4]),
                                          n // 20, seed=2)[0]
    strays = gen.uniform(-60, 60, (n // 200, 3)) + [0, 0, 70]
    table = np.c_[gen.uniform(-60, 60, (n - len(part) - len(other) - len(strays), 2)),
                  gen.normal(0, 0.02, n - len(part) - len(other) - len(strays))]
    return np.vstack([part, table, other, strays]).astype(np.float64)


def speed(points: np.ndarray, repeats: int) -> dict:
    n = len(points)
    steps = {"stray points": CleanSettings(support_plane=False, cluster=False),
             "support plane": CleanSettings(stray_points=False, cluster=False),
             "largest cluster": CleanSettings(stray_points=False, support_plane=False),
             "all three": CleanSettings()}
    out = {}
    for name, settings in steps.items():
        clean_points(points, settings, seed=0)  # warm-up
        times = []
        for _ in range(repeats):
            start = time.perf_counter()
            result = clean_points(points, settings, seed=0)
            times.append(time.perf_counter() - start)
        out[name] = {"seconds_median": statistics.median(times), "seconds_all": times,
                     "points_per_second": n / statistics.median(times), "removed": n - len(result.keep)}
        print(f"{name:16s} {out[name]['points_per_second']:>12,.0f} points/s  ({out[name]['removed']} removed)")
    for name, view in (("normals, no viewpoint", None), ("normals, viewpoint", VIEWPOINT)):
        timed(points, 16, view)  # warm-up
        times = [timed(points, 16, view) for _ in range(repeats)]
        out[name] = {"seconds_median": statistics.median(times), "seconds_all": times,
                     "points_per_second": n / statistics.median(times)}
        print(f"{name:16s} {out[name]['points_per_second']:>12,.0f} points/s")
    return out


def write_files(folder: Path, n: int, text_n: int) -> dict:
    gen = np.random.default_rng(0)
    files = {}
    unit = gen.normal(size=(n, 3)).astype(np.float32)
    unit /= np.linalg.norm(unit, axis=1, keepdims=True)
    unit *= np.float32(20.0)
    header = (f"ply\nformat binary_little_endian 1.0\nelement vertex {n}\nproperty float x\nproperty float y\n"
              "property float z\nend_header\n").encode()
    files["ply_binary"] = folder / "cloud.ply"
    with open(files["ply_binary"], "wb") as handle:
        handle.write(header)
        unit.tofile(handle)
    files["npy_float64"] = folder / "cloud.npy"
    np.save(files["npy_float64"], unit.astype(np.float64))
    files["xyz_text"] = folder / "cloud.xyz"
    np.savetxt(files["xyz_text"], unit[:text_n], fmt="%.4f")
    return files


def memory(files: dict, file_points: int) -> dict:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    out = {}
    runs = [(name, path, "read_points") for name, path in files.items()] + [
        ("npy_float64", files["npy_float64"], "numpy.load"), ("ply_binary", files["ply_binary"], "prepare_cloud")]
    for name, path, how in runs:
        done = subprocess.run([sys.executable, "-c", _MEASURE, str(path), how, str(file_points)], capture_output=True,
                              text=True, env=env, check=True)
        result = json.loads(done.stdout.strip().splitlines()[-1])
        result["file_mb"] = path.stat().st_size / 1024**2
        out[f"{name} {how}"] = result
        print(f"{name:12s} {how:11s} {result['rows']:>11,} rows: peak {result['peak_over_start_mb']:7.1f} MB over start "
              f"({result['file_mb']:.0f} MB file), {result['seconds']:.1f} s")
    return out


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=int, default=200_000)
    parser.add_argument("--file-points", type=int, default=10_000_000)
    parser.add_argument("--text-points", type=int, default=2_000_000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--out", type=Path, default=OUT)
    args = parser.parse_args(argv)
    if args.quick:
        args.points, args.file_points, args.text_points, args.repeats = 20_000, 1_000_000, 200_000, 1
    load_before = os.getloadavg()
    rates = speed(scene(args.points), args.repeats)
    with tempfile.TemporaryDirectory() as tmp:
        peaks = memory(write_files(Path(tmp), args.file_points, args.text_points), args.file_points)
    report = {
        "what": "clean-up steps and estimate_normals in points/s on a part-on-table scene; peak memory of "
                "read_points + farthest-point thinning of large files, and of prepare_cloud (what shapes predict does to a point "
                "file before the network) on the binary PLY, in fresh processes (VmHWM after clear_refs)",
        "when": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "points": args.points, "file_points": args.file_points, "text_points": args.text_points,
        "repeats": args.repeats, "machine": machine(),
        "load_average_before": load_before, "load_average_after": os.getloadavg(),
        "speed": rates, "memory": peaks,
    }
    write_json(args.out, report)
    print(f"-> {args.out}")
    return report


if __name__ == "__main__":
    main()
