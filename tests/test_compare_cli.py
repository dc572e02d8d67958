"""``kridge compare`` end to end: trained versions scored on a file of new lab values."""

from __future__ import annotations

import json
import math
import os
import shutil
from pathlib import Path

import numpy as np
import pytest
from sklearn.metrics import mean_absolute_error, mean_squared_error

from service.model import load_model
from tests.cli_helpers import run_cli
from trainer.cli import main
from trainer.compare_cli import EXIT_NOT_BETTER

#: Column names with markup, to see that the report escapes them.
FEATURES = ("a", "<i>b</i>", "c")


def _truth(x: np.ndarray) -> np.ndarray:
    return np.column_stack([np.sin(2 * x[:, 0]) + x[:, 1], x[:, 0] * x[:, 2]])


def _write(path, x, y, time=None):
    head = (["t"] if time is not None else []) + list(FEATURES) + ["y", "z"]
    with open(path, "w") as fh:
        fh.write(",".join(f'"{h}"' if "<" in h else h for h in head) + "\n")
        for i in range(x.shape[0]):
            cells = ([f"{time[i]:g}"] if time is not None else [])
            cells += [f"{v:.9g}" for v in x[i]]
            cells += ["" if math.isnan(v) else f"{v:.9g}" for v in y[i]]
            fh.write(",".join(cells) + "\n")
    return str(path)


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    root = tmp_path_factory.mktemp("compare")
    rng = np.random.default_rng(5)
    x = rng.normal(size=(300, 3))
    train = _write(root / "train.csv", x, _truth(x) + rng.normal(0, 0.1, (300, 2)))
    store = str(root / "store")
    base = ["train", train, "--target", "y,z", "--kernel", "rbf", "--no-report", "--quiet",
            "--store", store]
    good, bad = ["--gamma", "0.3", "--ridge", "0.01"], ["--gamma", "0.3", "--ridge", "300"]
    # model m: v1 good (live), v2 bad, v3 good with another width; model n: v1 bad (live), v2 good
    for name, params, live in (("m", good, True), ("m", bad, False),
                               ("m", ["--gamma", "0.2", "--ridge", "0.01"], False),
                               ("n", bad, True), ("n", good, False)):
        assert main(base + ["--name", name, *params] + (["--release"] if live else [])) == 0
    xn = rng.normal(size=(150, 3))
    y = _truth(xn) + rng.normal(0, 0.1, (150, 2))
    y[::3, 1] = np.nan  # z measured for two rows in three
    y[1::10, :] = np.nan  # and some rows have no lab value at all
    lab = _write(root / "lab.csv", xn, y, time=np.arange(150.0))
    few = _write(root / "few.csv", xn[:12], y[:12], time=np.arange(12.0))
    return {"root": root, "store": store, "lab": lab, "few": few, "x": xn, "y": y}


def _compare(capsys, setup, *args, model="m", data=None):
    return run_cli(capsys, "compare", model, data or setup["lab"], *args, "--store",
                   setup["store"], "--permutations", "50")


def _json(capsys, setup, *args, **kw):
    code, out, err = _compare(capsys, setup, *args, "--json", **kw)
    assert code == 0, err
    return json.loads(out)


def test_figures_are_the_served_predictions_scored_as_scikit_learn_scores(capsys, setup):
    doc = _json(capsys, setup, "--versions", "1,2")
    assert [s["version"] for s in doc["versions"]] == [1, 2] and doc["baseline"] == 1
    x, y = setup["x"], setup["y"]
    for s in doc["versions"]:
        model = load_model(setup["store"], "m", s["version"])
        pred = model.predict(x)
        for j, target in enumerate(("y", "z")):
            has = ~np.isnan(y[:, j])
            f = s["targets"][target]
            # reference: sklearn.metrics.mean_squared_error / mean_absolute_error; rel 1e-6:
            # the file holds the inputs to 9 significant digits
            assert f["rmse"] == pytest.approx(
                math.sqrt(mean_squared_error(y[has, j], pred[has, j])), rel=1e-6)
            assert f["mae"] == pytest.approx(mean_absolute_error(y[has, j], pred[has, j]),
                                             rel=1e-6)
            assert f["bias"] == pytest.approx(np.mean(y[has, j] - pred[has, j]), rel=1e-6)
            for c in f["coverage"]:  # the served interval, counted directly
                half = model.half_width(c["nominal"])[j]
                inside = np.abs(y[has, j] - pred[has, j]) <= half
                assert c["inside_interval"] == pytest.approx(inside.mean())
            assert {c["nominal"] for c in f["coverage"]} == {0.8, 0.9, 0.95}
            env = model.envelope(x[has])
            assert f["outside_envelope"] == pytest.approx(np.mean([not e["inside"]
                                                                   for e in env]))
    assert doc["versions"][0]["drift"]["p_value"] > 0.01  # same distribution as training


def test_sparse_lab_values_are_counted_per_target(capsys, setup):
    doc = _json(capsys, setup)
    y = setup["y"]
    with_any = int((~np.isnan(y)).any(axis=1).sum())
    assert doc["counts"]["rows_read"] == 150 and doc["counts"]["rows_scored"] == with_any
    assert doc["counts"]["lab_values"] == {"y": int((~np.isnan(y[:, 0])).sum()),
                                           "z": int((~np.isnan(y[:, 1])).sum())}
    first = doc["versions"][0]["targets"]
    assert first["z"]["rows"] == doc["counts"]["lab_values"]["z"]
    # default: the live version and the newest
    assert [s["version"] for s in doc["versions"]] == [1, 3]


def test_all_versions_and_verdicts_per_target(capsys, setup):
    doc = _json(capsys, setup, "--versions", "all", "--time", "t", "--window", "50")
    assert [s["version"] for s in doc["versions"]] == [1, 2, 3]
    pairs = {(v["version"], v["target"]): v for v in doc["verdicts"]}
    assert set(pairs) == {(2, "y"), (2, "z"), (3, "y"), (3, "z")}
    assert pairs[(2, "y")]["outcome"] == "worse"  # the ridge-300 version loses to live v1
    assert "live v1 beats v2" in pairs[(2, "y")]["text"]
    assert pairs[(2, "y")]["test"]["variance_method"].startswith("Newey–West")
    assert [w["rows"] for w in doc["windows"]["spans"]] == [45, 45, 45]  # t in 0–49, 50–99…
    w = doc["versions"][0]["targets"]["y"]["windows"]
    assert sum(f["rows"] for f in w) == doc["versions"][0]["targets"]["y"]["rows"]


def test_require_better_exit_codes(capsys, setup):
    # m: live v1 good, candidate v2 (ridge 300) worse → 3; n: live v1 bad, v2 good → 0
    code, out, _ = _compare(capsys, setup, "--versions", "1,2", "--require-better", "0.05")
    assert code == EXIT_NOT_BETTER and "v2 NOT passed (worse on y, z)" in out
    code, out, _ = _compare(capsys, setup, "--versions", "1,2", "--require-better", "0.05",
                            model="n")
    assert code == 0 and "v2 passed" in out and "v2 beats live v1" in out
    # too few lab values: the verdict says so and the gate does not pass
    code, out, _ = _compare(capsys, setup, "--require-better", "0.05", model="n",
                            data=setup["few"])
    assert code == EXIT_NOT_BETTER and "weak: fewer than 30 lab values" in out
    code, _, err = _compare(capsys, setup, "--require-better", "1.5")
    assert code == 2 and "--require-better must lie between 0 and 1" in err


def test_report_escapes_names_and_plots_residuals(capsys, setup, tmp_path):
    report = tmp_path / "cmp.html"
    code, _, err = _compare(capsys, setup, "--time", "t", "--report", report)
    assert code == 0, err
    page = report.read_text()
    assert "<i>b</i>" not in page and "<bdi>&lt;i&gt;b&lt;/i&gt;</bdi>" in page
    assert "lab values of <bdi>y</bdi>: RMSE" in page  # verdicts isolate the target's name
    assert page.count("data:image/png;base64,") == 1 and "Cautions" in page
    assert not list(tmp_path.glob(".*partial"))


def _tree(root) -> list[str]:
    return sorted(str(p.relative_to(root)) for p in root.rglob("*"))


def test_nothing_stored_without_the_flag(capsys, setup):
    root = setup["root"] / "store"
    before = _tree(root)
    assert _compare(capsys, setup)[0] == 0
    assert _tree(root) == before


def test_kept_result_beside_the_candidate(capsys, setup, tmp_path):
    store = tmp_path / "store"  # a store of its own: a copy of model n
    shutil.copytree(setup["root"] / "store" / "n", store / "n")
    manifest = (store / "n/versions/2/manifest.json").read_bytes()
    code, _, err = run_cli(capsys, "compare", "n", setup["lab"], "--require-better", "0.05",
                           "--keep-result", "--store", store, "--permutations", "20")
    assert code == 0, err
    kept = list((store / "n/versions/2/comparisons").iterdir())
    assert len(kept) == 1 and kept[0].name.endswith(".json")
    doc = json.loads(kept[0].read_text())
    assert doc["gate"]["passed"] and doc["baseline"] == 1
    assert (store / "n/versions/2/manifest.json").read_bytes() == manifest
    assert run_cli(capsys, "verify", "n", "--store", store)[0] == 0
    code, out, _ = run_cli(capsys, "versions", "n", "--store", store, "--json")
    details = {d["version"]: d for d in json.loads(out)["details"]}
    assert details[2]["compared"].startswith("1 (last vs v1 passed") and not details[1]["compared"]
    # a damaged record is listed as such and stops nothing
    (store / "n/versions/2/comparisons/20990101T000000-000000.json").write_text("{")
    assert run_cli(capsys, "verify", "n", "2", "--store", store)[0] == 0
    code, out, _ = run_cli(capsys, "versions", "n", "--store", store)
    assert code == 0 and "2 (last unreadable)" in out


def test_kept_result_is_all_or_nothing(capsys, setup, tmp_path, monkeypatch):
    import service.store.comparisons as comparisons

    store = str(tmp_path / "s")
    args = ["train", setup["lab"], "--target", "y", "--features", "a,c", "--name", "k",
            "--gamma", "0.3", "--ridge", "0.1", "--no-report", "--quiet", "--store", store]
    assert main(args + ["--release", "--drop-incomplete"]) == 0
    assert main(args + ["--drop-incomplete"]) == 0

    def fail(*_a):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(comparisons.os, "replace", fail)
    code, _, err = run_cli(capsys, "compare", "k", setup["lab"], "--keep-result", "--store",
                           store, "--permutations", "20")
    assert code == 2 and "cannot keep the comparison" in err and "nothing was written" in err
    assert os.listdir(os.path.join(store, "k/versions/2/comparisons")) == []


def test_user_errors_are_one_line(capsys, setup, tmp_path):
    code, _, err = _compare(capsys, setup, "--versions", "1,9")
    assert code == 2 and "there is no version 9" in err and len(err.splitlines()) == 1
    bad = tmp_path / "gap.csv"
    bad.write_text('a,"<i>b</i>",c,y\n0.1,,0.3,1.0\n')
    code, _, err = _compare(capsys, setup, data=bad)
    assert code == 2 and "line 2" in err and "<i>b</i>" in err and "missing value" in err
    nolab = tmp_path / "nolab.csv"
    nolab.write_text('a,"<i>b</i>",c\n0.1,0.2,0.3\n')
    code, _, err = _compare(capsys, setup, data=nolab)
    assert code == 2 and "no lab value column" in err
    code, _, err = _compare(capsys, setup, "--since", "5")
    assert code == 2 and "--since needs --time" in err
    code, _, err = _compare(capsys, setup, "--time", "t", "--since", "1000")
    assert code == 2 and "no row has a lab value for 'y', 'z' at or after 1000" in err


def test_a_model_with_text_features_is_refused_in_one_line(capsys, tmp_path):
    data = tmp_path / "shift.csv"
    rng = np.random.default_rng(2)
    x = rng.normal(size=(40, 2))
    lines = ["a,shift,y"] + [f"{x[i, 0]:.6g},{'early' if i % 2 else 'late'},{x[i, 1]:.6g}"
                             for i in range(40)]
    data.write_text("\n".join(lines) + "\n")
    store = str(tmp_path / "s")
    assert main(["train", str(data), "--target", "y", "--features", "a,shift", "--name", "t",
                 "--gamma", "0.3", "--ridge", "0.1", "--no-report", "--quiet", "--release",
                 "--store", store]) == 0
    capsys.readouterr()
    code, _, err = run_cli(capsys, "compare", "t", data, "--store", store)
    assert code == 2 and "has text features (shift)" in err and len(err.splitlines()) == 1


def test_written_dates_with_a_time_format(capsys, setup, tmp_path):
    # the lab file's times as a lab system may write them: day first, dots, no zone
    src = Path(setup["lab"]).read_text().splitlines()
    out = [src[0]]
    for i, line in enumerate(src[1:]):
        day, hour = divmod(i, 24)
        out.append(f"{day + 1:02d}.11.2026 {hour:02d}:00," + line.split(",", 1)[1])
    dated = tmp_path / "dated.csv"
    dated.write_text("\n".join(out) + "\n")
    doc = _json(capsys, setup, "--time", "t", "--time-format", "%d.%m.%Y %H:%M",
                "--window", "2d", "--since", "2026-11-02T00:00:00", data=dated)
    spans = doc["windows"]["spans"]
    assert spans[0]["start"] == "2026-11-02T00:00:00Z" and len(spans) == 3  # days 2–7
    assert doc["counts"]["rows_read"] == 150
