"""Benchmark: points per second of ``shapes.data.estimate_normals`` at N = 2k, 20k and 200k.

Points are drawn uniformly on the surface of a closed cylinder (caps included) with trimesh's
sampler. Each size is timed ``--repeats`` times after one warm-up call, with MST orientation (no
viewpoint) and with a viewpoint, the repeats of the two interleaved so load from other jobs on a
shared machine falls on both alike. The figure is N / median wall-clock seconds.

Writes ``bench/results/normals.json``.

    .venv/bin/python bench/bench_normals.py            # about half a minute on one core
    .venv/bin/python bench/bench_normals.py --quick    # 2k and 20k only, a smoke test
"""

from __future__ import annotations

import argparse
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

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from shapes._atomic import write_json  # noqa: E402
from shapes.data import estimate_normals  # noqa: E402

OUT = Path(__file__).resolve().parent / "results" / "normals.json"
SIZES = (2_000, 20_000, 200_000)
VIEWPOINT = (0.0, 0.0, 10.0)


def machine() -> dict:
    return {"platform": platform.platform(), "processor": platform.processor() or platform.machine(),
            "python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__,
            "cpu_count": os.cpu_count()}


def timed(points: np.ndarray, k: int, viewpoint) -> float:
    start = time.perf_counter()
    estimate_normals(points, k=k, viewpoint=viewpoint)
    return time.perf_counter() - start


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--k", type=int, default=16)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--quick", action="store_true", help="2k and 20k points only")
    parser.add_argument("--out", type=Path, default=OUT)
    args = parser.parse_args(argv)
    sizes = SIZES[:2] if args.quick else SIZES
    mesh = trimesh.creation.cylinder(radius=1.0, height=3.0, sections=256)
    load_before = os.getloadavg()
    results = {}
    for n in sizes:
        points, _ = trimesh.sample.sample_surface(mesh, n, seed=0)
        points = np.asarray(points, dtype=np.float64)
        times = {"mst-propagation": [], "viewpoint": []}
        timed(points, args.k, None)  # warm-up
        for _ in range(args.repeats):
            times["mst-propagation"].append(timed(points, args.k, None))
            times["viewpoint"].append(timed(points, args.k, VIEWPOINT))
        results[str(n)] = {name: {"seconds_median": statistics.median(t), "seconds_all": t,
                                  "points_per_second": n / statistics.median(t)} for name, t in times.items()}
        print(f"N = {n:7d}: " + ", ".join(f"{name} {r['points_per_second']:,.0f} points/s"
                                          for name, r in results[str(n)].items()))
    report = {
        "what": "estimate_normals wall-clock time, closed cylinder surface samples, interleaved repeats",
        "when": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "k": args.k,
        "repeats": args.repeats,
        "machine": machine(),
        "load_average_before": load_before,
        "load_average_after": os.getloadavg(),
        "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "sizes": results,
    }
    args.out.parent.mkdir(parents=True, exist_ok=True)
    write_json(args.out, report)
    print(f"-> {args.out}")
    return report


if __name__ == "__main__":
    main()
