"""Assign instance groups to train/val/test so every class appears in every split.

The unit is the group *name* across the whole catalog: a part and its mirror image share a
group, so they land in the same split and a test part never has its twin in training.
"""

from __future__ import annotations

import numpy as np

from shapes.errors import ConfigError, DataError
from shapes.seeding import rng
from shapes.data._catalog import Catalog

__all__ = ["SPLITS", "split_groups"]

SPLITS = ("train", "val", "test")
_ATTEMPTS = 50  # reshuffles before giving up on a catalog whose shared groups clash


def _targets(n: int, fractions) -> np.ndarray:
    """Groups per split for a class with n groups: near the fractions, each at least 1."""
    want = np.maximum(1, np.round(np.asarray(fractions) * n).astype(int))  # (3,)
    while want.sum() > n:  # take back from the largest split that can spare one
        k = int(np.argmax(np.where(want > 1, want, -1)))
        want[k] -= 1
    want[0] += n - want.sum()
    return want


def split_groups(catalog: Catalog, fractions=(0.6, 0.2, 0.2), seed=None) -> dict[str, str]:
    """Map each group name to ``"train"``, ``"val"`` or ``"test"``.

    Groups are visited in a seeded random order; each goes to the split whose classes
    (those having an instance in the group) most lack groups against their targets, ties
    going to train, then val, then test.

    Parameters
    ----------
    catalog : Catalog
    fractions : (3,) float
        Train, val, test shares of each class's groups (positive, summing to 1).
    seed : None, int or numpy.random.Generator

    Returns
    -------
    split : dict group -> split name

    Raises
    ------
    DataError
        A class with fewer than 3 groups, or no assignment found that gives every class a
        group in every split.
    """
    fractions = np.asarray(fractions, dtype=np.float64)
    if fractions.shape != (3,) or not np.isfinite(fractions).all() or (fractions <= 0).any() \
            or abs(fractions.sum() - 1.0) > 1e-6:
        raise ConfigError(
            f"split_fractions should be 3 positive numbers summing to 1, got {fractions.tolist()} instead."
        )
    gen = rng(seed)
    groups_of = {c: sorted({i.group for i in catalog.instances if i.cls == c}) for c in catalog.classes}
    for c, groups in groups_of.items():
        if len(groups) < 3:
            raise DataError(
                f"class '{c}' in {catalog.root} has {len(groups)} group(s); need at least 3 "
                "so that train, val and test each get one."
            )
    classes_of: dict[str, list[int]] = {}
    for k, c in enumerate(catalog.classes):
        for g in groups_of[c]:
            classes_of.setdefault(g, []).append(k)
    names = sorted(classes_of)
    target = np.stack([_targets(len(groups_of[c]), fractions) for c in catalog.classes])  # (C, 3)
    for _ in range(_ATTEMPTS):
        order = gen.permutation(len(names))
        have = np.zeros_like(target)  # (C, 3)
        split = {}
        for j in order:
            g = names[j]
            rows = classes_of[g]
            lack = (target[rows] - have[rows]).sum(axis=0)  # (3,)
            s = int(np.argmax(lack))
            have[rows, s] += 1
            split[g] = SPLITS[s]
        if (have >= 1).all():
            return split
    short = [catalog.classes[k] for k in np.flatnonzero((have < 1).any(axis=1))]
    raise DataError(
        f"could not split the groups of {catalog.root} so that every class has one in train, "
        f"val and test (classes sharing group names clash: {short}); rename or add groups."
    )
