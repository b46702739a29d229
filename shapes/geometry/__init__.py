"""Geometry core: poses, real spherical harmonics, Wigner-D, coupling coefficients, neighbourhoods.

torch and numpy only. Conventions (rotations act on column vectors, harmonics' order and phase)
are stated in each module's docstring and in docs/design.md, and checked against scipy/sympy in tests.
"""

from shapes.geometry._coupling import clebsch_gordan, complex_clebsch_gordan, real_basis_change
from shapes.geometry._harmonics import L_MAX, harmonics_dim, spherical_harmonics
from shapes.geometry._neighbours import (
    Neighbours,
    SmoothNeighbours,
    gather_neighbours,
    knn_graph,
    neighbour_taper,
    radius_graph,
    relative_vectors,
    smooth_graph,
)
from shapes.geometry._poses import (
    POSE_REGIMES,
    apply_pose,
    rotation_about_axis,
    axis_and_angle_of,
    rotation_from_quaternion,
    random_improper,
    random_poses,
    check_regime,
    RENAMED_REGIMES,
    random_reflections,
    uniform_rotations,
    random_z_rotations,
    reflection,
    rotation_angle,
    rotations_about_z,
)
from shapes.geometry._wigner import wigner_d, wigner_d_list

__all__ = [
    # poses
    "POSE_REGIMES",
    "uniform_rotations",
    "rotation_from_quaternion",
    "rotation_about_axis",
    "axis_and_angle_of",
    "rotation_angle",
    "rotations_about_z",
    "random_z_rotations",
    "reflection",
    "random_reflections",
    "random_improper",
    "random_poses",
    "check_regime",
    "RENAMED_REGIMES",
    "apply_pose",
    # harmonics
    "L_MAX",
    "harmonics_dim",
    "spherical_harmonics",
    # Wigner-D and coupling
    "wigner_d",
    "wigner_d_list",
    "clebsch_gordan",
    "complex_clebsch_gordan",
    "real_basis_change",
    # neighbourhoods
    "Neighbours",
    "knn_graph",
    "radius_graph",
    "SmoothNeighbours",
    "smooth_graph",
    "neighbour_taper",
    "gather_neighbours",
    "relative_vectors",
]
