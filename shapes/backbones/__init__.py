"""Interchangeable backbones and the shared invariant head.

Pick one by name (``backbone=<name>`` on the command line, ``conf/backbone/<name>.yaml``), or
build it directly: ``build_backbone("distance", cutoff=1.5)``.
"""

from __future__ import annotations

import importlib

from shapes.backbones._base import RENAMED, Backbone, Classifier
from shapes.errors import ConfigError

__all__ = ["Backbone", "Classifier", "BACKBONES", "RENAMED", "backbone_class", "build_backbone", "stored_options"]

# name -> "module:Class"; imported on demand so a light backbone does not pay for a heavy one.
BACKBONES: dict[str, str] = {
    "plain": "shapes.backbones.plain:PlainBackbone",
    "distance": "shapes.backbones.distance:DistanceBackbone",
    "vector_gate": "shapes.backbones.vector_gate:VectorGateBackbone",
    "harmonic_attention": "shapes.backbones.harmonic_attention:HarmonicAttentionBackbone",
}


def backbone_class(name: str) -> type[Backbone]:
    """The class registered under ``name``; a ConfigError naming the valid choices otherwise."""
    if name not in BACKBONES:
        raise ConfigError(f"unknown backbone '{name}'; choose one of: {', '.join(BACKBONES)}.")
    module, cls = BACKBONES[name].split(":")
    return getattr(importlib.import_module(module), cls)


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
