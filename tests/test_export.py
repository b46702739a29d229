"""`shapes export`: a TorchScript file that torch.jit.load opens in a Python where shapes cannot be
imported, giving the run's logits within 1e-5."""

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch

from conftest import DEMO, one_error_line
from shapes.cli import main
from shapes.data import load_split
from shapes.run import load_classifier
from shapes.export import EXPORTED, lattice_cloud

pytestmark = pytest.mark.filterwarnings("ignore:`torch.jit:DeprecationWarning")

TORCH_SITE = str(Path(torch.__file__).resolve().parent.parent)  # torch and its dependencies, not shapes' .pth

# a line-side program: torch and numpy only, no site hooks (-S: no .pth of an editable shapes), no
# working folder on the path (-I); it checks that shapes really is out of reach
LINE_SIDE = """
import json, sys
sys.path.append(TORCH_SITE)
try:
    import shapes
except ImportError:
    pass
else:
    raise SystemExit("shapes is importable here")
import numpy as np, torch
extra = {"shapes.json": ""}
model = torch.jit.load(FILE, _extra_files=extra)
meta = json.loads(extra["shapes.json"])
clouds = np.load(INPUTS)
with torch.no_grad():
    logits = [model(*[torch.from_numpy(clouds[name][i:i + 1]) for name in meta["inputs"]]).numpy()
              for i in range(len(clouds["points"]))]
np.save(OUT, np.concatenate(logits))
print(json.dumps(meta))
"""


@pytest.fixture(scope="module")
def tiny(tmp_path_factory, tiny_surface_data):
    root = tmp_path_factory.mktemp("export")
    (root / "data").symlink_to(tiny_surface_data, target_is_directory=True)
    runs = {}
    for name, options in (("vector_gate", ["backbone.scalars=8", "backbone.vectors=4", "backbone.layers=1",
                                           "backbone.k=4", "backbone.normals=true"]),
                          ("distance", ["backbone.hidden=8", "backbone.k=4", "backbone.layers=1"])):
        run = root / name
        assert main(["train", f"data={root / 'data'}", f"backbone={name}", *options, "train.epochs=1",
                     "train.batch_size=32", "train.threads=1", f"hydra.run.dir={run}"]) == 0
        runs[name] = run
    return root, runs


def _line_side(file: Path, clouds: dict, tmp_path: Path) -> tuple[np.ndarray, dict]:
    np.savez(tmp_path / "clouds.npz", **{k: v.astype(np.float32) for k, v in clouds.items()})
    code = (LINE_SIDE.replace("TORCH_SITE", repr(TORCH_SITE)).replace("FILE", repr(str(file)))
            .replace("INPUTS", repr(str(tmp_path / "clouds.npz"))).replace("OUT", repr(str(tmp_path / "out.npy"))))
    done = subprocess.run([sys.executable, "-I", "-S", "-c", code], cwd=tmp_path, capture_output=True, text=True,
                          timeout=300)
    assert done.returncode == 0, done.stderr + done.stdout
    return np.load(tmp_path / "out.npy"), json.loads(done.stdout)


@pytest.mark.parametrize("backbone", ["vector_gate", "distance"])
def test_the_exported_file_gives_the_runs_logits_without_shapes(backbone, tiny, tmp_path, capsys):
    # reference: torch.jit.load in a Python that cannot import shapes, against the eager network
    root, runs = tiny
    run = runs[backbone]
    assert main(["export", f"run={run}", "format=torchscript"]) == 0
    assert f"wrote {run / EXPORTED}" in capsys.readouterr().out
    model, meta = load_classifier(run)
    val = load_split(root / "data", "val")
    points, normals = val.points[:6].astype(np.float32), val.normals[:6].astype(np.float32)  # normalised shards
    # the same clouds in millimetres somewhere else: the file centres and scales them itself
    moved = points * np.float32(23.5) + np.array([140.0, -60.0, 7.0], dtype=np.float32)
    got, stored = _line_side(run / EXPORTED, {"points": np.concatenate([points, moved]),
                                              "normals": np.concatenate([normals, normals])}, tmp_path)
    with torch.no_grad():
        eager = model(torch.from_numpy(points), None, torch.from_numpy(normals)).numpy()
    assert stored["inputs"] == (["points", "normals"] if backbone == "vector_gate" else ["points"])
    assert stored["classes"] == meta.classes and stored["points"] == 64
    assert np.abs(got[:6] - eager).max() <= 1e-5
    assert np.abs(got[6:] - eager).max() <= 1e-5
    if backbone == "vector_gate":  # the normals are read: other normals, other logits
        other, _ = _line_side(run / EXPORTED, {"points": points, "normals": normals[:, ::-1].copy()}, tmp_path)
        assert np.abs(other - eager).max() > 1e-3


def test_another_point_count_and_ties_on_a_lattice(tiny, tmp_path):
    # convention: shapes/export.py, the trace is taken on a lattice so tie-breaking is recorded
    _, runs = tiny
    out = tmp_path / "d80.pt"
    assert main(["export", f"run={runs['distance']}", f"export.out={out}", "export.points=80"]) == 0
    loaded = torch.jit.load(str(out))
    model, _ = load_classifier(runs["distance"])
    points, _ = lattice_cloud(80)
    shifted = points + torch.tensor([0.5, 0.0, 0.0])  # a lattice of other ties
    for cloud in (points, shifted, torch.randn(1, 80, 3)):
        x = cloud - cloud.mean(1, keepdim=True)
        x = x / x.square().sum(-1).mean().sqrt()
        with torch.no_grad():
            assert (loaded(cloud) - model(x)).abs().max() <= 1e-5
    with pytest.raises(RuntimeError):
        loaded(torch.randn(1, 64, 3))  # the point count is part of the file


@pytest.mark.parametrize("argv,needle", [
    (["format=onnx"], "export.format should be torchscript"),
    (["export.points=1"], "export.points should be"),
    (["export.points=3"], "export.points should be an integer of at least 6"),
    (["export.threads=0"], "export.threads should be"),
    (["export.out=."], "is a folder"),
    (["export.out={run}/checkpoint.pt/model.pt"], "checkpoint.pt' is a file, not a folder"),
])
def test_bad_export_options_give_one_line(argv, needle, tiny, capsys):
    _, runs = tiny
    assert main(["export", f"run={runs['distance']}", *[a.format(run=runs["distance"]) for a in argv]]) == 2
    assert needle in one_error_line(capsys)


def test_a_missing_run_gives_one_line(tmp_path, capsys):
    assert main(["export", f"run={tmp_path}"]) == 2
    assert "no checkpoint" in one_error_line(capsys)


def test_an_unfinished_run_is_refused_unless_asked(tiny, tmp_path, capsys):
    _, runs = tiny
    folder = tmp_path / "cut"
    folder.mkdir()
    (folder / "checkpoint.pt").write_bytes((runs["distance"] / "checkpoint.pt").read_bytes())
    history = json.loads((runs["distance"] / "train_history.json").read_text())
    (folder / "train_history.json").write_text(json.dumps({**history, "status": "interrupted"}))
    for verb in (["export"], ["eval"], ["predict", f"predict.input={DEMO}"]):
        assert main([*verb, f"run={folder}"]) == 2
        line = one_error_line(capsys)
        assert "did not finish training (status: interrupted)" in line and "allow_unfinished=true" in line
        assert f"resume={folder}" in line
    assert main(["export", f"run={folder}", "allow_unfinished=true"]) == 0
    assert (folder / EXPORTED).is_file()
