"""Non-neural baselines (numpy, scikit-learn, shapes.data; torch only to wrap the forest as a module).

The D2 shape distribution (Osada et al. 2002) of a cloud and a random-forest classifier over it.
D2 sees distances only: it is invariant under rotations, translations and reflections, so it
cannot tell a handed part from its mirror twin; a report uses it as the floor a learned backbone
must clear.
"""

from shapes.classic._classifier import D2Classifier, D2Params
from shapes.classic._network import D2_NAME, D2Network, D2Options
from shapes.classic._d2 import D2_PAIRS, D2_RANGE, d2_distances, d2_features, d2_histogram, rms_radius

__all__ = [
    "D2Classifier",
    "D2Params",
    "D2Options",
    "D2Network",
    "D2_NAME",
    "D2_PAIRS",
    "D2_RANGE",
    "d2_distances",
    "d2_features",
    "d2_histogram",
    "rms_radius",
]
