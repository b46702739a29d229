"""Benchmark of the harmonic-attention backbone: fast path vs dense reference, memory, FLOP rate, scaling.

Writes ``bench/results/harmonic.json``. Every measurement runs in a fresh subprocess so that its
peak resident memory (``ru_maxrss``, minus the RSS just before the first forward pass) belongs to
it alone. Times are forward + backward of ``features.square().sum()``, median of the repeats after
one warm-up. FLOPs are counted analytically (2 per multiply-add) from
``HarmonicAttentionBackbone.flop_counts``; forward + backward is taken as 3x the forward count.

    .venv/bin/python bench/bench_harmonic.py            # about 5 minutes on one core
    .venv/bin/python bench/bench_harmonic.py --quick    # smaller sizes, for a smoke test
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import resource
import statistics
import subprocess
import sys
import time
from pathlib import Path

CONFIGS = {
    2: {"l_max": 2, "channels": {0: 16, 1: 8, 2: 4}},
    3: {"l_max": 3, "channels": {0: 16, 1: 8, 2: 4, 3: 2}},
}
OUT = Path(__file__).resolve().parent / "results" / "harmonic.json"


def _rss_mb() -> float:
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20


def worker(spec: dict) -> dict:
    """One measurement: build, warm up, time forward+backward; runs inside its own process."""
    import torch

    torch.set_num_threads(spec["threads"])
    from shapes.backbones.harmonic_attention import HarmonicAttentionBackbone

    torch.manual_seed(0)
    options = {"edge_block": spec["edge_block"]} if "edge_block" in spec else {}
    net = HarmonicAttentionBackbone(k=spec["k"], normals=spec["normals"], **CONFIGS[spec["l_max"]], **options)
    points = torch.randn(spec["B"], spec["N"], 3, generator=torch.Generator().manual_seed(1))
    normals = None
    if spec["normals"]:  # random unit normals: the cost does not depend on their values
        normals = torch.randn(spec["B"], spec["N"], 3, generator=torch.Generator().manual_seed(2))
        normals = normals / normals.norm(dim=-1, keepdim=True)
    reference = spec["reference"]
    rss_before = _rss_mb()
    times, forward_times = [], []
    for rep in range(spec["repeats"] + 1):
        net.zero_grad(set_to_none=True)
        t0 = time.perf_counter()
        out = net(points, normals=normals, reference=reference)
        t1 = time.perf_counter()
        out.square().sum().backward()
        t2 = time.perf_counter()
        if rep:  # the first pass warms caches and allocators
            times.append(t2 - t0)
            forward_times.append(t1 - t0)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux: kB
    edges = spec["B"] * spec["N"] * spec["k"]
    flops = _forward_flops(net, edges, spec["B"] * spec["N"], reference)
    return {
        **spec,
        "seconds_fwd_bwd": statistics.median(times),
        "seconds_fwd": statistics.median(forward_times),
        "all_seconds_fwd_bwd": times,
        "peak_rss_mb": peak,
        "rss_before_mb": rss_before,
        "peak_extra_mb": peak - rss_before,
        "forward_flops": flops,
    }


def _forward_flops(net, edges: int, points: int, reference: bool) -> dict:
    """Analytic forward FLOPs (2 per multiply-add) of the dominant contractions."""
    total = {"angular": 0, "radial": 0, "logits": 0, "aggregate": 0, "mixing": 0, "reference_kernels": 0}
    for layer in net.flop_counts():
        if reference:
            total["reference_kernels"] += 2 * layer["reference_edge"] * edges
        else:
            for key, value in layer["edge"].items():
                total[key] += 2 * value * edges
            total["mixing"] += 2 * layer["point"]["mixing"] * points
    total["sum"] = sum(total.values())
    return total


def reference_kernel_gb(l_max: int, edges: int) -> float:
    """float32 GB of the dense per-edge kernels the reference keeps for backward (one copy each)."""
    from shapes.backbones.harmonic_attention import HarmonicAttentionBackbone

    net = HarmonicAttentionBackbone(**CONFIGS[l_max])
    floats = 0
    for layer in net.layers:
        for i, p in enumerate(layer.paths):
            copies = 2 if i in layer.key_paths else 1
            floats += copies * layer.types_out[p.t_out] * (2 * p.t_out[0] + 1) * layer.types_in[p.t_in] * (2 * p.t_in[0] + 1)
    return 4 * floats * edges / 1e9


def run(spec: dict) -> dict:
    """Run :func:`worker` in a fresh interpreter and return its result."""
    proc = subprocess.run(
        [sys.executable, __file__, "--worker", json.dumps(spec)], capture_output=True, text=True, check=False
    )
    if proc.returncode != 0:
        return {**spec, "error": proc.stderr.strip().splitlines()[-1] if proc.stderr.strip() else "failed"}
    return json.loads(proc.stdout.strip().splitlines()[-1])


def matmul_rate(threads: int, n: int = 2048, repeats: int = 10) -> dict:
    """float32 n x n matmul GFLOP/s on this machine, with the same thread count."""
    import torch

    torch.set_num_threads(threads)
    a, b = torch.randn(n, n), torch.randn(n, n)
    a @ b
    rates = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        a @ b
        rates.append(2 * n**3 / (time.perf_counter() - t0) / 1e9)
    return {"n": n, "threads": threads, "median_gflops": statistics.median(rates), "best_gflops": max(rates)}


def machine() -> dict:
    import torch

    cpu = platform.processor()
    try:
        with open("/proc/cpuinfo") as f:
            cpu = next((line.split(":", 1)[1].strip() for line in f if line.startswith("model name")), cpu)
    except OSError:
        pass
    return {
        "cpu": cpu,
        "cores": os.cpu_count(),
        "platform": platform.platform(),
        "python": platform.python_version(),
        "torch": torch.__version__,
        "load_average_start": os.getloadavg(),
    }


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--worker", help=argparse.SUPPRESS)
    parser.add_argument("--threads", type=int, default=1, help="torch threads per measurement (default 1)")
    parser.add_argument("--repeats", type=int, default=2, help="timed repeats after one warm-up")
    parser.add_argument("--quick", action="store_true", help="small sizes: a smoke test of the script")
    parser.add_argument("--normals", action=argparse.BooleanOptionalAction, default=True,
                        help="feed outward normals as the shipped configuration does (default; --no-normals: bare points)")
    parser.add_argument("--out", type=Path, default=OUT)
    args = parser.parse_args(argv)
    if args.worker:
        print(json.dumps(worker(json.loads(args.worker))))
        return

    from shapes._atomic import write_json

    base = {"threads": args.threads, "repeats": args.repeats, "k": 16, "normals": args.normals}
    full = {"B": 2, "N": 256} if args.quick else {"B": 8, "N": 1024}
    small = {"B": 1, "N": 128} if args.quick else {"B": 1, "N": 512}
    sizes = [256, 512] if args.quick else [512, 1024, 2048, 4096, 8192]
    result = {"machine": machine(), "matmul_float32": matmul_rate(args.threads)}
    peak = result["matmul_float32"]["median_gflops"]

    def with_rate(r):
        if "error" not in r:
            r["achieved_gflops"] = 3 * r["forward_flops"]["sum"] / r["seconds_fwd_bwd"] / 1e9
            r["fraction_of_matmul"] = r["achieved_gflops"] / peak
        return r

    result["full_size_fast"] = {}
    gb = reference_kernel_gb(2, full["B"] * full["N"] * base["k"])
    result["fast_vs_reference"] = {
        "note": (
            f"the dense reference keeps every per-edge kernel for backward (about {gb:.0f} GB of float32 "
            f"kernels alone at B={full['B']}, N={full['N']}, l_max=2), so both run at B={small['B']}, "
            f"N={small['N']} for the ratio"
        )
    }
    for l_max in CONFIGS:
        print(f"l_max = {l_max}: fast at B={full['B']}, N={full['N']} ...", flush=True)
        result["full_size_fast"][f"l_max={l_max}"] = with_rate(run({**base, **full, "l_max": l_max, "reference": False}))
        pair = {}
        for reference in (False, True):
            print(f"l_max = {l_max}: {'reference' if reference else 'fast'} at B={small['B']}, N={small['N']} ...", flush=True)
            pair["reference" if reference else "fast"] = with_rate(
                run({**base, **small, "l_max": l_max, "reference": reference})
            )
        if all("error" not in r for r in pair.values()):
            pair["speedup"] = pair["reference"]["seconds_fwd_bwd"] / pair["fast"]["seconds_fwd_bwd"]
        result["fast_vs_reference"][f"l_max={l_max}"] = pair

    # the same network in one piece: blocks of receivers only bound the size of the temporaries
    print(f"l_max = 2: fast in one piece at B={full['B']}, N={full['N']} ...", flush=True)
    whole = with_rate(run({**base, **full, "l_max": 2, "reference": False, "edge_block": 10**12}))
    blocks = result["full_size_fast"]["l_max=2"]
    result["blocks_vs_one_piece"] = {"one_piece": whole, "blocks": "full_size_fast l_max=2 (the default edge_block)"}
    if "error" not in whole and "error" not in blocks:
        result["blocks_vs_one_piece"]["speedup"] = whole["seconds_fwd_bwd"] / blocks["seconds_fwd_bwd"]

    scaling = []
    for n in sizes:
        print(f"scaling: l_max = 2, B = 1, N = {n} ...", flush=True)
        scaling.append(with_rate(run({**base, "B": 1, "N": n, "l_max": 2, "reference": False})))
    times = {r["N"]: r["seconds_fwd_bwd"] for r in scaling if "error" not in r}
    lo, hi = (1024, 8192) if not args.quick else (256, 512)
    slope = math.log(times[hi] / times[lo]) / math.log(hi / lo) if lo in times and hi in times else None
    result["scaling"] = {"B": 1, "k": 16, "l_max": 2, "runs": scaling, "loglog_slope": slope, "slope_between": [lo, hi]}
    result["targets"] = {
        "speedup_l_max_2": {"target": ">= 5", "measured": result["fast_vs_reference"]["l_max=2"].get("speedup")},
        "loglog_slope": {"target": "<= 1.2", "measured": slope},
        "blocks_vs_one_piece": {"target": "> 1", "measured": result["blocks_vs_one_piece"].get("speedup")},
    }
    result["machine"]["load_average_end"] = os.getloadavg()
    result["memory_method"] = "peak RSS (ru_maxrss) of a fresh subprocess per measurement; peak_extra_mb subtracts the RSS before the first forward"
    args.out.parent.mkdir(parents=True, exist_ok=True)
    write_json(args.out, result)
    print(json.dumps(result["targets"], indent=1))
    print(f"wrote {args.out}")


if __name__ == "__main__":
    main()
