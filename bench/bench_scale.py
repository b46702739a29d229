"""Benchmark: training throughput in one and two processes, and the peak memory of loading 200 000 clouds.

Throughput: the demo catalog sampled as surface clouds (``--points`` each, two copies per training instance:
256 training clouds) trains a small ``distance`` backbone for ``--epochs`` epochs with a global batch of 32,
three ways: one process on one thread, one process on two threads, and two processes of one thread each
under ``torchrun`` (gloo on the loopback interface). The figure is training clouds per second over the
epochs after the first (``train_seconds`` of each row of ``train_history.json``: the steps, not the
validation), and its ratio to one process on one thread, measured in the same run of this script.

Memory: a dataset folder of ``--clouds`` clouds of ``--cloud-points`` points (random points and normals; the
demo's classes) is written to a temporary folder, as the ``train.npz`` shard ``shapes sample`` writes and as
plain ``.npy`` arrays. A fresh Python process resets the kernel's high-water mark (writes ``5`` to
``/proc/self/clear_refs``), then either loads the shard with ``shapes.data.load_split`` (the loader
training uses, which reads the arrays whole) or opens the ``.npy`` arrays with ``numpy.load(mmap_mode="r")``
and gathers ``--batches`` random batches of 32 clouds from them, as a training loop would; it reports
``VmHWM`` from ``/proc/self/status`` minus the ``VmRSS`` before.

Writes ``bench/results/scale.json``.

    .venv/bin/python bench/bench_scale.py              # about five minutes on 2 cores
    .venv/bin/python bench/bench_scale.py --quick      # 20 000 clouds, two epochs: a smoke test
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import socket
import subprocess
import sys
import tempfile
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_normals import machine  # noqa: E402  (the machine's description the other benches give)
from shapes._atomic import write_json  # noqa: E402

OUT = Path(__file__).resolve().parent / "results" / "scale.json"
MODEL = ["backbone=distance", "backbone.hidden=32", "backbone.k=12", "backbone.layers=2", "train.batch_size=32",
         "train.dropout=0"]

_MEASURE = r"""
import json, sys, time
import numpy as np

def status(key):
    for line in open("/proc/self/status"):
        if line.startswith(key + ":"):
            return int(line.split()[1]) / 1024.0  # kB -> MB

folder, how, batches = sys.argv[1], sys.argv[2], int(sys.argv[3])
if how == "load_split":
    from shapes.data import load_split
with open("/proc/self/clear_refs", "w") as handle:
    handle.write("5")  # reset VmHWM to the current RSS (Linux, proc(5))
before = status("VmRSS")
start = time.perf_counter()
if how == "load_split":
    split = load_split(folder, "train")
    clouds = len(split.labels)
else:
    points = np.load(folder + "/points.npy", mmap_mode="r")
    normals = np.load(folder + "/normals.npy", mmap_mode="r")
    clouds, rng, total = len(points), np.random.default_rng(0), 0.0
    for _ in range(batches):
        pick = np.sort(rng.choice(clouds, 32, replace=False))
        total += float(np.asarray(points[pick]).sum() + np.asarray(normals[pick]).sum())
seconds = time.perf_counter() - start
print(json.dumps({"rss_before_mb": before, "peak_mb": status("VmHWM"), "peak_over_start_mb": status("VmHWM") - before,
                  "seconds": seconds, "clouds": clouds,
                  # at the end: file pages of a memory map count in the RSS until the kernel needs them back
                  "rss_anon_end_mb": status("RssAnon"), "rss_file_end_mb": status("RssFile")}))
"""


def _env() -> dict:
    return {**os.environ, "PYTHONPATH": str(ROOT), "GLOO_SOCKET_IFNAME": "lo"}


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _shapes(argv: list[str], cwd: Path, processes: int = 1) -> None:
    launcher = [sys.executable, "-m", "shapes"] if processes == 1 else [
        sys.executable, "-m", "torch.distributed.run", f"--nproc_per_node={processes}", "--master_addr=127.0.0.1",
        f"--master_port={_free_port()}", "-m", "shapes"]
    subprocess.run(launcher + argv, cwd=cwd, env=_env(), check=True, capture_output=True, text=True)


def throughput(folder: Path, points: int, epochs: int) -> dict:
    data = folder / "data"
    _shapes(["sample", f"meshes={ROOT / 'demo_meshes'}", f"data={data}", f"sample.points={points}",
             "sample.mode=surface", "sample.copies={train: 2, val: 1, test: 1}", "sample.oversample=1"], folder)
    ways = {"1 process x 1 thread": (1, 1), "1 process x 2 threads": (1, 2), "2 processes x 1 thread": (2, 1)}
    out = {}
    for name, (processes, threads) in ways.items():
        run = folder / name.replace(" ", "_")
        run.mkdir()
        _shapes(["train", f"data={data}", *MODEL, f"train.epochs={epochs}", f"train.threads={threads}"],
                run, processes)
        (history_file,) = run.glob("runs/train/*/train_history.json")
        rows = json.loads(history_file.read_text())["history"][1:]  # the first epoch warms up
        clouds = json.loads((data / "meta.json").read_text())["counts"]["train"]
        seconds = sum(r["train_seconds"] for r in rows)
        out[name] = {"processes": processes, "threads": threads, "epochs_timed": len(rows),
                     "train_seconds": seconds, "clouds_per_second": clouds * len(rows) / seconds}
    base = out["1 process x 1 thread"]["clouds_per_second"]
    for row in out.values():
        row["ratio_to_1x1"] = row["clouds_per_second"] / base
        print(f"{row['processes']} process(es) x {row['threads']} thread(s): {row['clouds_per_second']:7.1f} "
              f"clouds/s ({row['ratio_to_1x1']:.2f}x)")
    return out


def write_dataset(folder: Path, meta_from: Path, clouds: int, points: int) -> Path:
    """A dataset folder of random clouds: meta.json (the demo's classes) and train.npz, plus .npy arrays."""
    folder.mkdir()
    meta = json.loads((meta_from / "meta.json").read_text())
    meta["counts"] = {"train": clouds, "val": 0, "test": 0}
    (folder / "meta.json").write_text(json.dumps(meta))
    rng = np.random.default_rng(0)
    arrays = {name: np.lib.format.open_memmap(folder / f"{name}.npy", mode="w+", dtype=np.float32,
                                              shape=(clouds, points, 3)) for name in ("points", "normals")}
    for start in range(0, clouds, 10_000):  # filled in blocks: this process never holds the whole array
        stop = min(start + 10_000, clouds)
        arrays["points"][start:stop] = rng.standard_normal((stop - start, points, 3), dtype=np.float32)
        n = rng.standard_normal((stop - start, points, 3), dtype=np.float32)
        arrays["normals"][start:stop] = n / np.linalg.norm(n, axis=-1, keepdims=True)
    for a in arrays.values():
        a.flush()
    small = {"labels": rng.integers(0, len(meta["classes"]), clouds), "instance": np.arange(clouds) // 8,
             "scale": np.ones(clouds, dtype=np.float32)}
    np.savez(folder / "train.npz", points=arrays["points"], normals=arrays["normals"], **small)
    return folder


def memory(folder: Path, batches: int) -> dict:
    out = {}
    for how in ("load_split", "numpy_mmap"):
        done = subprocess.run([sys.executable, "-c", _MEASURE, str(folder), how, str(batches)], capture_output=True,
                              text=True, env=_env(), check=True)
        result = json.loads(done.stdout.strip().splitlines()[-1])
        out[how] = result
        print(f"{how:11s} {result['clouds']:>8,} clouds: peak {result['peak_over_start_mb']:8.1f} MB over start, "
              f"{result['seconds']:.1f} s")
    out["shard_mb"] = (folder / "train.npz").stat().st_size / 1024**2
    return out


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=int, default=256, help="points per cloud of the throughput runs")
    parser.add_argument("--epochs", type=int, default=4)
    parser.add_argument("--clouds", type=int, default=200_000)
    parser.add_argument("--cloud-points", type=int, default=1024)
    parser.add_argument("--batches", type=int, default=200)
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--out", type=Path, default=OUT)
    args = parser.parse_args(argv)
    if args.quick:
        args.epochs, args.clouds, args.batches = 2, 20_000, 50
    load_before = os.getloadavg()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        speed = throughput(tmp, args.points, args.epochs)
        dataset = write_dataset(tmp / "big", tmp / "data", args.clouds, args.cloud_points)
        peaks = memory(dataset, args.batches)
        shutil.rmtree(dataset)
    report = {
        "what": "training clouds/s in 1 and 2 processes (torchrun, gloo on loopback) at one global batch; peak "
                "memory (VmHWM after clear_refs, fresh process) of loading a large dataset whole and by memory map",
        "when": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "model": MODEL, "points": args.points, "epochs": args.epochs, "clouds": args.clouds,
        "cloud_points": args.cloud_points, "batches": args.batches, "machine": machine(),
        "load_average_before": load_before, "load_average_after": os.getloadavg(),
        "throughput": speed, "memory": peaks,
    }
    write_json(args.out, report)
    print(f"-> {args.out}")
    return report


if __name__ == "__main__":
    main()
