"""The D2 baseline behind the classifier's interface, so every job runs it as it runs a network.

:class:`D2Options` are the baseline's options as ``shapes/conf/backbone/d2.yaml`` gives them;
:class:`D2Network` wraps a fitted :class:`D2Classifier` as a ``torch.nn.Module`` with the
classifier's call signature, and :meth:`D2Network.from_state` rebuilds it from a checkpoint's tensors.
"""

from __future__ import annotations

import os
from dataclasses import asdict, dataclass

import numpy as np
import torch
from torch import nn

from shapes.classic._classifier import D2Classifier
from shapes.classic._d2 import D2_PAIRS
from shapes.errors import DataError

__all__ = ["D2Options", "D2Network", "D2_NAME"]

D2_NAME = "d2"
# floor of a class probability before its logarithm: softmax(log(p + EPS)) gives p back within C * EPS
EPS = 1e-9


@dataclass(frozen=True)
class D2Options:
    """The baseline's options as ``shapes/conf/backbone/d2.yaml`` gives them (see :class:`shapes.classic.D2Params`)."""

    bins: int = 64
    pairs: int | None = D2_PAIRS
    trees: int = 300
    min_samples_leaf: int = 1

    def config_dict(self) -> dict:
        return asdict(self)


class D2Network(nn.Module):
    """A fitted :class:`D2Classifier` behind the classifier's interface:
    ``forward(points (B, N, 3), mask (B, N) | None, normals=None) -> logits (B, C)``.

    The logits are ``log(p + EPS)`` of the forest's class probabilities, so their softmax is ``p``.
    Padded points (``mask`` False) are left out of the histogram. Normals are not used.
    """

    name = D2_NAME
    symmetry = "E3"
    uses_normals = False

    def __init__(self, classifier: D2Classifier, num_classes: int):
        super().__init__()
        self.classifier = classifier
        self.num_classes = int(num_classes)

    @classmethod
    def from_state(cls, state_dict: dict, baseline: dict, num_classes: int, path: str | os.PathLike) -> "D2Network":
        """The network of a checkpoint's ``forest.*`` tensors and its ``baseline`` record."""
        try:
            arrays = {k.split(".", 1)[1]: v.numpy() for k, v in state_dict.items() if k.startswith("forest.")}
            return cls(D2Classifier.from_state(arrays, baseline["params"]), num_classes).eval()
        except (KeyError, AttributeError, TypeError, IndexError) as exc:
            raise DataError(f"checkpoint '{path}' is not a complete D2 baseline ({type(exc).__name__}: {exc}); "
                            "retrain it with `shapes train backbone=d2`.") from None

    def forest_tensors(self) -> dict:
        """The fitted forest as ``forest.*`` tensors, for a checkpoint."""
        arrays, _ = self.classifier.state()
        return {f"forest.{k}": torch.as_tensor(np.ascontiguousarray(v)) for k, v in arrays.items()}

    def learned_numbers(self) -> int:
        """Numbers the forest learned: a split bin and threshold per inner node, class shares per leaf."""
        arrays, _ = self.classifier.state()
        inner = int((arrays["left"] >= 0).sum())
        leaves = int((arrays["left"] < 0).sum())
        return 2 * inner + leaves * len(arrays["classes"])

    def forward(self, points: torch.Tensor, mask: torch.Tensor | None = None,
                normals: torch.Tensor | None = None) -> torch.Tensor:
        x = points.detach().cpu().double().numpy()
        if mask is None:
            clouds = x
        else:
            keep = mask.detach().cpu().numpy().astype(bool)
            clouds = [cloud[k] for cloud, k in zip(x, keep)]
        proba = self.classifier.predict_proba(clouds)  # (B, classes seen in training)
        full = np.zeros((len(x), self.num_classes))
        full[:, self.classifier.classes_] = proba
        return torch.as_tensor(np.log(full + EPS), dtype=points.dtype, device=points.device)
