"""The registry of part families and the one entry point that builds and checks a part."""

from __future__ import annotations

import inspect
from typing import Callable

import trimesh

from shapes.errors import ConfigError, InputError
from shapes.parts._bearing import ball_bearing
from shapes.parts._bracket import angle_bracket
from shapes.parts._fasteners import hex_nut, plain_washer
from shapes.parts._gears import helical_gear, spur_gear
from shapes.parts._mesh import check_solid
from shapes.parts._spring import compression_spring
from shapes.parts._thread import threaded_stud
from shapes.parts._turned import bolted_flange, bushing, stepped_shaft, v_pulley

__all__ = ["FAMILIES", "HANDED_FAMILIES", "build_part"]

FAMILIES: dict[str, Callable[..., trimesh.Trimesh]] = {
    "hex_nut": hex_nut,
    "plain_washer": plain_washer,
    "ball_bearing": ball_bearing,
    "spur_gear": spur_gear,
    "bolted_flange": bolted_flange,
    "stepped_shaft": stepped_shaft,
    "v_pulley": v_pulley,
    "bushing": bushing,
    "threaded_stud": threaded_stud,
    "compression_spring": compression_spring,
    "helical_gear": helical_gear,
    "angle_bracket": angle_bracket,
}

# Families with a ``hand`` parameter: "left" is the exact mirror image (x -> -x) of "right".
HANDED_FAMILIES = frozenset(name for name, fn in FAMILIES.items() if "hand" in inspect.signature(fn).parameters)


def build_part(family: str, **params) -> trimesh.Trimesh:
    """Build one part of ``family`` from its parameters (mm) and check it is one closed solid.

    Parameters
    ----------
    family : a key of ``FAMILIES``
    **params : the generator's keyword arguments; omitted ones take the generator's defaults

    Returns
    -------
    mesh : watertight, outward-wound, positive volume, canonical vertex order
    """
    if family not in FAMILIES:
        raise ConfigError(f"unknown part family {family!r}; expected one of {', '.join(FAMILIES)}.")
    accepted = inspect.signature(FAMILIES[family]).parameters
    unknown = [k for k in params if k not in accepted]
    if unknown:
        raise InputError(
            f"{family}: unknown parameter(s) {', '.join(unknown)}; expected some of {', '.join(accepted)}."
        )
    mesh = FAMILIES[family](**params)
    return check_solid(mesh, f"{family} part {params}")
