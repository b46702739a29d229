"""Benchmark: vector-gated backbone against harmonic-filter attention, forward + backward per batch.

Both backbones run in the same process on the same batch (B = 8 clouds of N = 1024 points, k = 16
neighbours by default), their repeats interleaved A B A B ... so that load from other jobs on a
shared machine falls on both alike; the figure to read is the ratio of the medians. Time is one
forward pass plus the backward of ``features.square().sum()``, after one warm-up pass each.
Widths are stated in the JSON as floats carried per point, so "comparable width" is a number:

- vector_gate: ``scalars`` + 3 ``vectors`` + (handed) ``vectors`` pseudo-scalars + 3 ``vectors``,
  at its default width and at a width (``vectors: 16``) above the harmonic one;
- harmonic_attention: sum over degrees ``l`` of ``channels[l] (2l + 1)``, twice with symmetry se3.

Writes ``bench/results/vector_gate.json``.

    .venv/bin/python bench/bench_vector_gate.py              # a few minutes on one core
    .venv/bin/python bench/bench_vector_gate.py --quick      # smaller batch, a smoke test
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import statistics
import sys
import time
from datetime import datetime, timezone
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from shapes._atomic import write_json  # noqa: E402
from shapes.backbones import build_backbone  # noqa: E402

OUT = Path(__file__).resolve().parent / "results" / "vector_gate.json"

# Both backbones at their shipped widths (conf/backbone/*.yaml) and vector_gate also at a width
# at least the harmonic one's, so that "comparable width" holds either way round.
CASES = {
    "vector_gate": ("vector_gate", {"scalars": 32, "vectors": 8, "layers": 3, "symmetry": "se3",
                                    "normals": False}),  # layers as harmonic
    "vector_gate_wide": ("vector_gate", {"scalars": 32, "vectors": 16, "layers": 3, "symmetry": "se3",
                                         "normals": False}),
    "harmonic_attention": ("harmonic_attention", {"l_max": 2, "channels": {0: 16, 1: 8, 2: 4}, "layers": 3,
                                                  "symmetry": "se3", "normals": False}),
}


def per_point_width(name: str, options: dict) -> int:
    """Floats carried per point between layers."""
    if name == "vector_gate":
        S, V = options["scalars"], options["vectors"]
        return S + 3 * V + ((V + 3 * V) if options.get("symmetry", "se3") == "se3" else 0)
    width = sum(c * (2 * int(l) + 1) for l, c in options["channels"].items())
    return width * (2 if options.get("symmetry", "se3") == "se3" else 1)


def machine() -> dict:
    info = {
        "platform": platform.platform(),
        "processor": platform.processor() or platform.machine(),
        "python": platform.python_version(),
        "torch": torch.__version__,
        "cpu_count": os.cpu_count(),
        "torch_threads": torch.get_num_threads(),
    }
    try:
        with open("/proc/cpuinfo") as f:
            names = [line.split(":", 1)[1].strip() for line in f if line.startswith("model name")]
        info["cpu_model"] = names[0] if names else None
    except OSError:
        info["cpu_model"] = None
    return info


def step(net: torch.nn.Module, points: torch.Tensor) -> float:
    net.zero_grad(set_to_none=True)
    t0 = time.perf_counter()
    net(points).square().sum().backward()
    return time.perf_counter() - t0


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--batch", type=int, default=8)
    parser.add_argument("--points", type=int, default=1024)
    parser.add_argument("--k", type=int, default=16)
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--quick", action="store_true", help="B=2, N=256, 2 repeats")
    parser.add_argument("--out", type=Path, default=OUT)
    args = parser.parse_args(argv)
    if args.quick:
        args.batch, args.points, args.repeats = 2, 256, 2
    torch.set_num_threads(args.threads)

    nets = {}
    for case, (name, options) in CASES.items():
        torch.manual_seed(0)
        try:
            nets[case] = (build_backbone(name, k=args.k, **options), options)
        except ImportError as exc:  # the other backbone may not have landed yet
            print(f"skipping {case}: {exc}")
    points = torch.randn(args.batch, args.points, 3, generator=torch.Generator().manual_seed(1))

    load_before = os.getloadavg()
    times: dict[str, list[float]] = {name: [] for name in nets}
    for name, (net, _) in nets.items():
        step(net, points)  # warm-up: allocator, caches
    for _ in range(args.repeats):
        for name, (net, _) in nets.items():
            times[name].append(step(net, points))
    load_after = os.getloadavg()

    results = {}
    for name, (net, options) in nets.items():
        results[name] = {
            "backbone": CASES[name][0],
            "options": {**options, "k": args.k},
            "per_point_width": per_point_width(CASES[name][0], options),
            "out_features": net.out_features,
            "parameters": sum(p.numel() for p in net.parameters()),
            "symmetry": net.symmetry,
            "seconds_fwd_bwd_median": statistics.median(times[name]),
            "seconds_fwd_bwd_all": times[name],
        }
    report = {
        "what": "forward + backward time per batch, same process, interleaved repeats",
        "when": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "batch": args.batch,
        "points": args.points,
        "k": args.k,
        "repeats": args.repeats,
        "machine": machine(),
        "load_average_before": load_before,
        "load_average_after": load_after,
        "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "backbones": results,
    }
    if "harmonic_attention" in results:
        slow = results["harmonic_attention"]["seconds_fwd_bwd_median"]
        for name in ("vector_gate", "vector_gate_wide"):
            if name in results:
                report[f"speedup_{name}_over_harmonic"] = slow / results[name]["seconds_fwd_bwd_median"]
        report["target_speedup"] = 3.0
    args.out.parent.mkdir(parents=True, exist_ok=True)
    write_json(args.out, report)
    for name, r in results.items():
        print(f"{name:20s} width {r['per_point_width']:4d}  {r['seconds_fwd_bwd_median']:.3f} s fwd+bwd")
    for key, value in report.items():
        if key.startswith("speedup_"):
            print(f"{key}: {value:.2f}x (target 3x)")
    print(f"-> {args.out}")
    return report


if __name__ == "__main__":
    main()
