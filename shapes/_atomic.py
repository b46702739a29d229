"""Write files and folders under a temporary name, then rename, so an interrupted run leaves
nothing half-written behind."""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import tempfile
from pathlib import Path
from typing import Iterator

__all__ = ["atomic_path", "atomic_dir", "write_json", "write_text"]


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success rename it to ``path``, else delete it.

    The temporary name keeps the final suffix, so libraries that pick a format from the
    suffix (numpy's ``.npz``, matplotlib's ``.png``) still work.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=f".part{path.suffix}", dir=path.parent)
    os.close(fd)
    tmp = Path(tmp)
    try:
        yield tmp
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


@contextlib.contextmanager
def atomic_dir(path: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary folder beside ``path``; on success it replaces ``path`` whole."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent))
    try:
        yield tmp
        if path.exists():
            old = path.with_name(f".{path.name}.old")
            shutil.rmtree(old, ignore_errors=True)
            os.replace(path, old)
            os.replace(tmp, path)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, path)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def write_text(path: str | os.PathLike, text: str) -> Path:
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(path)


def write_json(path: str | os.PathLike, obj) -> Path:
    return write_text(path, json.dumps(obj, indent=2, sort_keys=False) + "\n")
