"""Small helpers the jobs share: device choice, thread count, library versions, progress bars."""

from __future__ import annotations

import platform
import sys

import numpy as np
import torch

from shapes.errors import ConfigError

__all__ = ["choose_device", "set_threads", "versions", "progress"]


def choose_device(name: str = "cpu") -> torch.device:
    """``cpu``, ``cuda`` or ``auto`` (CUDA when present, else CPU). CUDA is never required."""
    if name == "auto":
        return torch.device("cuda" if torch.cuda.is_available() else "cpu")
    if name == "cuda" and not torch.cuda.is_available():
        raise ConfigError("device=cuda was asked for but no CUDA device is present; use device=cpu or device=auto.")
    if name not in ("cpu", "cuda"):
        raise ConfigError(f"device should be one of cpu, cuda, auto; got '{name}'.")
    return torch.device(name)


def set_threads(threads: int | None) -> None:
    if threads:
        torch.set_num_threads(int(threads))


def versions() -> dict[str, str]:
    import shapes

    out = {"shapes": shapes.__version__, "python": platform.python_version(), "torch": str(torch.__version__),
           "numpy": np.__version__}
    for name in ("trimesh", "sklearn", "scipy"):
        try:
            out[name] = str(__import__(name).__version__)
        except ImportError:  # optional at this point of the pipeline
            pass
    return out


def progress(iterable, **kwargs):
    """A tqdm bar on a terminal; silent when output goes to a file or CI."""
    from tqdm import tqdm

    return tqdm(iterable, disable=not sys.stderr.isatty(), leave=False, **kwargs)
