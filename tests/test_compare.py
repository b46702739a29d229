"""`shapes compare` on a tiny sweep (2 backbones x 2 seeds, one epoch each), its one-line answers to
bad input, the cost record every evaluated run carries, and the static HTML pages in a browser."""

from __future__ import annotations

import json
import re
import shutil
import statistics
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
import torch

from _browser import find_browser, open_page
from conftest import DEMO, TINY_SAMPLE, one_error_line
from shapes.cli import main
from shapes.report import markdown_to_html
from shapes.run import read_metrics


@pytest.fixture(scope="module")
def sweep(tmp_path_factory):
    """A sweep of distance and plain over seeds 0 and 1, one epoch each, every run evaluated."""
    root = tmp_path_factory.mktemp("compare")
    data = root / "data"
    assert main(["sample", f"meshes={DEMO}", f"data={data}", *TINY_SAMPLE]) == 0
    with pytest.MonkeyPatch.context() as mp:
        mp.chdir(root)
        assert main(["train", "-m", f"data={data}", "backbone=distance,plain", "seed=0,1", "backbone.hidden=8",
                     "train.epochs=1", "train.batch_size=64", "train.threads=1"]) == 0
        (folder,) = list((root / "runs" / "sweep").iterdir())
        assert main(["eval", f"run={folder}", "eval.repeats=2", "eval.threads=1"]) == 0
    return folder


def _runs(folder: Path) -> list[Path]:
    return sorted(p.parent for p in folder.glob("*/metrics.json"))


def test_every_evaluated_run_records_its_cost(sweep):
    runs = _runs(sweep)
    assert [r.name for r in runs] == ["0-distance", "1-distance", "2-plain", "3-plain"]
    for run in runs:
        metrics = read_metrics(run)
        cost = metrics["cost"]
        history = json.loads((run / "train_history.json").read_text())
        assert cost["train_seconds"] == history["wall_seconds"] and cost["train_seconds"] > 0
        assert cost["train_threads"] == 1 and cost["eval_threads"] == 1
        # reference: the trainable tensors stored in the checkpoint, counted by torch
        state = torch.load(run / "checkpoint.pt", weights_only=True)["state_dict"]
        from shapes.run import load_classifier

        model, _ = load_classifier(run)
        trainable = {name for name, p in model.named_parameters() if p.requires_grad}
        assert cost["parameters"] == sum(v.numel() for k, v in state.items() if k in trainable) > 0
        assert cost["parts_per_second"] > 0 and cost["inferred_parts"] == 4 * 2 * metrics["test_clouds"]
        for regime in metrics["regimes"].values():
            assert 0.0 <= regime["ece"] <= 1.0 and 0.0 <= regime["pose_consistency"] <= 1.0
        # cad poses are the identity: every repeat gives the same answer
        assert metrics["regimes"]["cad"]["pose_consistency"] == 1.0
        assert (run / "report.html").is_file() and (run / "reliability.png").is_file()


def test_a_sweep_of_two_backbones_and_two_seeds_writes_the_table_and_the_plots(sweep, tmp_path, capsys):
    out = tmp_path / "cmp"
    assert main(["compare", str(sweep), f"compare.out={out}"]) == 0
    assert "| `distance` | 2 | cad | E3 |" in capsys.readouterr().out
    for name in ("compare.md", "compare.html", "compare.json", "compare_angle.png", "compare_noise.png"):
        assert (out / name).is_file(), name
    result = json.loads((out / "compare.json").read_text())
    assert sorted(result["groups"]) == ["distance", "plain"]
    table = (out / "compare.md").read_text()
    for label, group in result["groups"].items():
        assert sorted(group["seeds"]) == [0, 1] and len(group["runs"]) == 2
        members = [read_metrics(Path(r)) for r in group["runs"]]
        for regime in result["regimes"]:
            acc = [m["regimes"][regime]["accuracy"] for m in members]
            s = group["stats"][f"accuracy_{regime}"]
            # reference: numpy's mean and sample standard deviation
            assert s["mean"] == pytest.approx(np.mean(acc)) and s["sd"] == pytest.approx(np.std(acc, ddof=1))
        speed = [m["cost"]["parts_per_second"] for m in members]
        assert group["stats"]["parts_per_second"]["sd"] == pytest.approx(np.std(speed, ddof=1))
        row = next(line for line in table.splitlines() if line.startswith(f"| `{label}` |"))
        acc_any = [100 * m["regimes"]["any"]["accuracy"] for m in members]
        cell = f"{statistics.fmean(acc_any):.1f} ± {statistics.stdev(acc_any):.1f}%"
        assert cell in row and row.count("±") >= 8
    # the train x test pose matrix: one row per training regime (all cad here), pooled over the two seeds
    matrix = result["pose_matrix"]
    assert sorted(matrix) == ["distance", "plain"] and "## Train × test poses" in table
    for label, rows in matrix.items():
        assert list(rows) == ["cad"] and rows["cad"]["runs"] == 2
        members = [read_metrics(Path(r)) for r in result["groups"][label]["runs"]]
        for regime in result["regimes"]:
            acc = [m["regimes"][regime]["accuracy"] for m in members]
            # reference: numpy's mean and sample standard deviation
            assert rows["cad"][regime]["mean"] == pytest.approx(np.mean(acc))
            assert rows["cad"][regime]["sd"] == pytest.approx(np.std(acc, ddof=1))
    # stray points and visible share (the test split holds scans) are overlaid; 96-point clouds give no
    # count of the point-count curve (it starts at 128), so that plot is left out
    assert (out / "compare_outliers.png").is_file() and (out / "compare_visible.png").is_file()
    assert not (out / "compare_points.png").exists() and "compare_points.png" not in table
    # the plots are pictures with something drawn on them
    import matplotlib.image

    for png in ("compare_angle.png", "compare_noise.png", "compare_outliers.png", "compare_visible.png"):
        pixels = matplotlib.image.imread(out / png)
        assert pixels.shape[0] > 100 and pixels.std() > 0.05


def test_one_run_folder_and_a_mixed_list_compare(sweep, tmp_path):
    runs = _runs(sweep)
    assert main(["compare", str(runs[0]), str(runs[2]), str(runs[3]), f"compare.out={tmp_path}",
                 "compare.poses=[any,mirrored]"]) == 0
    result = json.loads((tmp_path / "compare.json").read_text())
    assert result["regimes"] == ["any", "mirrored"]
    assert result["groups"]["distance"]["stats"]["accuracy_any"]["sd"] is None  # one run: no spread
    assert result["groups"]["plain"]["stats"]["accuracy_any"]["n"] == 2


def test_seeds_that_drew_their_own_data_pool_and_no_run_is_dropped(sweep, tmp_path):
    # `shapes demo seed=S` samples its own dataset per seed: datasets of one recipe (catalog and sampler
    # settings in meta.json) are seeds of one configuration; a dataset of another recipe is another
    # configuration, and two configurations of one backbone never share a label (none may vanish).
    data = json.loads((sweep / "0-distance" / "metrics.json").read_text())["data"]
    same, other = tmp_path / "same_recipe", tmp_path / "other_recipe"
    shutil.copytree(data, same)
    shutil.copytree(data, other)
    meta = json.loads((other / "meta.json").read_text())
    meta["sampler"]["points"] = meta["sampler"]["points"] * 2
    (other / "meta.json").write_text(json.dumps(meta))

    def to(folder):
        return lambda metrics: metrics.__setitem__("data", str(folder))

    runs = [_copy_run(sweep / "0-distance", tmp_path / "a"), _copy_run(sweep / "1-distance", tmp_path / "b", to(same)),
            _copy_run(sweep / "0-distance", tmp_path / "c", to(other)), _copy_run(sweep / "1-distance", tmp_path / "d", to(other))]
    out = tmp_path / "out"
    assert main(["compare", *map(str, runs), f"compare.out={out}"]) == 0
    groups = json.loads((out / "compare.json").read_text())["groups"]
    assert sorted(len(g["runs"]) for g in groups.values()) == [2, 2]
    assert sum(len(g["runs"]) for g in groups.values()) == len(runs)
    pooled = next(g for g in groups.values() if str(tmp_path / "b") in g["runs"])
    assert str(tmp_path / "a") in pooled["runs"]


def _copy_run(run: Path, dest: Path, edit=None) -> Path:
    shutil.copytree(run, dest)
    if edit is not None:
        metrics = json.loads((dest / "metrics.json").read_text())
        edit(metrics)
        (dest / "metrics.json").write_text(json.dumps(metrics))
    return dest


def _rename_regime(metrics):
    metrics["regimes"]["so3"] = metrics["regimes"].pop("any")


def _other_catalog(metrics):
    metrics["classes"] = metrics["classes"][:-2] + ["gear_x", "gear_y"]


@pytest.mark.parametrize("case,needle", [
    ("no-metrics", "has no metrics.json; evaluate it first: shapes eval run="),
    ("other-catalog", "runs from different catalogs"),
    ("old-regime", "'so3' is now called 'any'"),
    ("old-regime-option", "compare.poses[0] 'so3' is now called 'any'"),
    ("nothing", "needs run folders"),
    ("empty-folder", "no run folders under"),
])
def test_bad_input_gives_one_line(case, needle, sweep, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    runs = _runs(sweep)
    argv = ["compare", str(runs[0])]
    if case == "no-metrics":
        bare = _copy_run(runs[1], tmp_path / "bare")
        (bare / "metrics.json").unlink()
        argv.append(str(bare))
    elif case == "other-catalog":
        argv.append(str(_copy_run(runs[1], tmp_path / "other", _other_catalog)))
    elif case == "old-regime":
        argv.append(str(_copy_run(runs[1], tmp_path / "old", _rename_regime)))
    elif case == "old-regime-option":
        argv.append("compare.poses=[so3]")
    elif case == "nothing":
        argv = ["compare", "compare.out=x"]
    else:
        (tmp_path / "empty").mkdir()
        argv = ["compare", str(tmp_path / "empty")]
    assert main(argv) == 2
    assert needle in one_error_line(capsys)
    assert not (tmp_path / "runs" / "compare").exists()  # nothing written


class _Cells(HTMLParser):
    """The text of every table cell, row by row (reference: the standard library's HTML parser)."""

    def __init__(self):
        super().__init__()
        self.rows, self._cell = [], None

    def handle_starttag(self, tag, attrs):
        if tag == "tr":
            self.rows.append([])
        elif tag in ("td", "th"):
            self._cell = ""

    def handle_endtag(self, tag):
        if tag in ("td", "th"):
            self.rows[-1].append(self._cell)
            self._cell = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell += data


def test_markdown_tables_images_and_links_become_one_page(tmp_path):
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(2, 2))
    ax.plot([0, 1], [0, 1])
    fig.savefig(tmp_path / "p.png")
    plt.close(fig)
    text = ("# Title with `code`\n\nA *note* & <b>raw</b> text.\n\n| a | b & c |\n|---|---|\n| 1 | `x<y` |\n"
            "| 2 | 3 |\n\n![plot](p.png)\n\n- [run/report.md](run/report.md)\n")
    page = markdown_to_html(text, tmp_path)
    cells = _Cells()
    cells.feed(page)
    assert cells.rows == [["a", "b & c"], ["1", "x<y"], ["2", "3"]]
    assert "&lt;b&gt;raw&lt;/b&gt;" in page and "<em>note</em>" in page  # text is escaped, never markup
    assert '<a href="run/report.html">' in page
    embedded = re.search(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', page)
    import base64

    assert base64.b64decode(embedded.group(1)) == (tmp_path / "p.png").read_bytes()
    assert "http" not in page  # nothing to fetch


def _browser_or_skip():
    if find_browser() is None:
        reason = "chromium is not installed here (.ci/run installs it where apt-get works); page not opened"
        print(reason)
        pytest.skip(reason)


def _looks_drawn(png: bytes, tmp_path: Path) -> bool:
    import matplotlib.image

    (tmp_path / "shot.png").write_bytes(png)
    pixels = matplotlib.image.imread(tmp_path / "shot.png")[..., :3]
    return pixels.std() > 0.05 and (pixels < 0.5).mean() > 0.005  # not one flat colour; some dark ink


def test_the_report_pages_open_in_a_browser_with_no_errors(sweep, tmp_path):
    _browser_or_skip()
    out = tmp_path / "cmp"
    assert main(["compare", str(sweep), f"compare.out={out}"]) == 0
    for page in (out / "compare.html", _runs(sweep)[0] / "report.html"):
        seen = open_page(page)
        assert seen["errors"] == [], (page, seen["errors"])
        assert seen["images"] and all(done and width > 0 for done, width in seen["images"])
        assert _looks_drawn(seen["screenshot"], tmp_path)


def test_the_browser_check_sees_a_broken_page(tmp_path):
    _browser_or_skip()
    # the other way round: an error, a fetch from the network and a blank page are all seen
    (tmp_path / "bad.html").write_text('<!DOCTYPE html><html><head><title>t</title></head><body>'
                                       '<img src="https://example.invalid/x.png"><script>console.error("boom")'
                                       '</script></body></html>')
    seen = open_page(tmp_path / "bad.html")
    assert "boom" in seen["errors"] and any("load" in e for e in seen["errors"])
    assert not _looks_drawn(seen["screenshot"], tmp_path)


# -- the D2 baseline as a run ------------------------------------------------------------------


@pytest.fixture(scope="module")
def d2_runs(sweep):
    """The classical baseline fitted on the sweep's data with seeds 0 and 1, and evaluated."""
    root = sweep.parent.parent.parent
    with pytest.MonkeyPatch.context() as mp:
        mp.chdir(root)
        assert main(["train", "-m", f"data={root / 'data'}", "backbone=d2", "seed=0,1", "backbone.trees=20",
                     "train.threads=1"]) == 0
        folders = sorted(p.parent for p in (root / "runs" / "sweep").glob("*/*-d2/checkpoint.pt"))
        assert len(folders) == 2
        for run in folders:
            assert main(["eval", f"run={run}", "eval.repeats=2", "eval.threads=1"]) == 0
    return folders


def test_the_d2_run_matches_a_scikit_learn_forest_on_its_histograms(d2_runs):
    from sklearn.ensemble import RandomForestClassifier

    from shapes.classic import d2_features
    from shapes.data import load_split
    from shapes.run import load_classifier

    model, meta = load_classifier(d2_runs[0])
    assert model.symmetry == "E3" and meta.backbone.name == "d2" and not model.uses_normals
    train, test = load_split(meta.data.dir, "train"), load_split(meta.data.dir, "test")
    # reference: scikit-learn's forest with the same options and seed, on the same D2 histograms
    forest = RandomForestClassifier(n_estimators=20, random_state=0, n_jobs=1).fit(
        d2_features(np.asarray(train.points, dtype=np.float64), bins=64, seed=0), train.labels)
    want = np.zeros((len(test), len(meta.classes)))
    want[:, forest.classes_] = forest.predict_proba(d2_features(np.asarray(test.points, dtype=np.float64), bins=64,
                                                                seed=0))
    with torch.no_grad():
        got = torch.softmax(model(torch.tensor(np.asarray(test.points), dtype=torch.float64)), -1).numpy()
    np.testing.assert_allclose(got, want, atol=1e-6)


def test_the_d2_report_shows_it_blind_to_hand(d2_runs, sweep):
    for run in d2_runs:
        metrics = read_metrics(run)
        # distances only: a reflection changes nothing, so every mirror image gets the part's own answer
        assert metrics["invariance"]["reflection"] < 1e-6 and metrics["invariance"]["rotation"] < 1e-6
        assert metrics["hand"]["handed_clouds"] > 0
        assert metrics["hand"]["same_answer"] == 1.0 and metrics["hand"]["twin_answer"] == 0.0
        assert metrics["cost"]["parameters"] > 0 and metrics["cost"]["train_seconds"] > 0
        assert "**Blind to hand.**" in (run / "report.md").read_text()
    # the other way: a network that is not reflection invariant is not called blind
    plain = json.loads((_runs(sweep)[2] / "metrics.json").read_text())
    assert plain["invariance"]["reflection"] > 1e-3
    assert "**Blind to hand.**" not in (_runs(sweep)[2] / "report.md").read_text()


def test_compare_puts_the_baseline_beside_the_networks(d2_runs, sweep, tmp_path):
    assert main(["compare", str(sweep), *map(str, d2_runs), f"compare.out={tmp_path}"]) == 0
    result = json.loads((tmp_path / "compare.json").read_text())
    assert sorted(result["groups"]) == ["d2", "distance", "plain"]
    d2 = result["groups"]["d2"]
    assert d2["symmetry"] == "E3" and sorted(d2["seeds"]) == [0, 1]
    assert d2["stats"]["mirror_twin_answer"] == {"mean": 0.0, "sd": 0.0, "n": 2}
    row = next(line for line in (tmp_path / "compare.md").read_text().splitlines() if line.startswith("| `d2` |"))
    assert "| 2 | – | E3 |" in row
