"""Checkpoints load with torch.load(..., weights_only=True): a file that would run code when
unpickled is refused unread, and a truncated or garbled file gives one line, never a traceback."""

import pathlib
from pathlib import Path

import pytest
import torch

from conftest import one_error_line
from shapes.cli import main
from shapes.errors import DataError
from shapes.run import load_classifier


class _TouchOnLoad:
    """Unpickling this calls pathlib.Path.touch(marker): code run by merely loading the file."""

    def __init__(self, marker: Path):
        self.marker = marker

    def __reduce__(self):
        return (pathlib.Path.touch, (pathlib.Path(self.marker),))


@pytest.fixture
def armed(tmp_path):
    """A checkpoint whose unpickling would create ``marker``; the marker does not exist yet."""
    marker = tmp_path / "marker"
    path = tmp_path / "evil.pt"
    torch.save({"state_dict": {"w": torch.zeros(2)}, "meta": _TouchOnLoad(marker)}, path)
    assert not marker.exists()
    return path, marker


def test_the_crafted_checkpoint_is_armed(armed):
    # the other direction: an unsafe load (weights_only=False) really runs the payload, so the
    # refusals below are not vacuous (reference: the pickle module's documented __reduce__ protocol)
    path, marker = armed
    torch.load(path, weights_only=False)
    assert marker.exists()


def test_eval_refuses_a_checkpoint_that_would_run_code(armed, tmp_path, monkeypatch, capsys):
    # source: torch.load documentation, weights_only=True limits unpickling to tensors and primitive types
    path, marker = armed
    monkeypatch.chdir(tmp_path)
    assert main(["eval", f"run={path}"]) == 2
    line = one_error_line(capsys)
    assert "holds objects other than weights" in line and "refused" in line
    assert "weights_only" not in line and "trust" not in line.lower()  # never suggests turning the safety off
    assert not marker.exists()
    with pytest.raises(DataError) as info:
        load_classifier(path)
    assert "\n" not in str(info.value) and not marker.exists()


@pytest.mark.parametrize("damage", ["truncated", "garbage", "empty", "folder"])
def test_a_damaged_checkpoint_gives_one_line(damage, tmp_path, monkeypatch, capsys):
    # common practice: a copy cut short or a wrong file must be named, not dumped as a traceback
    path = tmp_path / "checkpoint.pt"
    torch.save({"state_dict": {"w": torch.zeros(100)}, "meta": {}}, tmp_path / "good.pt")
    good = (tmp_path / "good.pt").read_bytes()
    if damage == "truncated":
        path.write_bytes(good[: len(good) // 2])
    elif damage == "garbage":
        path.write_bytes(b"this is not a checkpoint at all\n" * 4)
    elif damage == "empty":
        path.write_bytes(b"")
    else:
        path.mkdir()
    monkeypatch.chdir(tmp_path)
    assert main(["eval", f"run={path}"]) == 2
    line = one_error_line(capsys)
    assert str(path) in line or "checkpoint" in line


@pytest.mark.skipif(not hasattr(__import__("os"), "geteuid") or __import__("os").geteuid() == 0,
                    reason="root reads files whatever their mode")
def test_an_unreadable_checkpoint_gives_one_line(tmp_path, monkeypatch, capsys):
    path = tmp_path / "checkpoint.pt"
    torch.save({"state_dict": {}, "meta": {}}, path)
    path.chmod(0)
    monkeypatch.chdir(tmp_path)
    try:
        assert main(["eval", f"run={path}"]) == 2
        assert "cannot be read" in one_error_line(capsys)
    finally:
        path.chmod(0o644)


def test_a_read_error_from_the_system_gives_one_line(tmp_path, monkeypatch, capsys):
    # the same path as a file without read permission, for a run as root (which reads any file)
    path = tmp_path / "checkpoint.pt"
    torch.save({"state_dict": {}, "meta": {}}, path)

    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied", str(path))

    monkeypatch.setattr(torch, "load", refuse)
    monkeypatch.chdir(tmp_path)
    assert main(["eval", f"run={path}"]) == 2
    assert "cannot be read: Permission denied" in one_error_line(capsys)
