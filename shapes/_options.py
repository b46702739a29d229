"""Type and range checks of the command line's options, run before any work starts.

The overrides of the command line (:func:`check_overrides`, with Hydra's parser) or plain dicts in
(:func:`check_options`), :class:`shapes.errors.ConfigError` out (one line naming the option, what was expected
and what was found). The command line calls :func:`check_options` once per composed config (once per
swept value); the jobs check their own arguments again where they are called from Python.

Options with a rule below get it; any other option must keep the type of its default in
``shapes/conf/config.yaml`` (a number stays a number, a flag a flag), so an option added later is
type-checked from the day it is added.
"""

from __future__ import annotations

import numbers

from shapes import _checks as check
from shapes.errors import ConfigError
from shapes.geometry import POSE_REGIMES, check_regime

__all__ = ["check_options", "check_overrides", "eval_poses", "VERB_SECTIONS"]

POSES = tuple(POSE_REGIMES)  # cad, upright, any, mirrored
TRAIN_POSES = POSES[:3]
SPLITS = ("train", "val", "test")

# the sections each verb reads (also those it borrows: the demo reads sample.* and train.threads)
VERB_SECTIONS: dict[str, tuple[str, ...]] = {
    "parts": ("parts", "seed", "meshes"),
    "sample": ("sample", "seed", "meshes", "data"),
    "train": ("train", "seed", "data", "resume"),
    "eval": ("eval", "seed", "run", "allow_unfinished"),
    "compare": ("compare",),
    "predict": ("predict", "seed", "run", "allow_unfinished"),
    "export": ("export", "run", "allow_unfinished"),
    "demo": ("demo", "seed", "meshes", "sample", "train"),
}


def _threads(name, v):
    return check.optional(check.integer, name, v, low=1)


def _share(name, v):
    return check.number(name, v, low=0, high=1)


def _positive_int(name, v):
    return check.integer(name, v, low=1)


def _copies(name: str, value) -> dict:
    if not isinstance(value, dict) or set(value) != set(SPLITS):
        check.fail(name, "a mapping {train: n, val: n, test: n}", repr(value))
    return {k: check.integer(f"{name}.{k}", value[k], low=0) for k in SPLITS}


def eval_poses(value) -> list[str]:
    """``eval.poses`` as a list of regimes; a bare ``any`` is taken as ``[any]``, never letter by letter."""
    return check.listed("eval.poses", value, lambda n, v: check_regime(v, POSES, n), one_as_list=True)


def _minutes(name, value):
    if value is None:
        return {}
    if not isinstance(value, dict):
        check.fail(name, "a mapping of backbone name to minutes", repr(value))
    # null: that backbone trains for demo.epochs with no wall-time budget (results that do not depend on the load)
    return {k: None if v is None else check.number(f"{name}.{k}", v, low=0, low_open=True) for k, v in value.items()}


def _export_format(name, value):
    if value != "torchscript":
        check.fail(name, "torchscript (the only format; torch's ONNX exporter cannot translate the neighbour search)",
                   repr(value))
    return value


def _backbone_options(name, value):
    if value is None:
        return {}
    if not isinstance(value, dict) or not all(isinstance(v, dict) or v is None for v in value.values()):
        check.fail(name, "a mapping of backbone name to a mapping of its options", repr(value))
    return value


RULES = {
    "seed": lambda n, v: check.integer(n, v, low=0),
    "meshes": check.text, "data": check.text, "run": check.text,
    "parts.out": check.text,
    "parts.per_class": lambda n, v: check.integer(n, v, low=3),
    # sample
    "sample.points": lambda n, v: check.integer(n, v, low=2),
    "sample.mode": lambda n, v: check.choice(n, v, ("surface", "scan", "mixed")),
    "sample.scan_fraction": _share,
    "sample.normals": lambda n, v: check.choice(n, v, ("mesh", "estimated")),
    "sample.normals_k": lambda n, v: check.integer(n, v, low=3),
    "sample.normals_points": lambda n, v: check.integer(n, v, low=16),
    "sample.copies": _copies,
    "sample.oversample": _positive_int,
    "sample.noise": lambda n, v: check.number(n, v, low=0),
    "sample.twins": lambda n, v: check.choice(n, v, ("auto", "derived", "declared")),
    # train (train_classifier checks the same through shapes.train.check_settings)
    "train.epochs": _positive_int,
    "train.batch_size": _positive_int,
    "train.lr": lambda n, v: check.number(n, v, low=0, low_open=True),
    "train.weight_decay": lambda n, v: check.number(n, v, low=0),
    "train.warmup": lambda n, v: check.number(n, v, low=0, high=1, high_open=True),
    "train.poses": lambda n, v: check_regime(v, TRAIN_POSES, n),
    "train.jitter": lambda n, v: check.number(n, v, low=0),
    "train.mirror": _share,
    "train.head_hidden": _positive_int,
    "train.dropout": lambda n, v: check.number(n, v, low=0, high=1, high_open=True),
    "train.threads": _threads,
    "train.device": lambda n, v: check.choice(n, v, ("cpu", "cuda", "auto")),
    "train.max_minutes": lambda n, v: check.optional(check.number, n, v, low=0, low_open=True),
    "train.save_every": lambda n, v: check.optional(check.integer, n, v, low=1),
    "resume": lambda n, v: check.optional(check.text, n, v),
    # eval
    "eval.poses": lambda n, v: eval_poses(v),
    "eval.repeats": _positive_int,
    "eval.batch_size": _positive_int,
    "eval.threads": _threads,
    # compare
    "compare.out": lambda n, v: check.optional(check.text, n, v),
    "compare.poses": lambda n, v: None if v is None else check.listed(
        n, v, lambda name, x: check_regime(x, POSES, name), one_as_list=True),
    # predict
    "predict.input": lambda n, v: check.optional(check.text, n, v),
    "predict.poses": _positive_int,
    "predict.regime": lambda n, v: check_regime(v, TRAIN_POSES, n),
    "predict.accept": lambda n, v: check.number(n, v, low=0, low_open=True, high=1),
    "predict.calibration": lambda n, v: check.optional(check.text, n, v),
    "predict.out": check.text,
    "predict.units": lambda n, v: check.choice(n, v, ("mm", "m", "in")),
    "predict.normals": lambda n, v: check.choice(n, v, ("auto", "file", "estimated")),
    "predict.viewpoint": lambda n, v: check.optional(check.vector, n, v),
    "predict.orientation": lambda n, v: check.optional(check.choice, n, v, options=("single-view", "propagate")),
    "predict.batch_size": _positive_int,
    "predict.threads": _threads,
    "predict.clean.stray_k": _positive_int,
    "predict.clean.cluster_min_points": _positive_int,
    "predict.clean.plane_share": lambda n, v: check.number(n, v, low=0, low_open=True, high=1),
    "predict.clean.plane_beyond": _share,
    "predict.clean.plane_confidence": lambda n, v: check.number(n, v, low=0, low_open=True, high=1, high_open=True),
    # export
    "allow_unfinished": check.boolean,
    "export.format": _export_format,
    "export.out": lambda n, v: check.optional(check.text, n, v),
    "export.points": lambda n, v: check.optional(check.integer, n, v, low=2),
    "export.threads": _threads,
    # demo
    "demo.out": check.text,
    "demo.backbones": lambda n, v: check.listed(n, v, check.text, one_as_list=True),
    "demo.points": lambda n, v: check.integer(n, v, low=2),
    "demo.epochs": _positive_int,
    "demo.minutes": _minutes,
    "demo.mirror": _share,
    "demo.copies": _copies,
    "demo.options": _backbone_options,
}


def _like_default(name: str, value, default) -> None:
    """An option without a rule keeps its default's kind: flag, integer, number or text."""
    if isinstance(default, bool):
        check.boolean(name, value)
    elif isinstance(default, numbers.Integral):
        check.integer(name, value)
    elif isinstance(default, numbers.Real):
        check.number(name, value)
    elif isinstance(default, str):
        check.text(name, value)


def _walk(prefix: str, value, default, out: list) -> None:
    if prefix in RULES:
        out.append((prefix, value, default))
    elif isinstance(default, dict) and isinstance(value, dict):
        for k, v in value.items():
            _walk(f"{prefix}.{k}", v, default.get(k), out)
    elif isinstance(default, dict) and value is not None:
        check.fail(prefix, "a mapping of options", repr(value))
    else:
        out.append((prefix, value, default))


def check_options(verb: str, cfg: dict, defaults: dict | None = None) -> None:
    """Check every option ``verb`` reads in the resolved config ``cfg``; ``defaults`` is the config
    without overrides (types of options without a rule)."""
    defaults = defaults or {}
    found: list = []
    for section in VERB_SECTIONS.get(verb, ()):
        if section in cfg:
            _walk(section, cfg[section], defaults.get(section), found)
    for name, value, default in found:
        if verb == "demo" and name.startswith("train.") and name != "train.threads":
            continue  # the demo borrows only train.threads
        rule = RULES.get(name)
        if rule is not None:
            rule(name, value)
        elif value is not None and default is not None:
            _like_default(name, value, default)


def _refuse_renamed(key: str) -> None:
    """One line naming the new option for a renamed backbone option (``backbone.handedness=...``)."""
    from shapes.backbones import RENAMED

    group, _, option = key.lstrip("+~").partition(".")
    if group == "backbone" and option in RENAMED:
        raise ConfigError(f"backbone.{option} is now backbone.{RENAMED[option]}.")


def check_overrides(overrides: list[str], multirun: bool, verb: str, *, compose, groups: dict) -> None:
    """Compose the config (``compose(overrides)``) once per swept value and check the options ``verb``
    reads (:func:`check_options`), so a bad option fails before any work starts. ``groups``: the config
    groups and their choices (``{"backbone": ["distance", ...]}``). No ``verb``: the overrides alone."""
    from hydra.core.override_parser.overrides_parser import OverridesParser
    from omegaconf import OmegaConf

    try:
        parsed = OverridesParser.create().parse_overrides(overrides)
    except Exception as exc:  # hydra's parse errors carry a multi-line message
        raise ConfigError(f"cannot read the options {overrides}: {str(exc).splitlines()[0]}") from exc
    variants: list[list[str]] = [[]]
    for ov in parsed:
        key = ov.get_key_element()
        values = list(ov.sweep_string_iterator()) if ov.is_sweep_override() else [ov.get_value_element_as_str()]
        if ov.is_sweep_override() and not multirun:
            raise ConfigError(f"'{key}' has several values {values}; add -m to sweep over them.")
        if key in groups:
            for v in values:
                if v not in groups[key]:
                    raise ConfigError(f"unknown {key} '{v}'; choose one of: {', '.join(groups[key])}.")
        if key.startswith("hydra"):
            continue
        _refuse_renamed(key)
        variants = [prev + [f"{key}={v}"] for prev in variants for v in values]
    defaults = None
    for variant in variants[:64]:
        try:
            cfg = OmegaConf.to_container(compose(variant), resolve=True)
        except Exception as exc:
            first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            raise ConfigError(f"bad option in {variant}: {first}") from exc
        if verb:
            defaults = defaults or OmegaConf.to_container(compose([]), resolve=True)
            check_options(verb, cfg, defaults)
