"""The demo job: parts → sample → train several backbones briefly → evaluate → one report.

Set in our own scenario: a maintenance store sorting a mixed bin of returned parts.
"""

from __future__ import annotations

import os
import time
from pathlib import Path
from typing import Callable

from shapes.backbones import Backbone
from shapes.data import build_dataset, read_meta
from shapes.evaluate import evaluate_run
from shapes.report import comparison_report, run_report
from shapes.seeding import seed_everything
from shapes.train import TrainSettings, train_classifier

__all__ = ["run_demo"]


def run_demo(meshes: str | os.PathLike, out: str | os.PathLike, backbones: dict[str, Callable[[], Backbone]], *,
             points: int = 512, copies: dict | None = None, epochs: int = 12, seed: int = 0,
             threads: int | None = None, repeats: int = 3, minutes: dict[str, float] | None = None,
             mirror: float = 0.0, mode: str = "mixed", scan_fraction: float = 0.5,
             normals: str = "estimated") -> Path:
    """Run the whole pipeline on the catalog in ``meshes``; return the combined report's path.

    ``minutes`` gives a backbone a wall-time budget for training (its learning rate anneals within
    it; ``epochs`` is then an upper bound); ``mirror`` is ``TrainSettings.mirror`` for every backbone.
    ``mode``, ``scan_fraction`` and ``normals`` are the sampler's (:func:`shapes.data.build_dataset`): by
    default half the clouds are single-view virtual scans and every cloud's normals are estimated
    from its points, so the models are ready for bare scan files.
    """
    minutes = minutes or {}
    started = time.perf_counter()
    meshes, out = Path(meshes), Path(out)
    if not (meshes / "catalog.json").is_file() and not any(meshes.glob("*/")):
        from shapes.parts import write_demo_catalog

        print(f"[demo] writing the demo catalog to {meshes}/", flush=True)
        write_demo_catalog(meshes, seed=seed)
    data = out / "data"
    print(f"[demo] sampling {points}-point clouds from {meshes}/", flush=True)
    build_dataset(meshes, data, points=points, copies=copies or {"train": 6, "val": 2, "test": 3}, seed=seed,
                  mode=mode, scan_fraction=scan_fraction, normals=normals)
    meta = read_meta(data)
    runs = {}
    for name, make in backbones.items():
        t0 = time.perf_counter()
        budget = minutes.get(name)
        limit = f"{budget:g} min (at most {epochs} epochs)" if budget else f"{epochs} epochs"
        print(f"[demo] training '{name}' for {limit} on {meta['counts']['train']} clouds", flush=True)
        seed_everything(seed)  # before the backbone is built: building it draws its weights
        backbone = make()
        settings = TrainSettings(epochs=epochs, seed=seed, threads=threads, max_minutes=budget, mirror=mirror)
        if type(backbone).__name__ == "D2Options":  # the classical baseline (backbone d2): fitted in one go
            from shapes.baseline import train_d2

            train_d2(data, out / name, backbone, seed=seed, threads=threads)
        else:
            train_classifier(backbone, data, out / name, settings)
        metrics = evaluate_run(out / name, data, repeats=repeats, seed=seed, threads=threads)
        metrics["train_seconds"] = time.perf_counter() - t0  # training and evaluation
        run_report(metrics, out / name)
        runs[name] = metrics
        print(f"[demo] {name}: " + ", ".join(f"{r} {100 * m['accuracy']:.0f}%" for r, m in metrics["regimes"].items())
              + f" ({metrics['train_seconds']:.0f} s)", flush=True)
    total = (time.perf_counter() - started) / 60
    handed = [c for c, h in meta["handed"].items() if h]
    preamble = (f"A maintenance store sorts a mixed bin of returned parts: {len(meta['classes'])} classes, "
                f"{len(handed)} of them handed (mirror twins: "
                + ", ".join(f"{c} ↔ {meta['twins'][c]}" for c in handed if c < meta["twins"][c])
                + f"). Each backbone trained on clouds of {points} points in the CAD frame (cad poses; "
                + (f"{mirror:.0%} of them mirrored and labelled as their twin; " if mirror else "")
                + ", ".join(f"{n} {minutes[n]:g} min" if n in minutes else f"{n} {epochs} epoch{'s' * (epochs != 1)}" for n in runs)
                + f") and was tested on held-out part instances. Whole demo: {total:.1f} min.")
    return comparison_report(runs, out, title="shapes demo: part classification under random poses and mirror images",
                             preamble=preamble)
