"""Interchangeable backbones and the shared invariant head.

Pick one by name (``backbone=<name>`` on the command line, ``conf/backbone/<name>.yaml``), or
build it directly: ``build_backbone("distance", cutoff=1.5)``. Every public module of this package
(a file whose name has no leading underscore) is one backbone, named as its file, and holds the
:class:`Backbone` subclass of that ``name``: adding the file registers it.
"""

from __future__ import annotations

import importlib
import pkgutil

from shapes.backbones._base import RENAMED, Backbone, Classifier
from shapes.errors import ConfigError

__all__ = ["Backbone", "Classifier", "BACKBONES", "RENAMED", "backbone_class", "build_backbone", "stored_options"]

# name -> module, one per public file of this package, found without importing any of them: each is
# imported on demand, so a light backbone does not pay for a heavy one.
BACKBONES: dict[str, str] = {m.name: f"{__name__}.{m.name}"
                             for m in sorted(pkgutil.iter_modules(__path__), key=lambda m: m.name)
                             if not m.name.startswith("_") and not m.ispkg}


def backbone_class(name: str) -> type[Backbone]:
    """The class registered under ``name``; a ConfigError naming the valid choices otherwise."""
    if name not in BACKBONES:
        raise ConfigError(f"unknown backbone '{name}'; choose one of: {', '.join(BACKBONES)}.")
    module = importlib.import_module(BACKBONES[name])
    found = [c for c in vars(module).values()
             if isinstance(c, type) and issubclass(c, Backbone) and c.name == name]
    if len(found) != 1:  # a file of this package that breaks the rule above: the developer's mistake
        raise ConfigError(f"{module.__file__} should define one Backbone subclass with name = '{name}', "
                          f"found {len(found)}.")
    return found[0]


def build_backbone(name: str, **options) -> Backbone:
    """Build a backbone from its registry name and plain options (as stored in a checkpoint)."""
    return backbone_class(name)(**options)


def stored_options(name: str, options: dict) -> dict:
    """A checkpoint's recorded options in today's names, so that what it was trained with rebuilds it.

    ``handedness: true|false`` and ``parity: full|even`` are ``symmetry: se3|e3``; a handed backbone
    recorded before ``signed_normals`` existed read the normals' signs (``signed_normals: true``). Only
    for options read back from a checkpoint: on the command line the old names are refused.
    """
    options = dict(options)
    if "handedness" in options and "symmetry" not in options:
        options["symmetry"] = "se3" if options.pop("handedness") else "e3"
    if "parity" in options and "symmetry" not in options:
        options["symmetry"] = {"full": "se3", "even": "e3"}.get(options.pop("parity"), "unknown parity")
    if name in ("vector_gate", "harmonic_attention") and "signed_normals" not in options:
        options["signed_normals"] = True
    return options
