"""Accuracy of a trained run on held-out single-view scans written as bare ``x y z`` rows.

What a user with a scanner sees: every test-split part instance of the run's dataset is turned
into a random pose (and, separately, reflected then turned), scanned from one random direction
by the virtual scanner, and written in millimetres as a plain ``.xyz`` file with no normals.
``shapes predict`` then names the folder, and the answers are scored against the class (or, for
a mirrored handed part, its mirror twin).

    python bench/accuracy_scans.py RUN_DIR [--scans 2] [--points 3000] [--seed 7]

Writes ``bench/results/accuracy_scans_<backbone>.json`` (or ``--out``) and prints a table.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import torch

from shapes.data import read_mesh, read_meta, scan_view
from shapes.run import find_checkpoint
from shapes.geometry import random_improper, uniform_rotations
from shapes.predict import predict_files
from shapes.seeding import rng, torch_generator

RESULTS = Path(__file__).parent / "results"


def write_scans(meta: dict, catalog: Path, folder: Path, scans: int, points: int, seed: int) -> dict:
    """Scan every test instance ``scans`` times per condition; return {file name: (condition, expected class)}."""
    gen = rng(seed)
    tgen = torch_generator(seed)
    truth = {}
    test = [inst for inst in meta["instances"] if inst["split"] == "test"]
    for i, inst in enumerate(test):
        mesh = read_mesh(catalog / inst["file"])
        for condition, sampler in (("any", uniform_rotations), ("mirrored", random_improper)):
            for j in range(scans):
                pose = sampler(1, generator=tgen, dtype=torch.float64)[0].numpy()
                turned = mesh.copy()
                turned.apply_transform(np.block([[pose, np.zeros((3, 1))], [np.zeros((1, 3)), np.ones((1, 1))]]))
                if np.linalg.det(pose) < 0:
                    turned.invert()  # keep the faces' winding outward after a reflection
                pts, _ = scan_view(turned, points, seed=gen)
                name = f"{condition}_{i:03d}_{j}.xyz"
                np.savetxt(folder / name, pts, fmt="%.4f")
                expected = meta["twins"][inst["class"]] if condition == "mirrored" else inst["class"]
                truth[name] = (condition, expected, inst["class"])
    return truth


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("run")
    parser.add_argument("--scans", type=int, default=2, help="scans per test instance and condition")
    parser.add_argument("--points", type=int, default=3000, help="points per scan file")
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--poses", type=int, default=8, help="predict.poses")
    parser.add_argument("--out", default=None)
    parser.add_argument("--no-clean", action="store_true", help="predict without the scan clean-up")
    args = parser.parse_args(argv)

    ckpt = find_checkpoint(args.run)
    cmeta = torch.load(ckpt, map_location="cpu", weights_only=True)["meta"]
    data = Path(cmeta["data"]["dir"])
    meta = read_meta(data)
    catalog = Path(meta["catalog"])
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        t0 = time.perf_counter()
        truth = write_scans(meta, catalog, folder, args.scans, args.points, args.seed)
        t1 = time.perf_counter()
        clean = {"stray_points": False, "support_plane": False, "cluster": False} if args.no_clean else None
        result = predict_files(ckpt, folder, poses=args.poses, seed=args.seed, clean=clean)
        t2 = time.perf_counter()
    rows = {r["file"]: r for r in result["results"]}
    errors = {n: r["error"] for n, r in rows.items() if "error" in r}
    if errors:  # a scan the reader refused counts as a miss
        print(f"{len(errors)} scan(s) refused, e.g. {next(iter(errors.items()))}")
        for n in errors:
            rows[n] = {"top": {"class": "(refused)"}, "known": False}
    handed = meta["handed"]
    table = {}
    for condition in ("any", "mirrored"):
        names = [n for n, (c, _, _) in truth.items() if c == condition]
        right = [rows[n]["top"]["class"] == truth[n][1] for n in names]
        hand = [rows[n]["top"]["class"] == truth[n][1] for n in names if handed[truth[n][2]]]
        known = [rows[n]["known"] for n in names]
        misses = sorted(f"{truth[n][2]}->{rows[n]['top']['class']}" for n in names if rows[n]["top"]["class"] != truth[n][1])
        removed = [sum(step["removed"] for step in rows[n].get("cleanup", [])) / args.points for n in names]
        table[condition] = {"scans": len(names), "accuracy": float(np.mean(right)),
                            "cleanup_removed_share": {"mean": float(np.mean(removed)), "max": float(np.max(removed))},
                            "handed_accuracy": float(np.mean(hand)) if hand else None,
                            "known_share": float(np.mean(known)), "misses": misses}
    out = {"run": str(ckpt.parent), "backbone": cmeta["backbone"]["name"], "data": str(data),
           "scans_per_instance_and_condition": args.scans, "points_per_scan": args.points, "seed": args.seed,
           "scanner": "shapes.data.scan_view: one orthographic view from a random direction, no noise",
           "file_format": "bare x y z rows in mm, no normals", "predict_poses": args.poses, "clean_up": not args.no_clean,
           "seconds": {"scanning": t1 - t0, "predict": t2 - t1}, "conditions": table}
    path = Path(args.out) if args.out else RESULTS / f"accuracy_scans_{out['backbone']}.json"
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(out, indent=2) + "\n")
    for condition, m in table.items():
        hand = "-" if m["handed_accuracy"] is None else f"{100 * m['handed_accuracy']:.1f}%"
        print(f"{out['backbone']:>20} {condition:>9}: {100 * m['accuracy']:5.1f}% of {m['scans']} scans, "
              f"handed {hand}, known {100 * m['known_share']:.0f}%, clean-up removed "
              f"{100 * m['cleanup_removed_share']['mean']:.1f}% (max {100 * m['cleanup_removed_share']['max']:.0f}%); "
              f"misses {m['misses'][:8]}")
    print(f"wrote {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
