"""Benchmark the geometry core against straightforward implementations measured in the same run.

Cases
-----
- Real spherical harmonics of 1M float32 vectors at l_max = 3 and 6: our recurrence against a
  naive per-(l, m) evaluation of the closed form (associated Legendre polynomial built from its
  Rodrigues definition, evaluated in cos(theta), times cos/sin(m phi) and the normalisation).
- k-nearest neighbours, B = 16, N = 1024, k = 16: ``knn_graph`` against dense ``torch.cdist`` +
  ``topk``; plus one large cloud (B = 1, N = 16384) where the dense matrix is 1 GiB.

What is measured
----------------
- time: median wall-clock seconds over ``--repeats`` calls after one warm-up call; the two sides
  of each comparison alternate call by call in one process, so load from other jobs on the
  shared machine hits both alike (the ratios are the figures to read, not the absolute times).
- peak_rss_mib: growth of the process's peak resident set (VmHWM, reset through
  /proc/self/clear_refs; ``resource.getrusage`` max RSS where that is missing) during the first
  call, in a fresh subprocess per case: the extra memory the call needed at its peak, outputs
  included (inputs already allocated are not counted).
- largest_buffer_mib (knn): size of the largest distance block, from the shapes.

Run: ``.venv/bin/python bench/bench_geometry.py`` (about 1-2 min); writes bench/results/geometry.json.
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

import numpy as np
import torch

RESULTS = Path(__file__).resolve().parent / "results" / "geometry.json"
N_VECTORS = 1_000_000  # the size a backbone sees per batch: B * N * k edges, e.g. 16 * 1024 * 64
KNN_SHAPE = (16, 1024, 16)  # (B, N, k): a training batch of clouds
BIG_KNN_SHAPE = (1, 16384, 16)  # one dense scan: the dense N x N matrix is 1 GiB in float32


# ----------------------------------------------------------------------------------------------
# Straightforward references
# ----------------------------------------------------------------------------------------------


def _legendre_tables(l_max: int) -> dict:
    """Per (l, m >= 0): coefficients of d^m/dx^m P_l(x) (Rodrigues' formula) and the normalisation."""
    P = np.polynomial.Polynomial
    tables = {}
    for l in range(l_max + 1):
        # P_l(x) = 1 / (2^l l!) d^l/dx^l (x^2 - 1)^l
        p_l = (P([-1, 0, 1]) ** l).deriv(l) / (2**l * math.factorial(l))
        for m in range(l + 1):
            coef = p_l.deriv(m).coef if m > 0 else p_l.coef
            norm = math.sqrt((2 * l + 1) / (4 * math.pi) * math.factorial(l - m) / math.factorial(l + m))
            tables[l, m] = (list(coef), norm)
    return tables


def naive_harmonics(l_max: int, v: torch.Tensor, tables: dict) -> list[torch.Tensor]:
    """Closed form per (l, m): Y_lm = sqrt2 N_lm sin^m(theta) P_l^(m)(cos theta) {cos, sin}(m phi)."""
    r = v.norm(dim=-1)
    theta = torch.acos((v[..., 2] / r).clamp(-1, 1))
    phi = torch.atan2(v[..., 1], v[..., 0])
    ct, st = torch.cos(theta), torch.sin(theta)
    out = []
    for l in range(l_max + 1):
        cols = []
        for m in range(-l, l + 1):
            coef, norm = tables[l, abs(m)]
            poly = torch.zeros_like(ct)
            for c in reversed(coef):  # Horner
                poly = poly * ct + c
            radial = norm * st ** abs(m) * poly
            if m > 0:
                cols.append(math.sqrt(2) * radial * torch.cos(m * phi))
            elif m == 0:
                cols.append(radial)
            else:
                cols.append(math.sqrt(2) * radial * torch.sin(-m * phi))
        out.append(torch.stack(cols, -1))
    return out


def dense_knn(points: torch.Tensor, k: int) -> torch.Tensor:
    """Brute force: the full (B, N, N) distance matrix, self excluded, then topk."""
    d = torch.cdist(points, points)
    d.diagonal(dim1=1, dim2=2).fill_(math.inf)
    return d.topk(k, dim=-1, largest=False).indices


# ----------------------------------------------------------------------------------------------
# One case per subprocess
# ----------------------------------------------------------------------------------------------


def _reset_peak() -> None:
    """Reset the kernel's peak-RSS mark (Linux >= 4.0); exec'd children otherwise inherit the parent's."""
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
    except OSError:
        pass


def _peak_rss_mib() -> float:
    """Peak resident set (VmHWM) in MiB; falls back to ``resource.getrusage`` max RSS."""
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux reports KiB


def _build_case(name: str):
    """Return (callable, extra info) for a case; inputs are allocated here, before measuring."""
    from shapes.geometry import knn_graph, spherical_harmonics

    gen = torch.Generator().manual_seed(0)
    if name.startswith("harmonics"):
        _, kind, l_str = name.split("_")
        l_max = int(l_str[1:])
        v = torch.randn(N_VECTORS, 3, generator=gen)
        if kind == "recurrence":
            return (lambda: spherical_harmonics(l_max, v)), {"l_max": l_max, "n": N_VECTORS, "dtype": "float32"}
        tables = _legendre_tables(l_max)
        return (lambda: naive_harmonics(l_max, v, tables)), {"l_max": l_max, "n": N_VECTORS, "dtype": "float32"}
    if name.startswith("knn"):
        B, N, k = BIG_KNN_SHAPE if name.endswith("_big") else KNN_SHAPE
        pts = torch.randn(B, N, 3, generator=gen)
        info = {"B": B, "N": N, "k": k, "dtype": "float32"}
        if name.startswith("knn_dense"):
            info["largest_buffer_mib"] = B * N * N * 4 / 2**20
            return (lambda: dense_knn(pts, k)), info
        from shapes.geometry._neighbours import _BLOCK_ELEMENTS

        rows = max(1, min(1024, _BLOCK_ELEMENTS // (B * N)))
        info["largest_buffer_mib"] = B * rows * N * 4 / 2**20
        return (lambda: knn_graph(pts, k)), info
    raise SystemExit(f"unknown case {name!r}")


def run_case(name: str, threads: int) -> dict:
    """Peak memory of one first call, in a fresh process (so earlier cases do not mask it)."""
    torch.set_num_threads(threads)
    fn, info = _build_case(name)
    _reset_peak()
    before = _peak_rss_mib()
    fn()
    return {"case": name, **info, "peak_rss_mib": _peak_rss_mib() - before}


def time_pair(ours: str, reference: str, repeats: int) -> dict:
    """Median times of two cases measured alternately in this process, so that load from other
    jobs on the shared machine hits both alike; the ratio is what the figures are for."""
    fns = {name: _build_case(name)[0] for name in (ours, reference)}
    for fn in fns.values():
        fn()  # warm-up
    times = {name: [] for name in fns}
    for _ in range(repeats):
        for name, fn in fns.items():
            t0 = time.perf_counter()
            fn()
            times[name].append(time.perf_counter() - t0)
    return {name: {"median_s": statistics.median(t), "times_s": t} for name, t in times.items()}


def _agreement() -> dict:
    """Max |ours - naive| in float64 on 10k vectors, and whether the knn sets agree (same run)."""
    from shapes.geometry import knn_graph, spherical_harmonics

    gen = torch.Generator().manual_seed(1)
    v = torch.randn(10_000, 3, generator=gen, dtype=torch.float64)
    ours = spherical_harmonics(6, v)
    ref = naive_harmonics(6, v, _legendre_tables(6))
    pts = torch.randn(2, 512, 3, generator=gen)
    same = torch.equal(knn_graph(pts, 16).index.sort(-1).values, dense_knn(pts, 16).sort(-1).values)
    return {
        "harmonics_max_abs_diff_float64_l6": max(float((a - b).abs().max()) for a, b in zip(ours, ref)),
        "knn_same_neighbour_sets": bool(same),
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--case", help="run one case and print its JSON (used internally)")
    parser.add_argument("--repeats", type=int, default=5)
    # One thread by default: the 2-core machine is shared, and contended multi-threaded ops
    # distort timings far more than single-threaded ones (ratios are what we compare).
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--out", type=Path, default=RESULTS)
    args = parser.parse_args()
    if args.case:
        print(json.dumps(run_case(args.case, args.threads)))
        return

    pairs = [
        ("harmonics_recurrence_l3", "harmonics_naive_l3"),
        ("harmonics_recurrence_l6", "harmonics_naive_l6"),
        ("knn_chunked", "knn_dense"),
        ("knn_chunked_big", "knn_dense_big"),
    ]
    load_start = os.getloadavg()
    torch.set_num_threads(args.threads)
    # Memory first, each case in a fresh process, while this process is still small.
    results = {}
    for name in [n for pair in pairs for n in pair]:
        cmd = [sys.executable, __file__, "--case", name, "--threads", str(args.threads)]
        out = subprocess.run(cmd, check=True, capture_output=True, text=True)
        results[name] = json.loads(out.stdout.strip().splitlines()[-1])
    for ours, reference in pairs:
        repeats = 3 if ours.endswith("_big") else args.repeats
        timed = time_pair(ours, reference, repeats)
        for name in (ours, reference):
            results[name].update(timed[name])
            print(f"{name:26s} median {results[name]['median_s']:.4f} s  peak +{results[name]['peak_rss_mib']:.0f} MiB")

    def ratio(slow, fast, key):
        return results[slow][key] / max(results[fast][key], 1e-9)

    summary = {
        "harmonics_l3_speedup_vs_naive": ratio("harmonics_naive_l3", "harmonics_recurrence_l3", "median_s"),
        "harmonics_l6_speedup_vs_naive": ratio("harmonics_naive_l6", "harmonics_recurrence_l6", "median_s"),
        "harmonics_l6_memory_ratio_naive_over_ours": ratio("harmonics_naive_l6", "harmonics_recurrence_l6", "peak_rss_mib"),
        "knn_speedup_vs_dense": ratio("knn_dense", "knn_chunked", "median_s"),
        "knn_memory_ratio_dense_over_ours": ratio("knn_dense", "knn_chunked", "peak_rss_mib"),
        "knn_big_speedup_vs_dense": ratio("knn_dense_big", "knn_chunked_big", "median_s"),
        "knn_big_memory_ratio_dense_over_ours": ratio("knn_dense_big", "knn_chunked_big", "peak_rss_mib"),
        **_agreement(),
    }
    report = {
        "machine": {
            "torch": torch.__version__,
            "numpy": np.__version__,
            "python": platform.python_version(),
            "platform": platform.platform(),
            "cpu_count": os.cpu_count(),
            "torch_threads": args.threads,
            "load_average_at_start": load_start,
            "load_average_at_end": os.getloadavg(),
        },
        "method": {
            "time": "median wall-clock over repeats after one warm-up call; the two sides of each ratio alternate in one process",
            "peak_rss_mib": "growth of peak RSS (VmHWM after a clear_refs reset) during the first call, fresh subprocess per case, outputs included",
            "naive_harmonics": "per-(l, m) closed form from the Rodrigues definition of P_l, Horner in cos(theta)",
            "dense_knn": "torch.cdist (B, N, N) + topk",
        },
        "summary": summary,
        "cases": results,
    }
    from shapes._atomic import write_json

    args.out.parent.mkdir(parents=True, exist_ok=True)
    write_json(args.out, report)
    print(json.dumps(summary, indent=2))


if __name__ == "__main__":
    main()
