"""The ``kridge`` command line: summaries, tables, batch predictions and bad inputs.

Reference for names and behaviour: the README, "Command line" (every error is one line on
stderr with a non-zero exit; no traceback for user mistakes).
"""

from __future__ import annotations

import csv
import io
import json
import subprocess
from pathlib import Path

import numpy as np
import pytest
from cli_helpers import KRIDGE, run_cli

from service import load_model
from service.kernels import KernelSpec
from service.store import Store
from trainer.exact.fit import fit_exact
from trainer.read.columns import read_table, split_columns

FEATURES = ["oven_temp_c", "line_speed_m_min", "wet_film_um", "humidity_pct", "viscosity_mpas"]
RBF = ["--kernel", "rbf", "--gamma", "0.2", "--ridge", "0.5", "--no-report"]



def tree(root: Path) -> set[str]:
    return {str(p.relative_to(root)) for p in root.rglob("*")} if root.exists() else set()


@pytest.fixture
def trained(store_dir, small_csv, capsys):
    """Model 'coat' with two targets, v1 live."""
    code, _, err = run_cli(capsys, "train", small_csv, "--target", "hardness_s,gloss_gu",
                           "--name", "coat", "--release", *RBF)
    assert code == 0, err
    return store_dir


# -- train summary, versions, inspect -------------------------------------------------------

def test_train_prints_a_summary(store_dir, small_csv, capsys):
    code, out, err = run_cli(capsys, "train", small_csv, "--target", "hardness_s",
                             "--features", ",".join(FEATURES),
                             "--name", "coat", "--kernel", "polynomial", "--gamma", "0.2",
                             "--degree", "2", "--coef0", "1", "--ridge", "0.5", "--no-report")
    assert code == 0, err
    lines = dict(line.split(None, 1) for line in out.strip().splitlines())
    assert lines["model"].startswith("coat v1") and "not live" in lines["model"]
    assert lines["rows"] == "60 (60 of 60 rows have a value for hardness_s)"
    assert lines["method"].startswith("exact")
    assert lines["features"] == "5: " + ", ".join(FEATURES)
    assert lines["kernel"] == "polynomial(gamma=0.2, degree=2, coef0=1)"
    assert lines["ridge"] == "0.5"
    assert lines["time"].endswith(" s")
    assert "RMSE" in lines["holdout"] and "RMSE" in lines["LOO"]

    # without --features: every column but the targets (both lab results are targets here)
    code, out, _ = run_cli(capsys, "train", small_csv, "--target", "hardness_s,gloss_gu",
                           "--name", "coat", "--release", *RBF)
    assert code == 0
    assert "coat v2  (live)" in out and "5: " + ", ".join(FEATURES) in out


def test_train_json_summary(store_dir, small_csv, capsys):
    code, out, _ = run_cli(capsys, "train", small_csv, "--target", "hardness_s",
                           "--features", ",".join(FEATURES), "--name", "coat", "--json", *RBF)
    assert code == 0
    summary = json.loads(out)
    assert summary["version"] == 1 and summary["live"] is False and summary["rows"] == 60


def test_versions_marks_the_live_one(trained, small_csv, capsys):
    run_cli(capsys, "train", small_csv, "--target", "hardness_s", "--features",
            ",".join(FEATURES), "--name", "coat", *RBF)
    code, out, _ = run_cli(capsys, "versions", "coat")
    assert code == 0
    rows = [line.split() for line in out.strip().splitlines()[2:]]
    assert rows[0][:2] == ["*", "1"] and rows[1][0] == "2"
    code, out, _ = run_cli(capsys, "versions", "coat", "--json")
    doc = json.loads(out)
    assert {k: doc[k] for k in ("model", "live", "versions")} == {
        "model": "coat", "live": 1, "versions": [1, 2]}
    assert [d["version"] for d in doc["details"]] == [1, 2]
    code, _, err = run_cli(capsys, "versions", "nosuch")
    assert code == 2 and "no model named 'nosuch'" in err


def test_inspect_human_and_json(trained, capsys):
    code, out, _ = run_cli(capsys, "inspect", "coat")
    assert code == 0
    assert "coat v1  (live)" in out and "rbf(gamma=0.2)" in out
    assert "hardness_s, gloss_gu" in out and "60 (holdout 12 rows" in out
    code, out, _ = run_cli(capsys, "inspect", "coat", "1", "--json")
    manifest = json.loads(out)
    on_disk = json.loads((trained / "coat/versions/1/manifest.json").read_text())
    assert manifest == on_disk
    code, _, err = run_cli(capsys, "inspect", "coat", "9")
    assert code == 2 and "no version 9" in err


# -- predict ---------------------------------------------------------------------------------

def read_output(text):
    rows = list(csv.reader(io.StringIO(text)))
    return rows[0], rows[1:]


def test_predict_columns_and_numbers_equal_load_model(trained, small_csv, tmp_path, capsys):
    # one row far outside the training ranges to see the envelope flags
    data = tmp_path / "new.csv"
    lines = small_csv.read_text().splitlines()
    data.write_text("\n".join(lines[:11] + ["400,10,60,50,600,100,80"]) + "\n")
    code, out, err = run_cli(capsys, "predict", "coat", data, "--with-inputs")
    assert code == 0, err
    header, rows = read_output(out)
    assert header == FEATURES + ["hardness_s_predicted", "gloss_gu_predicted",
                                 "inside", "novelty", "out_of_range", "t2", "q",
                                 "target_out_of_range", "flagged_by"]
    x = np.array([[float(c) for c in r[:5]] for r in rows])
    got = np.array([[float(c) for c in r[5:7]] for r in rows])
    expected = load_model(trained, "coat").predict(x)
    assert np.array_equal(got, expected)  # written with repr(): exact round trip
    assert [r[7] for r in rows[:10]] == ["true"] * 10
    assert rows[10][7] == "false" and rows[10][9] == "oven_temp_c"
    assert float(rows[10][8]) > 1.0


def test_predict_counts_extrapolations_on_stderr(trained, small_csv, tmp_path, capsys):
    """The count of rows outside the envelope, with the caution, whatever the output goes to."""
    data = tmp_path / "new.csv"
    lines = small_csv.read_text().splitlines()
    far = ["400,10,60,50,600,100,80", "-50,10,60,50,600,100,80", "150,99,60,50,600,100,80"]
    data.write_text("\n".join(lines[:8] + far) + "\n")
    code, out, err = run_cli(capsys, "predict", "coat", data, "--with-inputs")
    assert code == 0, err
    _, rows = read_output(out)
    outside = sum(r[7] == "false" for r in rows)
    assert outside >= 3  # the three far rows at least
    assert f"{outside} of 10 rows outside the training envelope: extrapolations" in err
    assert "procedures" in err and "qualified person" in err

    out_file = tmp_path / "pred.csv"
    code, out, err = run_cli(capsys, "predict", "coat", data, "--out", out_file)
    assert code == 0 and out == ""
    assert f"{outside} of 10 rows outside the training envelope: extrapolations" in err


def test_predict_with_coverage_adds_bounds(trained, small_csv, tmp_path, capsys):
    out_file = tmp_path / "pred.csv"
    code, out, err = run_cli(capsys, "predict", "coat", small_csv, "--coverage", "0.9",
                             "--out", out_file, "--with-inputs")
    assert code == 0 and out == ""
    assert "60 rows scored with coat v1" in err
    header, rows = read_output(out_file.read_text())
    assert header[5:11] == ["hardness_s_predicted", "gloss_gu_predicted", "hardness_s_lower",
                            "hardness_s_upper", "gloss_gu_lower", "gloss_gu_upper"]
    values = np.array([[float(c) for c in r[5:11]] for r in rows])
    pred, bounds = values[:, :2], values[:, 2:]
    model = load_model(trained, "coat")
    half = model.half_width(0.9)
    # reference: split-conformal quantile, the ⌈(c+1)·0.9⌉-th smallest |residual| (Lei,
    # G'Sell, Rinaldo, Tibshirani & Wasserman, JASA 2018, from memory), here of the exact LOO
    # residuals
    _, x, y = split_columns(read_table(small_csv), ["hardness_s", "gloss_gu"], FEATURES)
    loo = fit_exact(x, y, KernelSpec("rbf", gamma=0.2), 0.5, want_loo=True).loo_residuals
    rank = int(np.ceil(61 * 0.9))
    np.testing.assert_allclose(half, np.sort(np.abs(loo), axis=0)[rank - 1], rtol=1e-9)
    with pytest.raises(ValueError, match="coverage"):
        model.half_width(0.0)
    np.testing.assert_allclose(bounds[:, 0::2], pred - half, rtol=1e-15)
    np.testing.assert_allclose(bounds[:, 1::2], pred + half, rtol=1e-15)
    assert not list(tmp_path.glob("*.partial"))


def test_predict_pinned_version_and_errors(trained, small_csv, tmp_path, capsys):
    code, _, err = run_cli(capsys, "predict", "coat", small_csv, "--version", "5")
    assert code == 2 and "no version 5" in err
    bad = tmp_path / "bad.csv"
    bad.write_text("oven_temp_c,line_speed_m_min\n1,2\n")
    out_file = tmp_path / "o.csv"
    code, _, err = run_cli(capsys, "predict", "coat", bad, "--out", out_file)
    assert code == 2 and "missing feature column(s) 'wet_film_um'" in err
    assert not out_file.exists() and not list(tmp_path.glob("*.partial"))
    code, _, err = run_cli(capsys, "predict", "coat", small_csv, "--coverage", "1.5")
    assert code == 2 and "--coverage" in err


# -- bad inputs ------------------------------------------------------------------------------

HEADER = "a,b,y"
GOOD_ROWS = ["1,5,2.0", "2,3,4.5", "3,8,5.0", "4,1,7.5", "5,6,9.0", "6,2,11.0"]


def lines_with(bad_row=None, at=3):
    rows = list(GOOD_ROWS)
    if bad_row is not None:
        rows[at] = bad_row
    return "\n".join([HEADER, *rows]) + "\n"


BAD_INPUTS = {
    # case: (file text, extra args, words the message must contain)
    "missing cell": (lines_with("4,,7.5"), [], ["line 5", "column 'b'", "missing value"]),
    "non-numeric cell": (lines_with("4,abc,7.5"), [], ["line 5", "column 'b'", "'abc'"]),
    "inf cell": (lines_with("4,1,inf"), [], ["line 5", "column 'y'", "not a finite"]),
    "duplicate columns": ("a,b,a,y\n1,2,3,4\n", [], ["line 1", "'a' appears twice"]),
    "unknown target": (lines_with(), ["--target", "zz"], ["unknown target", "'zz'"]),
    "unknown feature": (lines_with(), ["--features", "a,q"], ["unknown feature", "'q'"]),
    "constant target": ("a,y\n1,3\n2,3\n3,3\n4,3\n5,3\n", [], ["'y' is constant"]),
    "two rows": ("a,y\n1,3\n2,4\n", [], ["2 data row(s)", "at least 3"]),
    "empty file": ("", [], ["empty"]),
    "header only": ("a,y\n", [], ["0 data row(s)"]),
    "bad model name": (lines_with(), ["--name", "../x"], ["invalid model name", "'../x'"]),
    "unknown kernel": (lines_with(), ["--kernel", "cosine"], ["unknown kernel 'cosine'"]),
    "negative gamma": (lines_with(), ["--gamma", "-1"], ["gamma must be positive"]),
    "negative ridge": (lines_with(), ["--ridge", "-1"], ["ridge must be a non-negative"]),
    # 6 rows, 2 features: the linear kernel matrix has rank 2, singular without a ridge
    "singular system": (lines_with(), ["--kernel", "linear", "--ridge", "0", "--holdout", "0"],
                        ["numerically singular", "raise --ridge"]),
}


def _train_args(text_args):
    args = {"--target": "y", "--name": "coat", "--kernel": "rbf", "--gamma": "0.5",
            "--ridge": "0.1"}
    extra = []
    for key, value in zip(text_args[::2], text_args[1::2], strict=True):
        if key in args:
            args[key] = value
        else:
            extra += [key, value]
    return [x for kv in args.items() for x in kv] + extra + ["--no-report"]


@pytest.mark.parametrize("case", BAD_INPUTS)
def test_bad_input_is_one_line_exit_2_and_writes_nothing(case, trained, tmp_path, capsys):
    text, args, words = BAD_INPUTS[case]
    data = tmp_path / "in.csv"
    data.write_text(text)
    before = tree(tmp_path)
    code, out, err = run_cli(capsys, "train", data, *_train_args(args))
    assert code == 2
    assert out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("kridge train: error: ")
    for word in words:
        assert word in lines[0], (word, lines[0])
    assert "Traceback" not in err
    # nothing new anywhere: no version directory, no staging leftovers, no '../x'
    assert tree(tmp_path) == before
    assert Store(trained).versions("coat") == [1]


def test_console_script_reports_without_traceback(tmp_path, store_dir):
    # The real entry point, in its own process: exit status, one stderr line, empty store.
    data = tmp_path / "in.csv"
    data.write_text(lines_with("4,abc,7.5"))
    cmd = [*KRIDGE, "train", str(data), *_train_args([])]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    assert proc.stderr.strip().splitlines() == [
        f"kridge train: error: {data}: line 5, column 'b': 'abc' is not a number"]
    assert tree(store_dir) == set()


def test_refused_file_exits_2_every_time(tmp_path, store_dir):
    # A refused block once left pyarrow's parallel parse with tasks in flight, and about one
    # process in thirteen then aborted at exit (SIGABRT, exit -6) after printing its refusal.
    data = tmp_path / "in.csv"
    data.write_text(lines_with("4,abc,7.5"))
    cmd = [*KRIDGE, "train", str(data), *_train_args([])]
    codes = [subprocess.run(cmd, capture_output=True, timeout=120).returncode
             for _ in range(20)]
    assert codes == [2] * 20
    assert tree(store_dir) == set()


def test_verify_and_release_of_unknown_things(store_dir, capsys):
    code, _, err = run_cli(capsys, "verify", "nosuch")
    assert code == 2 and "no model named 'nosuch'" in err
    code, _, err = run_cli(capsys, "inspect", "../etc")
    assert code == 2 and "invalid model name" in err
    assert tree(store_dir) == set()
