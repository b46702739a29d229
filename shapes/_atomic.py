"""Write files and folders under a temporary name, then rename, so an interrupted run leaves
nothing half-written behind.

The temporary file and folder are made private (0600, 0700) by :mod:`tempfile`; before the rename
they get the modes an ordinary ``open``/``mkdir`` would give (0666/0777 less the umask: 0644 and 0755
under the usual umask 022), so others on the machine can read results as they could any file.
JSON is written as the standard defines it: no NaN or Infinity (a non-finite number becomes null).
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import shutil
import signal
import tempfile
from pathlib import Path
from typing import Iterator

__all__ = ["atomic_path", "atomic_dir", "write_json", "write_text", "finite_or_none", "signals_deferred"]


def _umask() -> int:
    mask = os.umask(0o022)  # reading the umask means setting it; put it straight back
    os.umask(mask)
    return mask


def _ordinary_mode(path: Path, folder: bool) -> None:
    """Give ``path`` the mode a plain ``open``/``mkdir`` would have given it."""
    if path.exists() and not path.is_symlink():
        os.chmod(path, (0o777 if folder else 0o666) & ~_umask())


@contextlib.contextmanager
def signals_deferred() -> Iterator[None]:
    """Hold Ctrl-C and SIGTERM until the block ends; they are delivered right after it.

    A signal that lands between making a temporary file and the ``try`` that removes it, or inside
    the clean-up itself, would leave the file behind; deferring it closes every such window.
    """
    if not hasattr(signal, "pthread_sigmask"):  # not on every platform
        yield
        return
    old = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT, signal.SIGTERM})
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, old)


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success rename it to ``path``, else delete it.

    The temporary name keeps the final suffix, so libraries that pick a format from the
    suffix (numpy's ``.npz``, matplotlib's ``.png``) still work. Ctrl-C and SIGTERM wait until
    the file is in place (or removed), so an interrupted run never leaves a temporary file.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with signals_deferred():
        fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=f".part{path.suffix}", dir=path.parent)
        os.close(fd)
        tmp = Path(tmp)
        try:
            yield tmp
            _ordinary_mode(tmp, folder=False)
            os.replace(tmp, path)
        except BaseException:
            tmp.unlink(missing_ok=True)
            raise


@contextlib.contextmanager
def atomic_dir(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary folder beside ``path``; on success it replaces ``path`` whole.

    The body may run long (``shapes sample`` draws every cloud in it) and stays open to Ctrl-C and
    SIGTERM; making the folder, the swap into place and the removal after a failure wait for them, so
    an interruption leaves either the old ``path`` or the new one, and no temporary folder.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = None
    try:
        with signals_deferred():
            tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent))
        yield tmp
        with signals_deferred():
            _ordinary_mode(tmp, folder=True)
            if path.exists():
                old = path.with_name(f".{path.name}.old")
                shutil.rmtree(old, ignore_errors=True)
                os.replace(path, old)
                os.replace(tmp, path)
                shutil.rmtree(old, ignore_errors=True)
            else:
                os.replace(tmp, path)
    except BaseException:
        with signals_deferred():
            if tmp is not None:
                shutil.rmtree(tmp, ignore_errors=True)
        raise


def write_text(path: str | os.PathLike, text: str) -> Path:
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(path)


def finite_or_none(obj):
    """``obj`` with every non-finite float (NaN, ±inf) replaced by None, in nested dicts, lists, tuples.

    A metric that is undefined (a mean over nothing) is null in JSON, never the non-standard NaN.
    """
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: finite_or_none(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [finite_or_none(v) for v in obj]
    return obj


def write_json(path: str | os.PathLike, obj) -> Path:
    """Standard JSON (``allow_nan=False``): non-finite numbers are written as null."""
    return write_text(path, json.dumps(finite_or_none(obj), indent=2, sort_keys=False, allow_nan=False) + "\n")
