"""The wheel carries its configs: installed on its own, `shapes` works from any folder."""

import os
import shutil
import subprocess
import sys
import sysconfig
import venv
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent


def _run(args, cwd, env=None):
    done = subprocess.run(args, cwd=cwd, env=env, capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, f"{args}: {done.stdout[-2000:]}\n{done.stderr[-2000:]}"
    return done.stdout


@pytest.mark.slow
def test_the_wheel_installs_and_runs_from_another_folder(tmp_path):
    # common practice: test the built artefact, not the source tree (package data is easy to forget)
    src = tmp_path / "src"
    src.mkdir()
    for name in ("pyproject.toml", "README.md", "LICENSE"):
        if (REPO / name).exists():
            shutil.copy(REPO / name, src / name)
    shutil.copytree(REPO / "shapes", src / "shapes", ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
    wheels = tmp_path / "wheels"
    _run([sys.executable, "-m", "pip", "wheel", ".", "--no-deps", "--no-build-isolation", "-q", "-w", str(wheels)],
         cwd=src)
    (wheel,) = wheels.glob("shapes-*.whl")

    # a fresh venv that borrows this environment's libraries (torch is never reinstalled or downloaded)
    env_dir = tmp_path / "venv"
    venv.EnvBuilder(with_pip=False, symlinks=os.name != "nt").create(env_dir)
    python = env_dir / ("Scripts/python.exe" if os.name == "nt" else "bin/python")
    site = Path(_run([str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                     cwd=tmp_path).strip())
    (site / "borrowed.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    _run([sys.executable, "-m", "pip", "--python", str(python), "install", "--no-deps", "--no-index", "-q",
          str(wheel)], cwd=tmp_path)

    work = tmp_path / "elsewhere"
    work.mkdir()
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VIRTUAL_ENV")}
    where = _run([str(python), "-c", "import shapes; print(shapes.__file__)"], cwd=work, env=env).strip()
    assert Path(where).is_relative_to(site), where  # the installed wheel, not the source tree
    shapes_cmd = str(python.parent / "shapes")
    out = _run([shapes_cmd, "parts", "parts.per_class=3", "meshes=parts_out"], cwd=work, env=env)
    assert "wrote 48 meshes in 16 classes" in out and (work / "parts_out" / "catalog.json").is_file()
    out = _run([shapes_cmd, "train", "--help"], cwd=work, env=env)
    assert out.startswith("shapes train:") and "vector_gate" in out and "epochs:" in out
