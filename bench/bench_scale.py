"""Benchmark: training throughput in one and two processes, and the peak memory of loading 200 000 clouds.

Throughput: the demo catalog sampled as surface clouds (``--points`` each, two copies per training instance:
256 training clouds) trains a small ``distance`` backbone for ``--epochs`` epochs with a global batch of 32,
three ways: one process on one thread, one process on two threads, and two processes of one thread each
under ``torchrun`` (gloo on the loopback interface). The figure is training clouds per second over the
epochs after the first (``train_seconds`` of each row of ``train_history.json``: the steps, not the
validation), and its ratio to one process on one thread, measured in the same run of this script.

Memory: a dataset of ``--clouds`` clouds of ``--cloud-points`` points (random points and normals; the demo's
classes) is written to a temporary folder the way ``shapes sample`` writes it (``shapes.data._store.SplitWriter``:
``train/points.npy`` ... filled cloud block by cloud block, in a fresh process whose peak is measured too), and
again in the earlier layout, one ``train.npz`` shard read whole. Each load runs in a fresh Python process that
imports ``shapes.data``, resets the kernel's high-water mark (writes ``5`` to ``/proc/self/clear_refs``), then
calls ``shapes.data.load_split`` and gathers ``--batches`` random batches of 32 clouds with
``CloudSplit.batch``, as the training loop does (``new``: memory maps; ``old``: the ``.npz`` read whole), or
gathers every cloud once in random batches of 32 (``new_epoch``: one epoch of training's reads). The figure is
``VmHWM`` from ``/proc/self/status`` minus the ``VmRSS`` before; ``RssAnon``/``RssFile`` at the end say how
much of the resident memory is the process's own and how much is pages of the mapped files (page cache, which
the kernel takes back when it needs them).

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

_STATUS = r"""
import json, sys, time
import numpy as np

def status(key):
    for line in open("/proc/self/status"):
        if line.startswith(key + ":"):
            return int(line.split()[1]) / 1024.0  # kB -> MB

def reset():
    with open("/proc/self/clear_refs", "w") as handle:
        handle.write("5")  # reset VmHWM to the current RSS (Linux, proc(5))
    return status("VmRSS"), time.perf_counter()

def report(before, start, **more):
    print(json.dumps({"rss_before_mb": before, "peak_mb": status("VmHWM"), "peak_over_start_mb": status("VmHWM") - before,
                      "seconds": time.perf_counter() - start,
                      # at the end: file pages of a memory map count in the RSS until the kernel needs them back
                      "rss_anon_end_mb": status("RssAnon"), "rss_file_end_mb": status("RssFile"), **more}))
"""

_MEASURE = _STATUS + r"""
from shapes.data import load_split

folder, how, batches = sys.argv[1], sys.argv[2], int(sys.argv[3])
before, start = reset()
split = load_split(folder, "train")
loaded_mb = status("VmHWM") - before
rng, total = np.random.default_rng(0), 0.0
if how == "new_epoch":  # every cloud once, in random batches of 32: one epoch of the training loop's reads
    order = rng.permutation(len(split))
    picks = [order[i:i + 32] for i in range(0, len(order), 32)]
else:
    picks = [rng.choice(len(split), 32, replace=False) for _ in range(batches)]
for pick in picks:
    points, normals, labels = split.batch(pick)
    total += float(points.sum() + normals.sum())
report(before, start, clouds=len(split), batches=len(picks), peak_after_load_split_mb=loaded_mb,
       mapped=isinstance(split.points, np.memmap))
"""

_WRITE = _STATUS + r"""
from shapes.data._store import SplitWriter

folder, clouds, points, classes = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4])
before, start = reset()
rng, block = np.random.default_rng(0), 1000
writer = SplitWriter(folder + "/train", clouds, points)
for first in range(0, clouds, block):  # as shapes sample adds its clouds, a block at a time
    k = min(block, clouds - first)
    n = rng.standard_normal((k, points, 3), dtype=np.float32)
    writer.add(points=rng.standard_normal((k, points, 3), dtype=np.float32),
               normals=n / np.linalg.norm(n, axis=-1, keepdims=True), labels=rng.integers(0, classes, k),
               instance=(first + np.arange(k)) // 8, scale=np.ones(k), kind=np.zeros(k), visible=np.ones(k))
writer.close()
for split in ("val", "test"):
    SplitWriter(folder + "/" + split, 0, points).close()
report(before, start, clouds=clouds)
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


def _measured(script: str, *argv) -> dict:
    done = subprocess.run([sys.executable, "-c", script, *map(str, argv)], capture_output=True, text=True, env=_env(),
                          check=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


def write_datasets(folder: Path, meta_from: Path, clouds: int, points: int) -> tuple[Path, Path, dict]:
    """The same random clouds as ``shapes sample`` writes them now (``new``) and in the earlier layout (``old``:
    ``train.npz``); returns both folders and the measured peak of writing ``new``."""
    meta = json.loads((meta_from / "meta.json").read_text())
    meta["counts"] = {"train": clouds, "val": 0, "test": 0}
    new, old = folder / "new", folder / "old"
    new.mkdir()
    written = _measured(_WRITE, new, clouds, points, len(meta["classes"]))
    (new / "meta.json").write_text(json.dumps({**meta, "format": 2}))
    old.mkdir()
    arrays = {k: np.load(new / "train" / f"{k}.npy", mmap_mode="r") for k in
              ("points", "normals", "labels", "instance", "scale", "kind", "visible")}
    np.savez(old / "train.npz", **arrays)  # numpy writes a mapped array into the zip in buffered chunks
    for split in ("val", "test"):
        np.savez(old / f"{split}.npz", **{k: v[:0] for k, v in arrays.items()})
    (old / "meta.json").write_text(json.dumps({**meta, "format": 1}))
    print(f"wrote {clouds:,} clouds through SplitWriter: peak {written['peak_over_start_mb']:.1f} MB over start, "
          f"{written['seconds']:.1f} s")
    return new, old, written


def memory(new: Path, old: Path, batches: int) -> dict:
    out = {}
    for how, folder in (("new", new), ("new_epoch", new), ("old", old)):
        out[how] = result = _measured(_MEASURE, folder, how, batches)
        print(f"{how:9s} {result['clouds']:>8,} clouds, {result['batches']:>5} batches: peak "
              f"{result['peak_over_start_mb']:8.1f} MB over start ({result['peak_after_load_split_mb']:.1f} after "
              f"load_split; at the end anon {result['rss_anon_end_mb']:.0f} MB, file {result['rss_file_end_mb']:.0f} MB), "
              f"{result['seconds']:.1f} s")
    out["files_mb"] = {"new": sum(f.stat().st_size for f in (new / "train").iterdir()) / 1024**2,
                       "old": (old / "train.npz").stat().st_size / 1024**2}
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
        new, old, written = write_datasets(tmp, tmp / "data", args.clouds, args.cloud_points)
        peaks = {"write_new": written, **memory(new, old, args.batches)}
        shutil.rmtree(new)
        shutil.rmtree(old)
    report = {
        "what": "training clouds/s in 1 and 2 processes (torchrun, gloo on loopback) at one global batch; peak "
                "memory (VmHWM after clear_refs, fresh process) of writing a large dataset as shapes sample does, and of load_split "
                "plus random batches of 32 on it (new: memory maps) and on the earlier .npz layout (old: read whole)",
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
