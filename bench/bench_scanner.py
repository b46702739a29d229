"""Benchmark: the realistic virtual scanner ``scan_part`` — rays per second and scans per second, against ``scan_view``.

Rays: the scanner's own camera rays (one perspective image of ``--image`` x ``--image`` pixels aimed at a demo
part from the default working distance; those inside the cone of the part's bounding sphere, the ones
``scan_part`` casts) go through the mesh's Embree scene the way ``scan_part`` casts them
(``mesh.ray.intersects_first``, then the float64 crossing with the face hit) and, for comparison, through
``mesh.ray.intersects_location(multiple_hits=False)``. The figure is rays / median wall-clock seconds.

Scans: ``scan_part`` at 1024 points with the default settings (one view), with three views, and with a table
under the part, each against the old orthographic ``scan_view`` at 1024 points; the repeats of all of them are
interleaved (the same seeds in the same order) so load from other jobs on a shared machine falls on each alike.
The figure is 1 / median seconds, and the ratio is scan_part's scans per second over scan_view's.

Writes ``bench/results/bench_scanner.json``.

    .venv/bin/python bench/bench_scanner.py            # about ten seconds on 2 shared cores
    .venv/bin/python bench/bench_scanner.py --quick    # fewer repeats, a smoke test
"""

from __future__ import annotations

import argparse
import math
import os
import platform
import resource
import statistics
import sys
import time
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import scipy
import trimesh

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from shapes._atomic import write_json  # noqa: E402
from shapes.data import ScannerSettings, ray_backend, read_mesh, scan_part, scan_view  # noqa: E402
from shapes.data._scan_rays import _first_hits, _part_sphere, _pixel_rays  # noqa: E402  (the scanner's own rays)

OUT = Path(__file__).resolve().parent / "results" / "bench_scanner.json"
MESH = ROOT / "demo_meshes" / "helical_gear_rh"
POINTS = 1024


def machine() -> dict:
    return {"platform": platform.platform(), "processor": platform.processor() or platform.machine(),
            "python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__,
            "trimesh": trimesh.__version__, "cpu_count": os.cpu_count()}


def camera_rays(mesh, image: int) -> tuple[np.ndarray, np.ndarray]:
    """One default camera's centre and the unit rays of its image that scan_part casts: those inside the cone
    of the part's bounding sphere (the others cannot hit the part)."""
    settings = ScannerSettings()
    centre, radius = _part_sphere(mesh)
    direction = np.array([0.4, -0.3, 0.866])
    camera = centre + settings.distance * radius * direction / np.linalg.norm(direction)
    forward = (centre - camera) / np.linalg.norm(centre - camera)
    rays = _pixel_rays(forward, image, math.tan(math.radians(settings.field_of_view) / 2), np.random.default_rng(0))
    reach = math.sqrt(1.0 - 1.0 / settings.distance**2)
    return camera, rays[rays @ forward >= reach - 1e-9]


def ray_rate(mesh, image: int, repeats: int) -> dict:
    camera, rays = camera_rays(mesh, image)
    origins = np.broadcast_to(camera, rays.shape)
    calls = {
        "scan_part cast (intersects_first + float64 plane crossing)": lambda: _first_hits(mesh, camera, rays),
        "intersects_location, first hit": lambda: mesh.ray.intersects_location(origins, rays, multiple_hits=False),
    }
    out = {}
    hits = int(np.sum(_first_hits(mesh, camera, rays)[0] >= 0))  # also the warm-up (builds the scene)
    times = {name: [] for name in calls}
    for _ in range(repeats):
        for name, call in calls.items():
            start = time.perf_counter()
            call()
            times[name].append(time.perf_counter() - start)
    for name, t in times.items():
        out[name] = {"seconds_median": statistics.median(t), "seconds_all": t,
                     "rays_per_second": len(rays) / statistics.median(t)}
        print(f"{name:60s} {out[name]['rays_per_second']:>14,.0f} rays/s")
    return {"rays": len(rays), "hits": hits, "calls": out}


def scan_rate(mesh, repeats: int) -> dict:
    runs = {
        "scan_view (orthographic, one view)": lambda seed: scan_view(mesh, POINTS, seed=seed),
        "scan_part, defaults (one view)": lambda seed: scan_part(mesh, POINTS, seed=seed),
        "scan_part, three views": lambda seed: scan_part(mesh, POINTS, ScannerSettings(views=3), seed=seed),
        "scan_part, table, two upright views": lambda seed: scan_part(
            mesh, POINTS, ScannerSettings(views=2, placement="upright", support_plane=True), seed=seed),
        "scan_part, defaults, no visible_share": lambda seed: scan_part(
            mesh, POINTS, ScannerSettings(visibility_samples=0), seed=seed),
    }
    for run in runs.values():
        run(0)  # warm-up
    times = {name: [] for name in runs}
    for seed in range(repeats):
        for name, run in runs.items():
            start = time.perf_counter()
            run(seed)
            times[name].append(time.perf_counter() - start)
    base = statistics.median(times["scan_view (orthographic, one view)"])
    out = {}
    for name, t in times.items():
        median = statistics.median(t)
        out[name] = {"seconds_median": median, "seconds_all": t, "scans_per_second": 1.0 / median,
                     "ratio_to_scan_view": base / median}
        print(f"{name:60s} {1.0 / median:>10,.1f} scans/s  ({base / median:.2f} x scan_view)")
    return out


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--mesh", type=Path, default=None, help="a mesh file (default: a demo helical gear)")
    parser.add_argument("--image", type=int, default=1024, help="pixels per side of the ray-rate image")
    parser.add_argument("--repeats", type=int, default=30)
    parser.add_argument("--quick", action="store_true", help="5 repeats, a 512-pixel image")
    parser.add_argument("--out", type=Path, default=OUT)
    args = parser.parse_args(argv)
    if args.quick:
        args.repeats, args.image = 5, 512
    path = args.mesh or sorted(MESH.glob("*.ply"))[-1]
    mesh = read_mesh(path)
    print(f"{path.relative_to(ROOT) if path.is_relative_to(ROOT) else path}: {len(mesh.faces)} faces, "
          f"ray backend {ray_backend(mesh)}")
    load_before = os.getloadavg()
    rays = ray_rate(mesh, args.image, max(3, args.repeats // 5))
    scans = scan_rate(mesh, args.repeats)
    report = {
        "what": "scan_part camera rays per second (Embree through trimesh) and scans per second at 1024 points, "
                "against scan_view in the same process, interleaved repeats",
        "when": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "mesh": str(path.relative_to(ROOT)) if path.is_relative_to(ROOT) else str(path),
        "faces": len(mesh.faces),
        "ray_backend": ray_backend(mesh),
        "points": POINTS,
        "repeats": args.repeats,
        "image": args.image,
        "machine": machine(),
        "load_average_before": load_before,
        "load_average_after": os.getloadavg(),
        "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "rays": rays,
        "scans": scans,
    }
    args.out.parent.mkdir(parents=True, exist_ok=True)
    write_json(args.out, report)
    print(f"-> {args.out}")
    return report


if __name__ == "__main__":
    main()
