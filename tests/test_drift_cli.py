"""``kridge drift`` end to end: a trained version, files from its distribution and shifted."""

from __future__ import annotations

import json

import numpy as np
import pytest
from sklearn.metrics.pairwise import rbf_kernel

from service.cautions import DRIFT_ALARM
from service.model import load_model
from tests.cli_helpers import run_cli
from trainer.cli import main

FEATURES = ("a", "b", "c")


def _write(path, x: np.ndarray, y: np.ndarray | None = None, columns=FEATURES) -> str:
    head = list(columns) + (["y"] if y is not None else [])
    rows = x if y is None else np.column_stack([x, y])
    np.savetxt(path, rows, delimiter=",", header=",".join(head), comments="", fmt="%.9g")
    return str(path)


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    root = tmp_path_factory.mktemp("drift")
    rng = np.random.default_rng(20)
    x = rng.normal(size=(300, 3))
    train = _write(root / "train.csv", x, x[:, 0] + np.sin(x[:, 1]))
    store = str(root / "store")
    for name, kernel in (("m", "rbf"), ("lin", "linear")):
        args = ["train", train, "--name", name, "--target", "y", "--kernel", kernel,
                "--ridge", "0.01", "--release", "--no-report", "--quiet", "--store", store]
        assert main(args + (["--gamma", "0.3"] if kernel == "rbf" else [])) == 0
    same = _write(root / "same.csv", rng.normal(size=(250, 3)))
    moved = rng.normal(size=(250, 3))
    moved[:, 1] += 0.6
    shifted = _write(root / "shifted.csv", moved)
    return {"root": root, "store": store, "same": same, "shifted": shifted}


def _drift(capsys, setup, *args):
    return run_cli(capsys, "drift", *args, "--store", setup["store"])


def test_json_from_training_distribution(capsys, setup):
    code, out, _err = _drift(capsys, setup, "m", setup["same"], "--json")
    doc = json.loads(out)
    assert code == 0 and doc["p_value"] > 0.05
    assert {"statistic", "p_value", "kernel", "sizes", "permutations", "features"} <= set(doc)
    assert doc["kernel"].startswith("rbf(gamma=0.3)") and doc["permutations"] == 500
    assert doc["sizes"]["reference_rows"] == 300 and doc["sizes"]["new_rows"] == 250
    assert [f["feature"] for f in doc["features"]] == list(FEATURES)


def test_shifted_file_is_flagged_and_the_feature_named(capsys, setup):
    code, out, _err = _drift(capsys, setup, "m", setup["shifted"], "--json")
    doc = json.loads(out)
    assert code == 0 and doc["p_value"] < 0.01
    by = {f["feature"]: f for f in doc["features"]}
    assert max(by, key=lambda f: by[f]["mmd_drop"]) == "b"
    assert 0.4 < by["b"]["mean_shift"] < 0.8  # (new mean − training mean) / training scale


def test_fail_on_drift_gates_with_exit_1(capsys, setup):
    assert _drift(capsys, setup, "m", setup["shifted"], "--fail-on-drift", "0.05")[0] == 1
    assert _drift(capsys, setup, "m", setup["same"], "--fail-on-drift", "0.05")[0] == 0


def test_text_output_carries_the_caution(capsys, setup):
    code, out, _err = _drift(capsys, setup, "m", setup["shifted"])
    assert code == 0 and "p-value" in out and "drift:" in out
    assert DRIFT_ALARM in out and "not proof that the model is wrong" in DRIFT_ALARM


def test_statistic_is_the_u_statistic_on_standardized_rows(capsys, setup):
    # scikit-learn's rbf_kernel (1.9.1 here, from the [dev] extra) on the version's reference
    # rows and the file's rows
    # standardized with the manifest's mean and scale: the unbiased estimator written out
    model = load_model(setup["store"], "m")
    new = model.standardize(np.loadtxt(setup["shifted"], delimiter=",", skiprows=1))
    ref = np.asarray(model.reference)
    kxx, kyy, kxy = (rbf_kernel(a, b, gamma=0.3) for a, b in ((ref, ref), (new, new), (ref, new)))
    n, m = len(ref), len(new)
    direct = ((kxx.sum() - n) / (n * (n - 1)) + (kyy.sum() - m) / (m * (m - 1))
              - 2 * kxy.mean())
    _code, out, _err = _drift(capsys, setup, "m", setup["shifted"], "--json")
    assert json.loads(out)["statistic"] == pytest.approx(direct, rel=1e-9)


def test_linear_model_says_it_used_the_median_heuristic(capsys, setup):
    code, out, _err = _drift(capsys, setup, "lin", setup["same"], "--json")
    doc = json.loads(out)
    assert code == 0 and doc["kernel"].startswith("rbf(") and "median heuristic" in \
        doc["kernel_source"]


def test_parquet_file_is_read_by_the_same_reader(capsys, setup):
    pa = pytest.importorskip("pyarrow")
    pq = pytest.importorskip("pyarrow.parquet")
    x = np.loadtxt(setup["shifted"], delimiter=",", skiprows=1)
    path = setup["root"] / "shifted.parquet"
    pq.write_table(pa.table({f: x[:, j] for j, f in enumerate(FEATURES)}), path)
    _c, from_csv, _e = _drift(capsys, setup, "m", setup["shifted"], "--json")
    code, from_parquet, _e = _drift(capsys, setup, "m", path, "--json")
    assert code == 0
    assert json.loads(from_parquet)["statistic"] == json.loads(from_csv)["statistic"]


def test_large_file_is_subsampled_to_the_stated_size(capsys, setup):
    path = _write(setup["root"] / "big.csv", np.random.default_rng(21).normal(size=(2300, 3)))
    code, out, _err = _drift(capsys, setup, "m", path, "--json", "--permutations", "5")
    sizes = json.loads(out)["sizes"]
    assert code == 0 and sizes["new_rows"] == 2300 and sizes["new_rows_used"] == 2000


def test_missing_feature_column_is_one_line_naming_it(capsys, setup):
    x = np.random.default_rng(22).normal(size=(20, 2))
    path = _write(setup["root"] / "no_b.csv", x, columns=("a", "c"))
    code, out, err = _drift(capsys, setup, "m", path)
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1 and "'b'" in err and "missing" in err


@pytest.mark.parametrize("extra, words", [
    (["--fail-on-drift", "1.5"], "--fail-on-drift"),
    (["--permutations", "0"], "--permutations"),
    (["--version", "9"], "9"),
])
def test_bad_options_exit_2(capsys, setup, extra, words):
    code, _out, err = _drift(capsys, setup, "m", setup["same"], *extra)
    assert code == 2 and words in err and len(err.strip().splitlines()) == 1


def test_one_row_is_refused(capsys, setup):
    path = _write(setup["root"] / "one.csv", np.zeros((1, 3)))
    code, _out, err = _drift(capsys, setup, "m", path)
    assert code == 2 and "at least 2" in err
