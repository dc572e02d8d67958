"""Real plant exports: dialects, spreadsheets, sparse lab values, timestamps, time-honest
validation. The reader is pyarrow (CSV, Parquet) and openpyxl (Excel)."""

from __future__ import annotations

import csv
import json

import numpy as np
import pytest

from service.store import Store
from trainer.cli import main
from trainer.errors import UserError
from trainer.read.columns import load_training, read_table
from trainer.validation.folds import time_series_folds

FEATURES = ["oven_temp_c", "line_speed_m_min", "wet_film_um", "humidity_pct", "viscosity_mpas"]


def python_csv_reference(path) -> tuple[list[str], np.ndarray]:
    """The reading rule kridge had before pyarrow: Python's csv module, float() per cell,
    blank lines skipped. The new reader must give the same numbers, bit for bit."""
    with open(path, newline="", encoding="utf-8-sig") as fh:
        rows = [r for r in csv.reader(fh) if r]
    return [h.strip() for h in rows[0]], np.array([[float(c) for c in r] for r in rows[1:]])


def test_reader_equals_the_python_csv_rule_on_the_demo_data(demo_csv, small_csv):
    for path in (demo_csv, small_csv):
        header, values = python_csv_reference(path)
        table = read_table(path)
        assert table.columns == header
        assert np.array_equal(table.values, values)


def test_semicolon_and_decimal_comma_equal_their_comma_twin(tmp_path, small_csv):
    header, values = python_csv_reference(small_csv)
    euro = tmp_path / "export_eu.csv"
    lines = [";".join(header)] + [";".join(repr(float(v)).replace(".", ",") for v in row)
                                  for row in values]
    euro.write_text("\r\n".join(lines) + "\r\n")  # a typical spreadsheet export: CRLF too
    detected = read_table(euro)
    given = read_table(euro, sep=";", decimal=",")
    assert detected.columns == header
    assert np.array_equal(detected.values, values)
    assert np.array_equal(given.values, values)


def test_wrong_separator_is_explained(tmp_path):
    path = tmp_path / "x.csv"
    path.write_text("a;b;y\n1,5;2;3\n2,5;3;4\n3,5;1;5\n")
    with pytest.raises(UserError, match=r"line 1 has one column with the separator ','"
                                        r", but the lines contain ';'; give --sep ';'"):
        read_table(path, sep=",")


def test_xlsx_written_with_openpyxl_reads_back_equal(tmp_path, small_csv):
    openpyxl = pytest.importorskip("openpyxl")
    header, values = python_csv_reference(small_csv)
    book = openpyxl.Workbook()
    sheet = book.active
    sheet.title = "lab"
    sheet.append(header)
    for row in values:
        sheet.append([float(v) for v in row])
    path = tmp_path / "lab.xlsx"
    book.save(path)
    table = read_table(path)
    assert table.columns == header
    assert np.array_equal(table.values, values)
    sheet["B5"] = "oops"
    book.save(path)
    with pytest.raises(UserError, match=r"sheet 'lab', row 5, column 'line_speed_m_min'"):
        read_table(path)


def _historian_export(path, rows: int = 450, every: int = 4, seed: int = 3):
    """Historian tags each minute, a lab value every ``every``-th row, a timestamp, a tag
    name column of text: the shape in which plant data arrive."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(0, 1, size=(rows, 2))
    y = np.sin(3 * x[:, 0]) + x[:, 1] ** 2
    with open(path, "w") as fh:
        fh.write("timestamp,unit,temp_c,flow,lab_value\n")
        for i in range(rows):
            stamp = np.datetime64("2026-11-01T00:00:00") + np.timedelta64(i, "m")
            lab = f"{y[i]:.6f}" if i % every == 0 else ""
            fh.write(f"{stamp},line-2,{x[i, 0]:.6f},{x[i, 1]:.6f},{lab}\n")
    return x, y


def test_timestamp_and_sparse_lab_values_train_and_are_counted(tmp_path, store_dir, capsys):
    path = tmp_path / "historian.csv"
    _historian_export(path)
    # without --features the text columns are named, with the way out
    code = main(["train", str(path), "--target", "lab_value", "--name", "sensor"])
    err = capsys.readouterr().err
    assert code == 2
    assert "'timestamp', 'unit' are not numeric" in err and "--features" in err
    assert "--time" in err
    code = main(["train", str(path), "--target", "lab_value", "--name", "sensor",
                 "--features", "temp_c,flow", "--time", "timestamp", "--no-report", "--quiet",
                 "--kernel", "rbf", "--gamma", "1", "--ridge", "0.01"])
    out = capsys.readouterr().out
    assert code == 0
    assert "113 of 450 rows have a value for lab_value" in out  # rows 0, 4, …, 448
    manifest = Store(store_dir).read_manifest("sensor", 1)
    counts = manifest["training"]["row_counts"]
    assert (counts["rows_read"], counts["rows_with_target"], counts["rows_used"]) == (450, 113,
                                                                                      113)
    assert manifest["training"]["rows"] == 113
    span = manifest["envelope"]["time_span"]
    assert span == {"column": "timestamp", "start": "2026-11-01T00:00:00+00:00",
                    "end": "2026-11-01T07:28:00+00:00", "kind": "ISO 8601, UTC"}
    assert manifest["training"]["holdout_kind"] == "the most recent rows in time"
    main(["inspect", "sensor"])
    shown = capsys.readouterr().out
    assert "113 of 450 rows have a value for lab_value" in shown
    assert "time span" in shown and "2026-11-01T07:28:00" in shown


def test_missing_input_is_refused_by_line_or_left_out_when_asked(tmp_path):
    path = tmp_path / "gaps.csv"
    path.write_text("a,b,y\n1,2,3\n2,,\n3,,5\n4,1,6\n5,2,7\n6,3,9\n")
    # line 3 has no target: left out; line 4 has a target but no 'b': refused by name
    with pytest.raises(UserError, match=r"line 4, column 'b': missing value .*--drop-incomplete"):
        load_training(path, ["y"])
    d = load_training(path, ["y"], drop_incomplete=True)
    assert d.counts["rows_read"] == 6
    assert d.counts["rows_with_target"] == 5
    assert d.counts["rows_dropped_incomplete"] == 1
    assert d.x.tolist() == [[1, 2], [4, 1], [5, 2], [6, 3]]


def test_parquet_with_a_timestamp_column(tmp_path):
    pa = pytest.importorskip("pyarrow")
    import pyarrow.parquet as pq

    stamps = np.datetime64("2026-01-01T00:00:00") + np.arange(6) * np.timedelta64(1, "h")
    table = pa.table({"t": pa.array(stamps.astype("datetime64[ns]")),
                      "a": [1.0, 2.0, 3.0, 4.0, 5.0, 6.0],
                      "y": [1.0, None, 2.0, 5.0, 3.0, 4.0]})
    path = tmp_path / "p.parquet"
    pq.write_table(table, path, row_group_size=4)
    d = load_training(path, ["y"], ["a"], time="t")
    assert d.counts["rows_with_target"] == 5
    want = (stamps.astype("datetime64[s]").astype(np.int64)).astype(float)
    assert np.array_equal(d.time, want[[0, 2, 3, 4, 5]])


def test_blocked_folds_equal_scikit_learns_time_series_split():
    # reference: scikit-learn TimeSeriesSplit(n_splits, gap) (scikit-learn ≥ 0.24)
    from sklearn.model_selection import TimeSeriesSplit

    for n, splits, gap in ((600, 5, 20), (101, 3, 0), (2400, 5, 80)):
        ours = time_series_folds(n, splits, gap)
        ref = list(TimeSeriesSplit(n_splits=splits, gap=gap).split(np.zeros((n, 1))))
        assert len(ours) == len(ref)
        for (tr, va), (rtr, rva) in zip(ours, ref, strict=True):
            assert np.array_equal(tr, rtr) and np.array_equal(va, rva)


def _ar1_series(rows: int, seed: int = 11):
    """An autocorrelated process of our own: AR(1) inputs (φ = 0.995) drive a nonlinear
    response, with slowly wandering AR(1) disturbance (φ = 0.98) on top."""
    rng = np.random.default_rng(seed)
    x = np.zeros((rows, 2))
    e = np.zeros(rows)
    for i in range(1, rows):
        x[i] = 0.995 * x[i - 1] + rng.normal(0, 0.1, 2)
        e[i] = 0.98 * e[i - 1] + rng.normal(0, 0.12)
    y = np.tanh(x[:, 0]) + 0.5 * np.sin(2 * x[:, 1]) + e + rng.normal(0, 0.02, rows)
    return x, y


@pytest.mark.slow
def test_time_holdout_is_honest_where_a_random_holdout_is_optimistic(tmp_path, store_dir,
                                                                     capsys):
    x, y = _ar1_series(1100)
    later = slice(800, 1100)
    path = tmp_path / "series.csv"
    with open(path, "w") as fh:
        fh.write("minute,u,v,quality\n")
        for i in range(800):
            fh.write(f"{i},{x[i, 0]:.17g},{x[i, 1]:.17g},{y[i]:.17g}\n")
    args = ["train", str(path), "--target", "quality", "--features", "u,v", "--kernel", "rbf",
            "--no-report", "--quiet", "--json"]
    assert main([*args, "--name", "randomly"]) == 0
    random_run = json.loads(capsys.readouterr().out)
    assert main([*args, "--name", "in-time", "--time", "minute"]) == 0
    time_run = json.loads(capsys.readouterr().out)

    from service import load_model

    def later_rmse(name: str) -> float:
        pred = load_model(store_dir, name, 1).predict(x[later])
        return float(np.sqrt(np.mean((pred - y[later]) ** 2)))

    random_reported = random_run["metrics"]["holdout"]["quality"]["rmse"]
    time_reported = time_run["metrics"]["holdout"]["quality"]["rmse"]
    random_future, time_future = later_rmse("randomly"), later_rmse("in-time")
    print(f"random holdout: reported {random_reported:.4f}, later stretch {random_future:.4f}; "
          f"--time: reported {time_reported:.4f}, later stretch {time_future:.4f}")
    # the random holdout is measurably optimistic about the future ...
    assert random_reported < 0.6 * random_future
    # ... the time-ordered holdout is close to what the later, unseen stretch shows
    assert 0.6 * time_future < time_reported < 1.6 * time_future
    manifest = Store(store_dir).read_manifest("in-time", 1)
    assert manifest["tuning"]["method"].startswith("blocked cross-validation in time order")
    # in time order the intervals come from holdout residuals, and their check is said to be
    # the earlier half of the holdout calibrating the later half
    intervals = manifest["intervals"]
    assert intervals["name"] == "split-conformal"
    assert "most recent stretch in time" in intervals["method"]
    assert "earlier half of the holdout" in intervals["holdout_coverage_method"]
    assert [c["rows"] for c in intervals["holdout_coverage"]] == [80] * 3  # 160 held out
