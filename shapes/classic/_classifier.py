"""A classifier over D2 histograms: a random forest (scikit-learn) trained on the histograms,
kept after training as plain arrays so that it saves to one ``.npz`` without pickle.

Why a random forest: on the demo catalog (``shapes sample sample.points=512``; 1024 training
clouds, half full surfaces, half virtual scans; 16 classes; 128 test clouds) it reached 62.5-64.8 %
test accuracy over three seeds, against 50-52 % for a standardised multinomial logistic regression
(C in 0.1..10) and 62 % for 5 nearest neighbours on standardised histograms; and it trains in
seconds where the logistic regression took 17-48 s on the same 2-core machine. Trees split on
single bins, so they need no scaling of the histograms. Its trees are kept as arrays (child
indices, split bins, thresholds, leaf class shares) and evaluated here, giving the same
probabilities as scikit-learn's ``predict_proba``.
"""

from __future__ import annotations

import json
import os
from dataclasses import asdict, dataclass

import numpy as np
from sklearn.ensemble import RandomForestClassifier

from shapes._atomic import atomic_path
from shapes.classic._d2 import D2_PAIRS, d2_features
from shapes.errors import DataError, InputError

__all__ = ["D2Classifier", "D2Params"]

_FORMAT = 1
_ARRAYS = ("classes", "offsets", "left", "right", "feature", "threshold", "value")


@dataclass(frozen=True)
class D2Params:
    """Options of a :class:`D2Classifier`; every field is JSON-able.

    Attributes
    ----------
    bins : histogram bins over ``[0, D2_RANGE]`` RMS radii; 64 bins are 1/16 of an RMS radius
        each, finer than the spread of one class's histograms at 512 points.
    pairs : point pairs per cloud (every pair for clouds of up to 512 points).
    trees : trees of the forest; 300 gave the smallest spread of test accuracy over seeds
        on the demo catalog (100 trees: 62.5-64 %, 300: 62.5-65 %).
    min_samples_leaf : 1, scikit-learn's default: full-depth trees, averaged by the forest.
    seed : seed of the pair draw and of the forest's bootstrap.
    """

    bins: int = 64
    pairs: int | None = D2_PAIRS
    trees: int = 300
    min_samples_leaf: int = 1
    seed: int = 0


def _positive_int(value, name: str, allow_none: bool = False):
    if allow_none and value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        more = " or None" if allow_none else ""
        raise InputError(f"{name} should be a positive int{more}, got {value!r} instead.")
    return int(value)


class D2Classifier:
    """D2 shape distribution + random forest: a non-neural baseline, blind to handedness.

    The features are distances only, so the prediction for a cloud, for the same cloud in any
    pose and for its mirror image is the same (bit for bit when the pair draw is the same).

    Parameters
    ----------
    bins, pairs, trees, min_samples_leaf, seed : see :class:`D2Params`

    Attributes
    ----------
    classes_ : (C,) int64, the labels seen in :meth:`fit`, in the order of the probability columns
    params : D2Params
    """

    def __init__(self, bins: int = 64, pairs: int | None = D2_PAIRS, trees: int = 300, min_samples_leaf: int = 1,
                 seed: int = 0):
        if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
            raise InputError(f"seed should be a non-negative int, got {seed!r} instead.")
        self.params = D2Params(
            bins=_positive_int(bins, "bins"),
            pairs=_positive_int(pairs, "pairs", allow_none=True),
            trees=_positive_int(trees, "trees"),
            min_samples_leaf=_positive_int(min_samples_leaf, "min_samples_leaf"),
            seed=int(seed),
        )
        self.classes_: np.ndarray | None = None
        self._forest: dict[str, np.ndarray] | None = None

    # -- features --------------------------------------------------------------------------

    def features(self, points) -> np.ndarray:
        """D2 histograms ``(M, bins)`` of clouds ``(M, N, 3)`` (or a list of ``(N_i, 3)``)."""
        p = self.params
        return d2_features(points, bins=p.bins, pairs=p.pairs, seed=p.seed)

    # -- training --------------------------------------------------------------------------

    def fit(self, points, labels) -> "D2Classifier":
        """Train on clouds and their integer labels.

        Parameters
        ----------
        points : (M, N, 3) float, or a list of M arrays (N_i, 3)
        labels : (M,) int

        Returns
        -------
        self
        """
        x = self.features(points)
        y = np.asarray(labels)
        if y.shape != (len(x),) or not np.issubdtype(y.dtype, np.integer):
            raise InputError(f"labels should be {len(x)} integers, got shape {y.shape} of dtype {y.dtype} instead.")
        if len(np.unique(y)) < 2:
            raise InputError(f"labels should hold at least 2 classes, got {len(np.unique(y))} instead.")
        p = self.params
        forest = RandomForestClassifier(
            n_estimators=p.trees, min_samples_leaf=p.min_samples_leaf, random_state=p.seed, n_jobs=1
        ).fit(x, y)
        self.classes_ = np.asarray(forest.classes_, dtype=np.int64)
        self._forest = _export(forest)
        return self

    # -- prediction ------------------------------------------------------------------------

    def _check_fitted(self):
        if self._forest is None:
            raise InputError("D2Classifier should be fitted (call fit or load) before predicting, got an unfitted one instead.")

    def predict_proba_features(self, x: np.ndarray) -> np.ndarray:
        """Class probabilities ``(M, C)`` from D2 histograms ``(M, bins)``."""
        self._check_fitted()
        x = np.asarray(x)
        if x.ndim != 2 or x.shape[1] != self.params.bins:
            raise InputError(f"features should have shape (M, {self.params.bins}), got {x.shape} instead.")
        return _forest_proba(self._forest, x)

    def predict_proba(self, points) -> np.ndarray:
        """Class probabilities ``(M, C)``, columns in the order of ``classes_``; rows sum to 1."""
        self._check_fitted()
        return self.predict_proba_features(self.features(points))

    def predict(self, points) -> np.ndarray:
        """Most probable label ``(M,)`` int64 (the lower label on a tie)."""
        return self.classes_[np.argmax(self.predict_proba(points), axis=1)]

    # -- save / load -----------------------------------------------------------------------

    def state(self) -> tuple[dict[str, np.ndarray], dict]:
        """Plain arrays and JSON-able parameters that :meth:`from_state` turns back into this model."""
        self._check_fitted()
        arrays = {"classes": self.classes_, **self._forest}
        return {k: np.array(v, copy=True) for k, v in arrays.items()}, {"format": _FORMAT, **asdict(self.params)}

    @classmethod
    def from_state(cls, arrays: dict[str, np.ndarray], params: dict) -> "D2Classifier":
        """Rebuild a fitted classifier from :meth:`state`."""
        if not isinstance(params, dict) or params.get("format") != _FORMAT:
            found = params.get("format") if isinstance(params, dict) else type(params).__name__
            raise DataError(f"D2 classifier parameters should have \"format\": {_FORMAT}, got {found!r} instead.")
        missing = [k for k in _ARRAYS if k not in arrays]
        if missing:
            raise DataError(f"D2 classifier state should hold arrays {list(_ARRAYS)}, got it without {missing}.")
        opts = {k: params[k] for k in D2Params.__dataclass_fields__ if k in params}
        model = cls(**opts)
        model.classes_ = np.asarray(arrays["classes"], dtype=np.int64)
        model._forest = {k: np.asarray(arrays[k]) for k in _ARRAYS if k != "classes"}
        _check_forest(model._forest, len(model.classes_), model.params.bins)
        return model

    def save(self, path: str | os.PathLike) -> None:
        """Write one ``.npz``: the arrays of :meth:`state` and its parameters as a JSON string."""
        arrays, params = self.state()
        with atomic_path(path) as tmp, open(tmp, "wb") as fh:
            np.savez(fh, params=np.array(json.dumps(params)), **arrays)

    @classmethod
    def load(cls, path: str | os.PathLike) -> "D2Classifier":
        """Read a file written by :meth:`save` (no pickle)."""
        try:
            with np.load(path, allow_pickle=False) as data:
                arrays = {k: data[k] for k in data.files if k != "params"}
                params = json.loads(str(data["params"])) if "params" in data.files else None
        except (OSError, ValueError, KeyError) as exc:
            raise DataError(f"D2 classifier file {path} should be an .npz written by D2Classifier.save, "
                            f"got one that is unreadable: {str(exc)[:120]}") from exc
        return cls.from_state(arrays, params)


# -- the forest as arrays ------------------------------------------------------------------


def _export(forest: RandomForestClassifier) -> dict[str, np.ndarray]:
    """Concatenate the trees' node arrays; child indices stay local to their tree (-1 at a leaf)."""
    trees = [est.tree_ for est in forest.estimators_]
    sizes = np.array([t.node_count for t in trees], dtype=np.int64)
    value = np.concatenate([t.value[:, 0, :] for t in trees]).astype(np.float64)
    total = value.sum(1, keepdims=True)
    value = np.divide(value, total, out=np.zeros_like(value), where=total > 0)  # leaf class shares
    return {
        "offsets": np.concatenate([[0], np.cumsum(sizes)]),
        "left": np.concatenate([t.children_left for t in trees]).astype(np.int64),
        "right": np.concatenate([t.children_right for t in trees]).astype(np.int64),
        "feature": np.concatenate([t.feature for t in trees]).astype(np.int64),
        "threshold": np.concatenate([t.threshold for t in trees]).astype(np.float64),
        "value": value,
    }


def _check_forest(forest: dict[str, np.ndarray], n_classes: int, bins: int) -> None:
    n = int(forest["offsets"][-1]) if forest["offsets"].ndim == 1 and len(forest["offsets"]) > 1 else -1
    ok = n > 0 and all(forest[k].shape == (n,) for k in ("left", "right", "feature", "threshold")) \
        and forest["value"].shape == (n, n_classes) and int(forest["feature"].max()) < bins
    if not ok:
        shapes = {k: v.shape for k, v in forest.items()}
        raise DataError(f"D2 classifier state should hold consistent tree arrays for {n_classes} classes, got shapes {shapes} instead.")


def _forest_proba(forest: dict[str, np.ndarray], x: np.ndarray) -> np.ndarray:
    """Mean over trees of the class shares at the leaf each row reaches.

    As in scikit-learn, a row goes left where ``x[feature] <= threshold`` with ``x`` in float32
    (its trees compare float32 inputs against float64 thresholds).
    """
    x = np.asarray(x, dtype=np.float32).astype(np.float64)
    start = forest["offsets"][:-1]  # (T,) root of each tree
    left, right, feature, threshold = forest["left"], forest["right"], forest["feature"], forest["threshold"]
    node = np.broadcast_to(start, (len(x), len(start))).copy()  # (M, T) global node index
    rows = np.arange(len(x))[:, None]
    while True:
        inner = left[node] >= 0
        if not inner.any():
            break
        go_left = x[rows, np.where(inner, feature[node], 0)] <= threshold[node]
        child = np.where(go_left, left[node], right[node]) + start[None, :]
        node = np.where(inner, child, node)
    return forest["value"][node].sum(1) / len(start)  # (M, C)
