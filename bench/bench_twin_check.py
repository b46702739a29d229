"""Benchmark: the mirror-twin check of ``shapes sample`` (``sample.twins=auto``) on the demo catalog.

Runs :func:`shapes.data.resolve_twins` on ``demo_meshes/`` (every mesh of every class read and matched
against the others' mirror images) ``--repeats`` times, and records each run's wall time
(``time.perf_counter``) and this process's CPU time (``time.process_time``), with what the check found
(pairs, achiral classes, handed classes without a twin, warnings). Unless ``--no-sample``, it also times
sampling the same catalog with the sample section's defaults and the check off (``twins="declared"``), so
the check's share of ``shapes sample`` can be read off.

Writes ``bench/results/twin_check.json``.

    .venv/bin/python bench/bench_twin_check.py                 # a few minutes on 2 cores
    .venv/bin/python bench/bench_twin_check.py --no-sample --repeats 1
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

import torch  # noqa: E402

from bench_normals import machine  # noqa: E402  (the machine's description the other benches give)
from shapes._atomic import write_json  # noqa: E402
from shapes.data import build_dataset, read_catalog, resolve_twins  # noqa: E402

OUT = Path(__file__).resolve().parent / "results" / "twin_check.json"
DEMO = ROOT / "demo_meshes"


def timed(fn):
    wall, cpu = time.perf_counter(), time.process_time()
    out = fn()
    return out, time.perf_counter() - wall, time.process_time() - cpu


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--no-sample", action="store_true", help="time the check alone, not sampling")
    parser.add_argument("--out", type=Path, default=OUT)
    args = parser.parse_args(argv)
    catalog = read_catalog(DEMO)
    runs = []
    for _ in range(args.repeats):
        record, wall, cpu = timed(lambda: resolve_twins(catalog, "auto"))
        runs.append({"wall_seconds": wall, "cpu_seconds": cpu})
    result = {
        "what": "shapes.data.resolve_twins(demo_meshes, 'auto'): every mesh read and checked",
        "catalog": {"classes": len(catalog.classes), "meshes": len(catalog.instances)},
        "found": {k: record[k] for k in ("source", "pairs", "achiral", "unpaired", "warnings")},
        "runs": runs,
        "wall_seconds_min": min(r["wall_seconds"] for r in runs),
        "cpu_seconds_min": min(r["cpu_seconds"] for r in runs),
        "torch_threads": torch.get_num_threads(),
        "machine": machine(),
        "when": datetime.now(timezone.utc).isoformat(timespec="seconds"),
    }
    if not args.no_sample:
        with tempfile.TemporaryDirectory() as tmp:
            _, wall, cpu = timed(lambda: build_dataset(DEMO, Path(tmp) / "data", twins="declared"))
        result["sampling_defaults_check_off"] = {"wall_seconds": wall, "cpu_seconds": cpu,
                                                 "settings": "build_dataset's defaults (the sample section's)"}
    args.out.parent.mkdir(parents=True, exist_ok=True)
    write_json(args.out, result)
    print(f"twin check on {result['catalog']['meshes']} meshes: {result['wall_seconds_min']:.1f} s wall, "
          f"{result['cpu_seconds_min']:.1f} s CPU (best of {len(runs)}); "
          f"{len(record['pairs'])} pairs, {len(record['achiral'])} achiral, {len(record['warnings'])} warnings")
    if "sampling_defaults_check_off" in result:
        s = result["sampling_defaults_check_off"]
        print(f"sampling with the defaults, check off: {s['wall_seconds']:.1f} s wall, {s['cpu_seconds']:.1f} s CPU")
    print(f"wrote {args.out}")
    return result


if __name__ == "__main__":
    main()
