"""A run folder's contract: the files a run leaves and how they are written and read back.

``metrics.json`` holds what ``shapes eval`` measured and what a seeded run repeats byte for byte;
``timing.json`` beside it holds the clock readings of the run's cost (training wall time, inference
parts per second), which differ between two otherwise identical runs.
"""

from __future__ import annotations

import json
from pathlib import Path

from shapes._atomic import write_json

METRICS = "metrics.json"
TIMING = "timing.json"
CLOCKED = ("train_seconds", "parts_per_second")  # read off a clock: they differ between two identical runs


def write_metrics(run_dir: Path, results: dict) -> None:
    """``metrics.json`` holds what a seeded run repeats byte for byte; the clock readings of its cost
    (training wall time, inference parts/s) go to ``timing.json`` beside it."""
    cost = results.get("cost", {})
    write_json(run_dir / METRICS, {**results, "cost": {k: v for k, v in cost.items() if k not in CLOCKED}})
    write_json(run_dir / TIMING, {k: cost.get(k) for k in CLOCKED})


def read_metrics(run_dir: Path) -> dict:
    """``metrics.json`` with the clock readings of ``timing.json`` put back into its cost record
    (left ``None`` when ``timing.json`` is missing or unreadable). Raises ``OSError``/``ValueError``."""
    metrics = json.loads((Path(run_dir) / METRICS).read_text(encoding="utf-8"))
    if isinstance(metrics, dict) and isinstance(metrics.get("cost"), dict):
        try:
            timing = json.loads((Path(run_dir) / TIMING).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            timing = {}
        timing = timing if isinstance(timing, dict) else {}
        metrics["cost"].update({k: timing.get(k) for k in CLOCKED})
    return metrics
