"""The training loop's resumable state: ``resume.pt`` (written and read here), the random-number states
it holds, the check that a resumed call matches the run, and the Ctrl-C/SIGTERM requests the loop acts
on between two steps. Used by :mod:`shapes.train` only."""

from __future__ import annotations

import os
import random
import signal
import threading
from pathlib import Path

import numpy as np
import torch

from shapes.errors import ConfigError, DataError, Interrupted
from shapes.run import RESUME, read_history

__all__ = ["StopRequests", "rng_states", "set_rng_states", "read_resume_state", "check_resumable", "RESUMABLE"]

RESUMABLE = ("threads", "device")  # settings a resumed run may change (the others must be the run's own)


class StopRequests:
    """Ctrl-C and SIGTERM while training: noted, and acted on by :meth:`check` between two steps.

    Signal masks cannot do this: a process-directed signal goes to any thread that does not block it
    (torch keeps threads of its own), and Python then runs its handler in the main thread wherever
    that thread is. A second signal stops at once (``hard``).
    """

    SIGNALS = (signal.SIGINT, signal.SIGTERM)

    def __init__(self):
        self.status: int | None = None
        self.hard = False
        self._previous: dict = {}

    def __enter__(self) -> "StopRequests":
        if threading.current_thread() is threading.main_thread():  # handlers can be set only there
            self._previous = {sig: signal.signal(sig, self._note) for sig in self.SIGNALS}
        return self

    def __exit__(self, *exc) -> None:
        for sig, handler in self._previous.items():
            signal.signal(sig, handler)

    def _note(self, signum, frame) -> None:
        if self.status is not None:
            self.hard = True
            raise Interrupted("interrupted", self.status)
        self.status = 128 + signum

    def check(self) -> None:
        if self.status is not None:
            raise Interrupted("interrupted", self.status)


def rng_states(gen: torch.Generator, device: torch.device) -> dict:
    """Every random-number state the loop draws from, as tensors and plain data (``weights_only`` loads them)."""
    name, keys, pos, has_gauss, cached = np.random.get_state()
    return {"python": random.getstate(), "numpy": [name, keys.tolist(), int(pos), int(has_gauss), float(cached)],
            "torch": torch.get_rng_state(), "generator": gen.get_state(),
            "cuda": torch.cuda.get_rng_state_all() if device.type == "cuda" else None}


def set_rng_states(states: dict, gen: torch.Generator, device: torch.device) -> None:
    version, internal, gauss = states["python"]
    random.setstate((version, tuple(internal), gauss))
    name, keys, pos, has_gauss, cached = states["numpy"]
    np.random.set_state((name, np.asarray(keys, dtype=np.uint32), pos, has_gauss, cached))
    torch.set_rng_state(states["torch"])
    gen.set_state(states["generator"])
    if device.type == "cuda" and states.get("cuda") is not None:
        torch.cuda.set_rng_state_all(states["cuda"])


def read_resume_state(run_dir: str | os.PathLike) -> dict:
    """The ``resume.pt`` of a run folder (``weights_only=True``); one DataError line when it is
    missing or unreadable, or when the run cannot go on (it finished, or diverged)."""
    run_dir = Path(run_dir)
    path = run_dir / RESUME
    if not run_dir.is_dir():
        raise DataError(f"resume={run_dir}: no such run folder; expected a folder written by `shapes train`.")
    if not path.is_file():
        raise DataError(f"resume={run_dir}: the folder has no {RESUME} (written by `shapes train` at the end of "
                        "each epoch, every train.save_every steps and when stopped); it cannot be resumed.")
    try:
        state = torch.load(path, map_location="cpu", weights_only=True)
        version = state["format"]
    except Exception as exc:  # torch's unpickling errors are many and multi-line
        first = " ".join(str(exc).split())[:200] or type(exc).__name__
        raise DataError(f"resume={run_dir}: {RESUME} cannot be read ({type(exc).__name__}: {first}).") from None
    if version != 1:
        raise DataError(f"resume={run_dir}: {RESUME} has format {version!r}; expected 1.")
    # the record says diverged even when the state was written before the loss went
    status = read_history(run_dir).get("status", state.get("status"))
    if status == "complete":
        raise DataError(f"resume={run_dir}: the run is complete (all {state['settings']['epochs']} epochs or its "
                        "time budget); nothing to resume. Evaluate it with `shapes eval`.")
    if status == "diverged":
        raise DataError(f"resume={run_dir}: the run diverged (a non-finite loss), and resuming would diverge the "
                        "same way; retrain with a lower train.lr.")
    return state


def check_resumable(state: dict, ours: dict, backbone, world: int, n_train: int) -> None:
    """ConfigError naming the first thing that differs between the run's state and this call (``ours``:
    the call's training settings as a dict)."""
    theirs = state["settings"]
    for key in ours:
        if key not in RESUMABLE and key != "extra" and theirs.get(key) != ours[key]:
            raise ConfigError(f"train.{key} is {ours[key]!r} but the run being resumed has {theirs.get(key)!r}; "
                              "a resumed run keeps its own options (only train.threads and train.device may change).")
    recorded = state["meta"]["backbone"]
    if recorded["name"] != backbone.name or recorded["options"] != backbone.config_dict():
        raise ConfigError(f"the backbone differs from the run being resumed ({recorded['name']} with "
                          f"{recorded['options']}); a resumed run keeps its own backbone.")
    if state["world"] != world:
        raise ConfigError(f"the run was trained by {state['world']} process(es), this is {world}; resume it with "
                          "as many (the order of the clouds is split between them).")
    if state["train_clouds"] != n_train:
        raise DataError(f"the dataset holds {n_train} training clouds, the run being resumed was trained on "
                        f"{state['train_clouds']}; resume it on the same dataset.")
