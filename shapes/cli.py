"""The ``shapes`` command: one verb per job; every verb takes Hydra overrides (``key=value``).

Hydra lives here and in ``shapes/conf/``; the jobs below it take plain arguments.
"""

from __future__ import annotations

import os
import signal
import sys
import threading
from pathlib import Path

from shapes.errors import ConfigError, Interrupted, ShapesError

__all__ = ["main", "VERBS", "CONF_DIR"]

CONF_DIR = Path(__file__).resolve().parent / "conf"  # shipped inside the package (wheel package data)

VERBS: dict[str, str] = {
    "parts": "write the demo catalog of CAD-like parts (meshes + catalog.json) to meshes=<folder>",
    "sample": "turn a catalog folder (meshes=...) into point-cloud shards (data=...)",
    "train": "train a classifier (backbone=<name>) on the shards; -m sweeps over values",
    "eval": "score a trained run (run=<folder>|latest) under random poses and mirror images",
    "compare": "evaluated runs side by side (shapes compare RUN_DIR... ; a sweep folder holds several): "
               "one table, mean ± sd over seeds, overlaid curves",
    "demo": "parts → sample → train each backbone briefly → evaluate → one combined report",
    "predict": "name new scans (predict.input=<file|folder>) with a run: class, confidence, or not a known part",
    "export": "write a run's classifier as a TorchScript file that loads with torch alone (export.format=torchscript)",
}

# the config sections each verb reads, shown by `shapes <verb> --help`
SECTIONS: dict[str, tuple[str, ...]] = {
    "parts": ("parts", "seed"),
    "sample": ("meshes", "data", "sample", "seed"),
    "train": ("backbone", "data", "train", "seed", "resume"),
    "eval": ("run", "eval", "seed"),
    "compare": ("compare",),
    "demo": ("meshes", "demo", "seed"),
    "predict": ("run", "predict", "seed"),
    "export": ("run", "export"),
}

FLAGS = {"-m", "--multirun", "--traceback", "-h", "--help"}

_verb: str = ""  # the verb the Hydra task below dispatches on
_positional: list[str] = []  # `shapes compare`'s run folders (the only verb that takes plain arguments)


def _usage() -> str:
    width = max(map(len, VERBS))
    lines = ["usage: shapes <verb> [key=value ...] [-m] [--traceback] [--help]", "", "verbs:"]
    lines += [f"  {v:<{width}}  {text}" for v, text in VERBS.items()]
    lines += ["", "Run `shapes <verb> --help` for the options of a verb; options are Hydra overrides."]
    return "\n".join(lines)


def _error(message: str) -> int:
    print(f"error: {' '.join(str(message).split())}", file=sys.stderr)
    return 2


def _groups() -> dict[str, list[str]]:
    return {d.name: sorted(p.stem for p in d.glob("*.yaml")) for d in CONF_DIR.iterdir() if d.is_dir()}


def _compose(overrides: list[str]):
    from hydra import compose, initialize_config_dir
    from hydra.core.global_hydra import GlobalHydra

    GlobalHydra.instance().clear()
    with initialize_config_dir(config_dir=str(CONF_DIR), version_base=None):
        return compose(config_name="config", overrides=overrides)


def _check_overrides(overrides: list[str], multirun: bool, verb: str = "") -> None:
    from shapes._options import check_overrides

    check_overrides(overrides, multirun, verb, compose=_compose, groups=_groups())


def _verb_help(verb: str, overrides: list[str]) -> str:
    from omegaconf import OmegaConf

    cfg = _compose(overrides)
    full = OmegaConf.to_container(cfg, resolve=False)
    shown = {k: full[k] for k in SECTIONS[verb]}
    lines = [f"shapes {verb}: {VERBS[verb]}", "",
             f"usage: shapes {verb}" + (" RUN_DIR..." if verb == "compare" else "") + " [key=value ...]"
             + (" [-m]" if verb == "train" else "") + " [--traceback]", "",
             "choices:"]
    lines += [f"  {g}: {', '.join(opts)}" for g, opts in _groups().items()]
    lines += ["  train.poses: cad, upright, any", "  eval.poses: a list from cad, upright, any, mirrored",
              "  sample.mode: surface, scan, mixed", "  sample.twins: auto, derived, declared"]
    lines += ["", "options (current values; override any as key=value):", OmegaConf.to_yaml(shown).rstrip()]
    return "\n".join(lines)


def _plain(node):
    from omegaconf import OmegaConf

    return OmegaConf.to_container(node, resolve=True) if OmegaConf.is_config(node) else node


def _backbone_from_file(name: str, options: dict | None = None):
    """Build ``shapes/conf/backbone/<name>.yaml`` with ``options`` on top (the demo trains several)."""
    from omegaconf import OmegaConf

    from shapes.run import backbone_from_config

    path = CONF_DIR / "backbone" / f"{name}.yaml"
    if not path.is_file():
        raise ConfigError(f"unknown backbone '{name}'; choose one of: {', '.join(_groups()['backbone'])}.")
    return backbone_from_config(_plain(OmegaConf.merge(OmegaConf.load(path), options or {})))


def _fit(backbone, data, run_dir, **settings) -> Path:
    """Train ``backbone`` (``shapes.train``) or fit the classical baseline (``shapes.baseline``) into ``run_dir``;
    ``settings`` are :class:`shapes.train.TrainSettings`'s."""
    from shapes.classic import D2Options
    from shapes.train import TrainSettings, train_classifier

    s = TrainSettings(**settings)
    if isinstance(backbone, D2Options):
        from shapes.baseline import train_d2  # the classical baseline: fitted, not trained by steps

        return train_d2(data, run_dir, backbone, seed=s.seed, threads=s.threads, extra=s.extra)
    return train_classifier(backbone, data, run_dir, s)


def _run_parts(cfg) -> None:
    from shapes.parts import summarize_catalog, write_demo_catalog

    out = write_demo_catalog(cfg.parts.out, seed=cfg.seed, per_class=cfg.parts.per_class)
    rows = summarize_catalog(out)
    width = max(len(r["name"]) for r in rows)
    print(f"{'class':<{width}}  {'mirror twin':<{width}}  inst  faces       standard")
    for r in rows:
        twin = "(itself)" if r["twin"] == r["name"] else r["twin"]
        print(f"{r['name']:<{width}}  {twin:<{width}}  {r['instances']:>4}  "
              f"{r['faces_min']:>5}-{r['faces_max']:<5}  {r['standard']}")
    print(f"wrote {sum(r['instances'] for r in rows)} meshes in {len(rows)} classes to {out}/ "
          "(catalog.json lists classes, twins and standards)")


def _run_sample(cfg) -> None:
    from shapes.data import build_dataset, read_meta, twin_printer

    s = cfg.sample
    out = build_dataset(cfg.meshes, cfg.data, points=s.points, copies=_plain(s.copies), mode=s.mode,
                        scan_fraction=s.scan_fraction, oversample=s.oversample, noise=s.noise,
                        normals=s.normals, normals_k=s.normals_k,
                        normals_points=s.normals_points, seed=cfg.seed, progress=True,
                        twins=s.twins, say=twin_printer())
    meta = read_meta(out)
    print(f"wrote {sum(meta['counts'].values())} clouds of {s.points} points "
          f"({', '.join(f'{k} {v}' for k, v in meta['counts'].items())}) for {len(meta['classes'])} classes to {out}/")


def _run_train(cfg) -> None:
    from hydra.core.hydra_config import HydraConfig
    from omegaconf import OmegaConf

    if cfg.get("resume"):
        return _resume_train(cfg)

    from shapes._atomic import write_text
    from shapes._runtime import set_threads
    from shapes.run import backbone_from_config
    from shapes.seeding import seed_everything
    from shapes.train import TrainSettings, check_settings

    run_dir = Path(HydraConfig.get().runtime.output_dir)
    try:
        settings = check_settings(TrainSettings(**_plain(cfg.train), seed=cfg.seed,
                                                extra={"config": OmegaConf.to_container(cfg, resolve=True)}))
        set_threads(settings.threads)
        seed_everything(settings.seed)  # before the backbone is built: building it draws its weights
        backbone = backbone_from_config(_plain(cfg.backbone))
        ckpt = _fit(backbone, cfg.data, run_dir, **vars(settings))
    except BaseException:
        _drop_if_empty(run_dir)  # Hydra made the folder before the job failed: leave nothing behind
        raise
    if int(os.environ.get("RANK", "0")) != 0:  # under torchrun only the first process writes and reports
        _drop_if_empty(run_dir)  # Hydra made a folder of this process's own (another second than rank 0's)
        return
    write_text(run_dir / "config.yaml", OmegaConf.to_yaml(cfg, resolve=True))
    print(f"best checkpoint: {ckpt}\nnext: shapes eval run={run_dir}")


def _drop_if_empty(folder: Path) -> None:
    if folder.is_dir() and not any(folder.iterdir()):
        folder.rmdir()


def _resume_train(cfg) -> None:
    """``shapes train resume=RUN_DIR``: go on from the run's resume.pt with its own options and backbone
    (``train.threads`` and ``train.device`` may be given anew), in its own folder."""
    from hydra.core.hydra_config import HydraConfig
    from omegaconf import OmegaConf

    from shapes._atomic import write_text
    from shapes.train import resume_training

    run_dir = Path(cfg.resume)
    given = {o.split("=", 1)[0].lstrip("+~") for o in HydraConfig.get().overrides.task}
    changes = {k: cfg.train[k] for k in ("threads", "device") if f"train.{k}" in given}
    ckpt, settings = resume_training(run_dir, **changes)
    if int(os.environ.get("RANK", "0")) != 0:
        return
    config = settings.extra.get("config")
    if isinstance(config, dict):
        write_text(run_dir / "config.yaml", OmegaConf.to_yaml(OmegaConf.create(config)))
    print(f"best checkpoint: {ckpt}\nnext: shapes eval run={run_dir}")


def _run_eval(cfg) -> None:
    from shapes._options import eval_poses
    from shapes.evaluate import evaluate_runs

    e = cfg.eval
    done = evaluate_runs(cfg.run, allow_unfinished=cfg.allow_unfinished, poses=tuple(eval_poses(_plain(e.poses))),
                         repeats=e.repeats, seed=cfg.seed, batch_size=e.batch_size, threads=e.threads)
    for metrics, report in done:  # a folder of runs (a sweep) is evaluated run by run
        if len(done) > 1:
            print(f"{Path(metrics['checkpoint']).parent}:")
        for regime, m in metrics["regimes"].items():
            print(f"{regime:>8}: accuracy {100 * m['accuracy']:5.1f}%")
        print(f"report: {report}")


def _run_compare(cfg) -> None:
    import time

    from shapes.compare import compare_runs

    c = cfg.compare
    out = c.out or f"runs/compare/{time.strftime('%Y%m%d-%H%M%S')}"
    report = compare_runs(_positional, out, poses=_plain(c.poses))
    print(Path(report).read_text().split("\n## ")[0].rstrip())
    print(f"\nreport: {report} (and {Path(report).with_suffix('.html').name}, compare.json, plots)")


def _run_demo(cfg) -> None:
    from shapes.demo import run_demo
    from shapes.evaluate import evaluate_run

    d = cfg.demo
    options = _plain(d.get("options")) or {}
    factories = {name: (lambda name=name: _backbone_from_file(name, options.get(name))) for name in d.backbones}
    for name in d.backbones:
        factories[name]()  # fail fast on a bad backbone name, before any work
    minutes = _plain(d.get("minutes")) or {}
    unknown = sorted(set(minutes) - set(_groups()["backbone"]))
    if unknown:
        raise ConfigError(f"demo.minutes names unknown backbone(s) {unknown}; "
                          f"choose from {', '.join(_groups()['backbone'])}.")
    report = run_demo(cfg.meshes, d.out, factories, fit=_fit, evaluate=evaluate_run, points=d.points,
                      copies=_plain(d.copies), epochs=d.epochs,
                      mode=cfg.sample.mode, scan_fraction=cfg.sample.scan_fraction, normals=cfg.sample.normals,
                      seed=cfg.seed, threads=cfg.train.threads, minutes=minutes, mirror=d.mirror,
                      twins=cfg.sample.twins)
    print(f"demo report: {report}")


def _run_predict(cfg) -> None:
    from shapes.predict import format_table, predict_files
    from shapes.run import trained_run

    p = cfg.predict
    if p.input is None:
        raise ConfigError("predict.input is not set; name a scan or mesh file, or a folder of them "
                          "(predict.input=<path>).")
    result = predict_files(trained_run(cfg.run, cfg.allow_unfinished), p.input, poses=p.poses, regime=p.regime,
                           accept=p.accept, calibration=p.calibration, seed=cfg.seed, batch_size=p.batch_size, threads=p.threads,
                           out=p.out, units=p.units, clean=_plain(p.clean), normals=p.normals,
                           viewpoint=_plain(p.viewpoint), orientation=p.orientation)
    print(format_table(result))
    print(f"wrote {p.out}")
    if result["failed"]:  # every other file was classified; the status tells a script some were not
        print(f"error: {result['failed']} of {len(result['results'])} file(s) could not be classified; "
              f"see their rows in {p.out}", file=sys.stderr)
        raise SystemExit(1)


def _run_export(cfg) -> None:
    from shapes.export import export_run
    from shapes.run import trained_run

    e = cfg.export
    result = export_run(trained_run(cfg.run, cfg.allow_unfinished), e.out, format=e.format, points=e.points,
                        threads=e.threads)
    meta = result["metadata"]
    inputs = " and ".join(f"{name} (1, {meta['points']}, 3)" for name in meta["inputs"])
    print(f"wrote {result['path']}: {meta['backbone']} classifier of {len(meta['classes'])} classes taking {inputs}; "
          f"logits within {result['max_difference']:.1e} of the run's network; load it with torch.jit.load")


def _interrupted(exc: KeyboardInterrupt) -> int:
    """One line for Ctrl-C or SIGTERM; the status a shell expects (128 + the signal's number)."""
    text = str(exc) if isinstance(exc, Interrupted) and str(exc) != "interrupted" else (
        f"{_verb or 'shapes'} interrupted by {'SIGTERM' if getattr(exc, 'status', 130) == 143 else 'Ctrl-C'}; "
        "files are renamed into place only when complete, so nothing half-written is left.")
    _error(text)
    return getattr(exc, "status", 130)


def _on_sigterm(signum, frame):
    raise Interrupted("interrupted", 128 + signal.SIGTERM)


def _task(cfg) -> None:
    try:
        globals()[f"_run_{_verb}"](cfg)
    except ShapesError as exc:
        if os.environ.get("SHAPES_TRACEBACK"):
            raise
        raise SystemExit(_error(exc)) from None
    except KeyboardInterrupt as exc:
        if os.environ.get("SHAPES_TRACEBACK"):
            raise
        raise SystemExit(_interrupted(exc)) from None


def main(argv: list[str] | None = None) -> int:
    global _verb
    argv = list(sys.argv[1:] if argv is None else argv)
    if not argv or argv[0] in ("-h", "--help", "help"):
        print(_usage())
        return 0
    verb, rest = argv[0], argv[1:]
    if verb not in VERBS:
        return _error(f"unknown verb '{verb}'; choose one of: {', '.join(VERBS)}.")
    flags = [a for a in rest if a.startswith("-")]
    overrides = [a for a in rest if not a.startswith("-")]
    if verb == "export":  # `shapes export format=...` reads as export.format
        overrides = [f"export.{a}" if a.startswith("format=") else a for a in overrides]
    positional = [a for a in overrides if "=" not in a] if verb == "compare" else []
    overrides = [a for a in overrides if a not in positional]
    if verb == "compare" and not positional and not ({"-h", "--help"} & set(flags)):
        return _error("shapes compare needs run folders: shapes compare RUN_DIR... (a sweep folder counts as its runs).")
    resume = [a.split("=", 1)[1] for a in overrides if a.startswith("resume=") and a != "resume=null"]
    if verb == "train" and resume:  # the run's own options, in the run's own folder
        others = [a for a in overrides if not a.startswith(("resume=", "train.threads=", "train.device="))]
        if others or "-m" in flags or "--multirun" in flags:
            return _error(f"resume={resume[-1]} goes on with the run's own options; '{(others or ['-m'])[0]}' cannot "
                          "be given with it (only train.threads and train.device can).")
        if not Path(resume[-1]).is_dir():
            return _error(f"resume={resume[-1]}: no such run folder; expected a folder written by `shapes train`.")
        overrides.append(f"hydra.run.dir={resume[-1]}")
    bad = [f for f in flags if f not in FLAGS]
    if bad:
        return _error(f"unknown flag {bad[0]}; expected key=value overrides or one of {', '.join(sorted(FLAGS))}.")
    multirun = "-m" in flags or "--multirun" in flags
    if multirun and verb != "train":
        return _error(f"-m (sweeps) is for 'shapes train', not 'shapes {verb}'.")
    if "--traceback" in flags:
        os.environ["SHAPES_TRACEBACK"] = "1"
        os.environ["HYDRA_FULL_ERROR"] = "1"
    try:
        if "-h" in flags or "--help" in flags:
            _check_overrides(overrides, multirun)
            print(_verb_help(verb, overrides))
            return 0
        _check_overrides(overrides, multirun, verb)
    except ShapesError as exc:
        if os.environ.get("SHAPES_TRACEBACK"):
            raise
        return _error(exc)

    import hydra

    _verb = verb
    _positional[:] = positional
    task = hydra.main(config_path=str(CONF_DIR), config_name="config", version_base=None)(_task)
    saved = sys.argv
    sys.argv = [f"shapes {verb}"] + (["-m"] if multirun else []) + overrides + [f"hydra.job.name={verb}"]
    if verb != "train":
        sys.argv.append("hydra.run.dir=.")  # only `train` makes a run folder of its own
    in_main = threading.current_thread() is threading.main_thread()  # signals can be set only there
    previous = signal.signal(signal.SIGTERM, _on_sigterm) if in_main else None
    try:
        task()
    except SystemExit as exc:
        return int(exc.code or 0)
    except KeyboardInterrupt as exc:  # outside the job itself (Hydra starting up or finishing)
        if os.environ.get("SHAPES_TRACEBACK"):
            raise
        return _interrupted(exc)
    finally:
        sys.argv = saved
        if in_main:
            signal.signal(signal.SIGTERM, signal.SIG_DFL if previous is None else previous)
    return 0
