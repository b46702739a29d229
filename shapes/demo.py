"""The demo job: parts → sample → train several backbones briefly → evaluate → one report.

Set in our own scenario: a maintenance store sorting a mixed bin of returned parts. The demo sits
beside the other jobs, not above them: the command line hands it the training and evaluation steps
(``fit``, ``evaluate``) as plain functions.
"""

from __future__ import annotations

import os
import time
from pathlib import Path
from typing import Callable

from shapes.data import build_dataset, read_meta, twin_printer
from shapes.report import comparison_report, run_report
from shapes.seeding import seed_everything

__all__ = ["run_demo", "DEMO_COPIES", "DEMO_MINUTES"]

DEMO_COPIES = {"train": 4, "val": 2, "test": 3}  # clouds per part instance and split: few, so the demo is quick
# training budget of each backbone in minutes (its learning rate anneals within it), sized so the whole
# demo takes about ten minutes on 2 cores
DEMO_MINUTES = {"distance": 1.5, "plain": 0.5, "vector_gate": 2.5, "harmonic_attention": 3}


def run_demo(meshes: str | os.PathLike, out: str | os.PathLike, backbones: dict[str, Callable], *,
             fit: Callable[..., Path], evaluate: Callable[..., dict], points: int = 256,
             copies: dict | None = None, epochs: int = 40, seed: int = 0,
             threads: int | None = None, repeats: int = 3, minutes: dict[str, float] | None = None,
             mirror: float = 0.0, mode: str = "mixed", scan_fraction: float = 0.5,
             normals: str = "estimated", twins: str = "auto") -> Path:
    """Run the whole pipeline on the catalog in ``meshes``; return the combined report's path.

    ``backbones`` maps a name to a function that builds that backbone (or the baseline's options);
    ``fit(backbone, data_dir, run_dir, **settings)`` trains it into ``run_dir`` (``settings``: the
    training options ``epochs``, ``seed``, ``threads``, ``max_minutes``, ``mirror``) and
    ``evaluate(run_dir, data_dir, repeats=, seed=, threads=)`` returns its metrics.

    ``minutes`` gives a backbone a wall-time budget for training (its learning rate anneals within
    it; ``epochs`` is then an upper bound; None: :data:`DEMO_MINUTES`, ``{}``: none); ``copies``: clouds
    per part instance and split (None: :data:`DEMO_COPIES`); ``mirror`` is ``TrainSettings.mirror`` for every backbone.
    ``mode``, ``scan_fraction`` and ``normals`` are the sampler's (:func:`shapes.data.build_dataset`): by
    default half the clouds are single-view virtual scans and every cloud's normals are estimated
    from its points, so the models are ready for bare scan files. ``twins`` is ``sample.twins``
    (:func:`shapes.data.resolve_twins`): the mirror-twin map found from the geometry or checked by it.
    """
    minutes = dict(DEMO_MINUTES if minutes is None else minutes)
    started = time.perf_counter()
    meshes, out = Path(meshes), Path(out)
    if not (meshes / "catalog.json").is_file() and not any(meshes.glob("*/")):
        from shapes.parts import write_demo_catalog

        print(f"[demo] writing the demo catalog to {meshes}/", flush=True)
        write_demo_catalog(meshes, seed=seed)
    data = out / "data"
    print(f"[demo] sampling {points}-point clouds from {meshes}/", flush=True)
    build_dataset(meshes, data, points=points, copies=DEMO_COPIES if copies is None else copies, seed=seed,
                  mode=mode, scan_fraction=scan_fraction, normals=normals, twins=twins, say=twin_printer("[demo] "))
    meta = read_meta(data)
    runs = {}
    for name, make in backbones.items():
        t0 = time.perf_counter()
        budget = minutes.get(name)
        limit = f"{budget:g} min (at most {epochs} epochs)" if budget else f"{epochs} epochs"
        print(f"[demo] training '{name}' for {limit} on {meta['counts']['train']} clouds", flush=True)
        seed_everything(seed)  # before the backbone is built: building it draws its weights
        backbone = make()
        fit(backbone, data, out / name, epochs=epochs, seed=seed, threads=threads, max_minutes=budget, mirror=mirror)
        metrics = evaluate(out / name, data, repeats=repeats, seed=seed, threads=threads)
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
                + ", ".join(f"{n} {minutes[n]:g} min" if minutes.get(n) else f"{n} {epochs} epoch{'s' * (epochs != 1)}" for n in runs)
                + f") and was tested on held-out part instances. Whole demo: {total:.1f} min.")
    return comparison_report(runs, out, title="shapes demo: part classification under random poses and mirror images",
                             preamble=preamble)
