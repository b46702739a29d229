"""The one seed convention: ``seed=None`` means fresh entropy, an int means reproducible.

numpy code takes ``seed`` and calls :func:`rng`; torch code takes a ``torch.Generator`` made by
:func:`torch_generator`. Same seed, same result: this is tested.
"""

from __future__ import annotations

import random

import numpy as np
import torch

__all__ = ["rng", "torch_generator", "seed_everything"]


def rng(seed: int | np.random.Generator | None = None) -> np.random.Generator:
    """Return a numpy Generator; pass one through unchanged so callers can share a stream."""
    if isinstance(seed, np.random.Generator):
        return seed
    return np.random.default_rng(seed)


def torch_generator(seed: int | None = None, device: str | torch.device = "cpu") -> torch.Generator:
    """Return a torch Generator seeded with ``seed`` (fresh entropy when None)."""
    gen = torch.Generator(device=device)
    if seed is None:
        gen.seed()
    else:
        gen.manual_seed(int(seed))
    return gen


def seed_everything(seed: int, deterministic: bool = True) -> None:
    """Seed Python, numpy's legacy global state and torch (for weight initialisation).

    Call it before anything random is drawn: before a backbone is built, since building one draws
    its initial weights. ``deterministic`` also asks torch for deterministic kernels
    (``torch.use_deterministic_algorithms(True, warn_only=True)``: an op without a deterministic
    version warns rather than fails), so the same seed and thread count give the same weights.
    """
    random.seed(seed)
    np.random.seed(seed % (2**32))
    torch.manual_seed(seed)
    if deterministic and hasattr(torch, "use_deterministic_algorithms"):
        try:
            torch.use_deterministic_algorithms(True, warn_only=True)
        except TypeError:  # a torch without warn_only: leave the default rather than fail on an op
            pass
