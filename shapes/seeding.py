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


def seed_everything(seed: int) -> None:
    """Seed Python, numpy's legacy global state and torch (for weight initialisation)."""
    random.seed(seed)
    np.random.seed(seed % (2**32))
    torch.manual_seed(seed)
