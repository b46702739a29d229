"""Benchmark: smooth neighbourhoods (``smooth_neighbours: true``) against the old hard kNN graph.

For every backbone with neighbourhoods (distance, vector_gate, harmonic_attention), in one process:

- speed: forward time (eval, no grad, float32) at its shipped options (``shapes/conf/backbone/*.yaml``)
  on B clouds of N = 512 points, smooth and old repeats interleaved A B A B ... so that load from
  other jobs falls on both alike; the figure to read is ``ratio`` = median smooth / median old;
- invariance: on points on a lattice (a box's faces on a square lattice, a cylinder on an angle x
  height lattice, a screw lattice), where many neighbours tie in distance, the largest relative change
  of the features (float64 and float32, eval) over 50 Haar rotations plus translations, smooth and old.
  These use the small options of the test table (tests/test_backbones.py), k = 8.

"old" is the current code with ``smooth_neighbours: false``; for vector_gate that code also has the
floored pseudo-channel norms (they are not behind the option). Writes
``bench/results/neighbourhood.json``.

    .venv/bin/python bench/bench_neighbourhood.py            # about two minutes on one core
    .venv/bin/python bench/bench_neighbourhood.py --quick    # fewer repeats, a smoke test
"""

from __future__ import annotations

import argparse
import math
import platform
import statistics
import sys
import time
from datetime import datetime, timezone
from pathlib import Path

import torch
import yaml

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from shapes._atomic import write_json  # noqa: E402
from shapes.backbones import build_backbone  # noqa: E402
from shapes.geometry import uniform_rotations  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "bench" / "results" / "neighbourhood.json"
NAMES = ["distance", "vector_gate", "harmonic_attention"]
SMALL = {  # the table of tests/test_backbones.py, on bare points (the lattices carry no normals)
    "distance": {"hidden": 16, "layers": 2, "k": 8},
    "vector_gate": {"scalars": 16, "vectors": 8, "layers": 2, "k": 8, "normals": False},
    "vector_gate_e3": {"scalars": 16, "vectors": 8, "layers": 2, "k": 8, "normals": False, "symmetry": "e3"},
    "harmonic_attention": {"l_max": 1, "channels": {0: 8, 1: 4}, "layers": 2, "k": 8, "heads": 2, "normals": False},
    "harmonic_attention_e3": {"l_max": 1, "channels": {0: 8, 1: 4}, "layers": 2, "k": 8, "heads": 2,
                              "normals": False, "symmetry": "e3"},
}


def shipped(name: str) -> dict:
    conf = yaml.safe_load((ROOT / "shapes" / "conf" / "backbone" / f"{name}.yaml").read_text())
    conf.pop("_target_")
    return conf


def normalised(points: torch.Tensor) -> torch.Tensor:
    points = points - points.mean(0)
    return (points / points.square().sum(-1).mean().sqrt())[None]


def box_lattice(n: int = 6) -> torch.Tensor:
    g = torch.arange(n + 1, dtype=torch.float64)
    pts = torch.cartesian_prod(g, g, g)
    return normalised(pts[((pts == 0) | (pts == n)).any(-1)])


def cylinder_lattice(m: int = 16, h: int = 8) -> torch.Tensor:
    a = torch.arange(m, dtype=torch.float64) * 2 * math.pi / m
    z = torch.arange(h, dtype=torch.float64) * 2 * math.sin(2 * math.pi / m)
    A, Z = torch.meshgrid(a, z, indexing="ij")
    return normalised(torch.stack([A.cos(), A.sin(), Z], -1).reshape(-1, 3))


def helix_lattice(m: int = 16, h: int = 10, twist: float = 0.4) -> torch.Tensor:
    a = torch.arange(m, dtype=torch.float64) * 2 * math.pi / m
    b = torch.arange(h, dtype=torch.float64)
    dz = math.sqrt((2 * math.sin(2 * math.pi / m)) ** 2 - (2 * math.sin(twist / 2)) ** 2)
    A, B = torch.meshgrid(a, b, indexing="ij")
    return normalised(torch.stack([(A + twist * B).cos(), (A + twist * B).sin(), dz * B], -1).reshape(-1, 3))


CLOUDS = {"box": box_lattice, "cylinder": cylinder_lattice, "helix": helix_lattice}


def build(name: str, options: dict, smooth: bool, dtype) -> torch.nn.Module:
    torch.manual_seed(0)
    base = name.split("_e3")[0]
    return build_backbone(base, **{**options, "smooth_neighbours": smooth}).to(dtype).eval()


def invariance(name: str, smooth: bool, dtype) -> dict:
    net = build(name, SMALL[name], smooth, dtype)
    out = {}
    for cloud, make in CLOUDS.items():
        x = make().to(dtype)
        R = uniform_rotations(50, generator=torch.Generator().manual_seed(1), dtype=dtype)
        t = torch.randn(50, 1, 3, generator=torch.Generator().manual_seed(2), dtype=dtype)
        with torch.no_grad():
            base = net(x)
            moved = net(x.expand(50, -1, -1) @ R.transpose(-1, -2) + t)
        out[cloud] = float((moved - base).abs().max() / base.abs().max())
    return out


def timing(name: str, batch: int, n: int, repeats: int) -> dict:
    options = shipped(name)
    nets = {smooth: build(name, options, smooth, torch.float32) for smooth in (True, False)}
    gen = torch.Generator().manual_seed(0)
    x = torch.randn(batch, n, 3, generator=gen)
    normals = torch.nn.functional.normalize(torch.randn(batch, n, 3, generator=gen), dim=-1)
    kwargs = {"normals": normals} if nets[True].uses_normals else {}
    times = {True: [], False: []}
    with torch.no_grad():
        for smooth in (True, False):  # warm-up
            nets[smooth](x, **kwargs)
        for _ in range(repeats):
            for smooth in (True, False):
                start = time.perf_counter()
                nets[smooth](x, **kwargs)
                times[smooth].append(time.perf_counter() - start)
    smooth_s, old_s = statistics.median(times[True]), statistics.median(times[False])
    return {"options": options, "smooth_s": smooth_s, "old_s": old_s, "ratio": smooth_s / old_s}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repeats and a smaller batch")
    parser.add_argument("--threads", type=int, default=1)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    batch, n, repeats = (2, 512, 3) if args.quick else (4, 512, 15)
    result = {
        "when": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "machine": {"python": platform.python_version(), "torch": torch.__version__, "threads": args.threads,
                    "processor": platform.processor() or platform.machine()},
        "speed": {"batch": batch, "points": n, "repeats": repeats, "what": "forward, eval, no grad, float32",
                  "backbones": {}},
        "invariance": {"what": "max |f(R x + t) - f(x)| / max |f(x)| over 50 rotations, lattice clouds, k = 8",
                       "points": {c: int(make().shape[1]) for c, make in CLOUDS.items()}, "backbones": {}},
    }
    for name in NAMES:
        result["speed"]["backbones"][name] = timing(name, batch, n, repeats)
        print(f"{name:20s} smooth/old forward time {result['speed']['backbones'][name]['ratio']:.3f}", flush=True)
    for name in SMALL:
        entry = {}
        for label, dtype in (("float64", torch.float64), ("float32", torch.float32)):
            entry[label] = {"smooth": invariance(name, True, dtype), "old": invariance(name, False, dtype)}
        result["invariance"]["backbones"][name] = entry
        f64 = entry["float64"]
        print(f"{name:24s} float64 old " + " ".join(f"{c}={v:.1e}" for c, v in f64["old"].items())
              + " | smooth " + " ".join(f"{c}={v:.1e}" for c, v in f64["smooth"].items()), flush=True)
    OUT.parent.mkdir(parents=True, exist_ok=True)
    write_json(OUT, result)
    print(f"wrote {OUT}")


if __name__ == "__main__":
    main()
