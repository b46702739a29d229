"""Boundary checks shared by the geometry functions: found-vs-expected messages, one line each."""

from __future__ import annotations

import operator

import torch

from shapes.errors import InputError

__all__ = ["check_last_dim", "check_matrices", "check_count", "check_degree", "shape_of"]


def shape_of(x) -> str:
    """A short description of what was passed: its shape for arrays, its type otherwise."""
    if isinstance(x, torch.Tensor):
        return str(tuple(x.shape))
    return type(x).__name__


def check_last_dim(x, name: str, expected: str = "(..., 3)", dim: int = 3) -> torch.Tensor:
    """Require a floating tensor whose last axis has length ``dim``."""
    if not isinstance(x, torch.Tensor) or x.dim() < 1 or x.shape[-1] != dim:
        raise InputError(f"{name} should have shape {expected}, got {shape_of(x)} instead.")
    if not x.is_floating_point():
        raise InputError(f"{name} should be a floating tensor (float32 or float64), got {x.dtype} instead.")
    return x


def check_matrices(x, name: str = "rotations") -> torch.Tensor:
    """Require a floating tensor of 3x3 matrices, shape (..., 3, 3)."""
    if not isinstance(x, torch.Tensor) or x.dim() < 2 or tuple(x.shape[-2:]) != (3, 3):
        raise InputError(f"{name} should have shape (..., 3, 3), got {shape_of(x)} instead.")
    if not x.is_floating_point():
        raise InputError(f"{name} should be a floating tensor (float32 or float64), got {x.dtype} instead.")
    return x


def check_count(n, name: str = "n", minimum: int = 0) -> int:
    """Require a plain integer count of at least ``minimum``."""
    try:
        value = None if isinstance(n, bool) else operator.index(n)
    except TypeError:
        value = None
    if value is None or value < minimum:
        raise InputError(f"{name} should be an integer >= {minimum}, got {n!r} instead.")
    return value


def check_degree(l, name: str, maximum: int) -> int:
    """Require a plain integer harmonic degree in [0, maximum] (bools are refused)."""
    try:
        value = None if isinstance(l, bool) else operator.index(l)
    except TypeError:
        value = None
    if value is None or not 0 <= value <= maximum:
        raise InputError(f"{name} should be an integer in [0, {maximum}], got {l!r} instead.")
    return value
