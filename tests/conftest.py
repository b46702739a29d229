"""Shared fixtures."""

from pathlib import Path

import pytest

DEMO = Path(__file__).resolve().parent.parent / "demo_meshes"


@pytest.fixture(scope="session")
def tiny_surface_data(tmp_path_factory):
    """The demo catalog as 64-point surface clouds, one copy per instance: 128 training clouds in 16 classes."""
    from shapes.cli import main

    root = tmp_path_factory.mktemp("tiny_surface")
    assert main(["sample", f"meshes={DEMO}", f"data={root / 'data'}", "sample.points=64", "sample.mode=surface",
                 "sample.copies={train: 1, val: 1, test: 1}", "sample.oversample=1"]) == 0
    return root / "data"
