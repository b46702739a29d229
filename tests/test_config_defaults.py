"""Every default of the non-backbone sections of shapes/conf/config.yaml agrees with the default of the
dataclass field or function parameter it feeds, so a Python call and the command line do the same."""

import dataclasses
import inspect

import pytest

from shapes.cli import CONF_DIR
from shapes.data import DEFAULT_COPIES, CleanSettings, build_dataset
from shapes.compare import compare_runs
from shapes.demo import DEMO_COPIES, DEMO_MINUTES, run_demo
from shapes.evaluate import evaluate_run
from shapes.export import export_run
from shapes.parts import write_demo_catalog
from shapes.predict import predict_files
from shapes.train import TrainSettings

# options the command line supplies to an argument the code requires (no default to agree with),
# or that only the command reads; each with the reason
COMMAND_ONLY = {
    "parts.out": "the catalog folder: write_demo_catalog's out_dir, resolved from `meshes`",
    "compare.out": "null: the command names a folder runs/compare/<time>; compare_runs requires one",
    "predict.input": "the files to name: predict_files requires them",
    "predict.out": "the command always writes its results file; a Python call returns them and writes when asked",
    "demo.out": "the demo's folder: run_demo requires one",
    "demo.backbones": "names of yaml files; run_demo takes a builder per name",
    "demo.options": "per-backbone yaml overrides, applied by the command line when it builds each backbone",
}


def _parameters(fn) -> dict:
    return {k: p.default for k, p in inspect.signature(fn).parameters.items() if p.default is not p.empty}


def _fields(cls) -> dict:
    return {f.name: f.default if f.default is not dataclasses.MISSING else f.default_factory()
            for f in dataclasses.fields(cls)}


def _code_defaults() -> dict:
    """Section -> option -> the default in the code it feeds (None standing for a documented constant
    is replaced by that constant)."""
    demo = _parameters(run_demo)
    demo.update(copies=DEMO_COPIES, minutes=DEMO_MINUTES)
    return {
        "parts": _parameters(write_demo_catalog),
        "sample": {**_parameters(build_dataset), "copies": DEFAULT_COPIES},
        "train": _fields(TrainSettings),
        "eval": _parameters(evaluate_run),
        "compare": _parameters(compare_runs),
        "predict": {**_parameters(predict_files), "clean": _fields(CleanSettings)},
        "export": _parameters(export_run),
        "demo": demo,
    }


def _config() -> dict:
    from hydra import compose, initialize_config_dir
    from hydra.core.global_hydra import GlobalHydra
    from omegaconf import OmegaConf

    GlobalHydra.instance().clear()
    with initialize_config_dir(config_dir=str(CONF_DIR), version_base=None):
        return OmegaConf.to_container(compose(config_name="config"), resolve=True)


def _plain(value):
    return list(value) if isinstance(value, tuple) else value


def _pairs():
    cfg, code = _config(), _code_defaults()
    for section, options in code.items():
        for key, value in cfg[section].items():
            yield f"{section}.{key}", value, options.get(key, KeyError)
    # the demo samples with the sample section's mode, scan share, normals and twin map
    for key in ("mode", "scan_fraction", "normals", "twins"):
        yield f"sample.{key} (demo)", cfg["sample"][key], code["demo"][key]


@pytest.mark.parametrize("name, value, default", list(_pairs()), ids=lambda v: v if isinstance(v, str) else "")
def test_a_config_default_is_the_code_default(name, value, default):
    # convention: docs/design.md, "Options"
    if name in COMMAND_ONLY:
        return
    assert default is not KeyError, f"{name} feeds no parameter or field with a default; map it or list it in COMMAND_ONLY"
    if isinstance(value, dict) and isinstance(default, dict) and name == "predict.clean":
        assert value == {k: default[k] for k in value} and set(value) == set(default)
    else:
        assert _plain(value) == _plain(default), f"{name}: config.yaml says {value!r}, the code {default!r}"


def test_every_command_only_option_exists():
    # convention: docs/design.md, "Options"
    cfg = _config()
    for name in COMMAND_ONLY:
        section, key = name.split(".")
        assert key in cfg[section], name
