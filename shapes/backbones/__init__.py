"""Interchangeable backbones and the shared invariant head.

Pick one by name (``backbone=<name>`` on the command line, ``conf/backbone/<name>.yaml``), or
build it directly: ``build_backbone("distance", cutoff=1.5)``.
"""

from __future__ import annotations

import importlib

from shapes.backbones._base import Backbone, Classifier
from shapes.errors import ConfigError

__all__ = ["Backbone", "Classifier", "BACKBONES", "backbone_class", "build_backbone"]

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
