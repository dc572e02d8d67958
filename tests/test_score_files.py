"""``kridge predict`` on files as people export them: kept columns that join back, the
input's own dialect, incomplete rows skipped and flagged, refusals that leave nothing
behind, Parquet and Excel inputs.

References: pandas (``read_csv`` with ``sep``/``decimal``, ``merge``) reads the output back
independently of kridge's writer; the predicted numbers are compared with
``load_model().predict`` on the same rows (the path tests/test_fit_reference.py checks
against scikit-learn's KernelRidge).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from cli_helpers import run_cli

from service import load_model

FEATURES = ["oven_temp_c", "line_speed_m_min", "wet_film_um", "humidity_pct", "viscosity_mpas"]
RBF = ["--kernel", "rbf", "--gamma", "0.2", "--ridge", "0.5", "--no-report", "--quiet"]


@pytest.fixture
def trained(store_dir, small_csv, capsys):
    """Model 'coat' (hardness_s and gloss_gu from the five process readings), v1 live."""
    code, _, err = run_cli(capsys, "train", small_csv, "--target", "hardness_s,gloss_gu",
                           "--features", ",".join(FEATURES), "--name", "coat", "--release",
                           *RBF)
    assert code == 0, err
    return store_dir


@pytest.fixture
def samples(small_csv) -> pd.DataFrame:
    """The 60 rows with a sample id, a day-first stamp and a comment, shuffled."""
    frame = pd.read_csv(small_csv)
    frame.insert(0, "sample", [f"S-{i:03d}" for i in range(len(frame))])
    frame.insert(1, "taken", [f"{1 + i % 28:02d}.05.2024 08:{i % 60:02d}"
                              for i in range(len(frame))])
    frame["note"] = ["=HYPERLINK()" if i == 3 else ("a;b" if i == 4 else "ok")
                     for i in range(len(frame))]
    return frame.sample(frac=1.0, random_state=3).reset_index(drop=True)


def test_kept_columns_join_back_to_the_samples(trained, samples, tmp_path, capsys):
    data = tmp_path / "new.csv"
    samples.to_csv(data, index=False)
    out = tmp_path / "scored.csv"
    code, _, err = run_cli(capsys, "predict", "coat", data, "--keep", "sample,taken",
                           "--out", out)
    assert code == 0, err
    scored = pd.read_csv(out, dtype={"taken": str})
    # by default: the kept columns and the results, no inputs echoed
    assert list(scored.columns) == ["sample", "taken", "hardness_s_predicted",
                                    "gloss_gu_predicted", "inside", "novelty", "out_of_range",
                                    "t2", "q", "target_out_of_range", "flagged_by"]
    joined = samples.merge(scored, on="sample", validate="one_to_one")
    assert len(joined) == len(samples)
    assert (joined["taken_x"] == joined["taken_y"]).all()  # copied as written, not parsed
    want = load_model(trained, "coat").predict(joined[FEATURES].to_numpy())
    got = joined[["hardness_s_predicted", "gloss_gu_predicted"]].to_numpy()
    assert np.array_equal(got, want)  # repr() numbers: an exact round trip


def test_semicolon_decimal_comma_file_comes_back_in_its_dialect(trained, samples, tmp_path,
                                                                 capsys):
    data = tmp_path / "export.csv"
    samples.to_csv(data, index=False, sep=";", decimal=",")
    code, out, err = run_cli(capsys, "predict", "coat", data, "--keep", "sample,note",
                             "--with-inputs", "--coverage", "0.8")
    assert code == 0, err
    header = out.splitlines()[0]
    # kept, inputs, predictions, bounds, envelope (7) and interval_calibrated
    assert header.count(";") == 2 + 5 + 2 + 4 + 7 + 1 - 1 and "," not in header
    back = pd.read_csv(__import__("io").StringIO(out), sep=";", decimal=",")
    assert list(back.columns[:7]) == ["sample", "note", *FEATURES]
    # inputs written with decimal commas read back to the same numbers (pandas 2/3 reader)
    merged = samples.merge(back, on="sample", suffixes=("", "_out"))
    for f in FEATURES:
        assert np.array_equal(merged[f].to_numpy(float), merged[f + "_out"].to_numpy(float))
    model = load_model(trained, "coat")
    np.testing.assert_array_equal(merged["hardness_s_predicted"],
                                  model.predict(merged[FEATURES].to_numpy())[:, 0])
    half = model.half_width(0.8)
    np.testing.assert_allclose(merged["hardness_s_upper"] - merged["hardness_s_predicted"],
                               half[0], rtol=1e-12)
    # a text cell that starts like a formula is neutralised; a ';' inside a cell stays in it
    assert set(merged["note_out"]) == {"ok", "'=HYPERLINK()", "a;b"}


def test_comma_file_stays_comma_and_point(trained, samples, tmp_path, capsys):
    data = tmp_path / "plain.csv"
    samples.to_csv(data, index=False)
    code, out, _ = run_cli(capsys, "predict", "coat", data, "--keep", "sample")
    assert code == 0
    assert out.splitlines()[0].split(",")[:2] == ['"sample"', '"hardness_s_predicted"']
    assert ";" not in out.splitlines()[1]


def test_drop_incomplete_counts_and_flags_each_skipped_row(trained, samples, tmp_path, capsys):
    frame = samples.copy()
    frame.loc[[2, 7], "humidity_pct"] = np.nan
    frame.loc[7, "viscosity_mpas"] = np.nan
    data = tmp_path / "gaps.csv"
    frame.to_csv(data, index=False, sep=";", decimal=",")
    out = tmp_path / "o.csv"
    code, _, err = run_cli(capsys, "predict", "coat", data, "--keep", "sample",
                           "--drop-incomplete", "--out", out)
    assert code == 0, err
    assert "2 of 60 rows skipped for a missing input" in err
    assert "of 58 rows outside the training envelope" in err
    scored = pd.read_csv(out, sep=";", decimal=",", keep_default_na=False)
    assert list(scored["sample"]) == list(frame["sample"])  # every row, in file order
    skipped = scored[scored["skipped"] != ""]
    assert list(skipped.index) == [2, 7]
    assert list(skipped["skipped"]) == ["missing humidity_pct",
                                        "missing humidity_pct;viscosity_mpas"]
    assert (skipped[["hardness_s_predicted", "inside", "novelty"]] == "").all().all()
    rest = scored.drop(index=[2, 7])
    want = load_model(trained, "coat").predict(frame.drop(index=[2, 7])[FEATURES].to_numpy())
    got = rest["hardness_s_predicted"].str.replace(",", ".").astype(float)  # a text column
    assert np.array_equal(got, want[:, 0])


@pytest.mark.parametrize("to_stdout", [True, False])
def test_refusal_on_the_last_row_leaves_no_output(trained, samples, tmp_path, capsys,
                                                  to_stdout):
    frame = samples.copy()
    frame.loc[59, "wet_film_um"] = np.nan
    data = tmp_path / "late_gap.csv"
    frame.to_csv(data, index=False)
    out = tmp_path / "o.csv"
    argv = ["predict", "coat", data, "--keep", "sample"] + ([] if to_stdout else ["--out", out])
    # the header is written before the rows are read: it must not reach the user either
    code, stdout, err = run_cli(capsys, *argv)
    assert code == 2
    assert err.strip() == ("kridge predict: error: " f"{data}: line 61, column 'wet_film_um': "
                           "missing value (give --drop-incomplete to skip such rows: they "
                           "are written with empty results)")
    assert stdout == ""
    assert not out.exists() and not list(tmp_path.glob("*.partial"))


def test_refusal_in_a_later_block_writes_nothing_to_stdout(trained, samples, tmp_path,
                                                          capsys, monkeypatch):
    """A bad cell in the last of many blocks: the earlier blocks' rows, already scored,
    never reach standard output."""
    import functools

    from trainer import score_file

    frame = samples.copy()
    frame["viscosity_mpas"] = frame["viscosity_mpas"].astype(object)
    frame.loc[59, "viscosity_mpas"] = "thick"
    data = tmp_path / "bad_cell.csv"
    frame.to_csv(data, index=False)
    written = []

    def small_blocks(model, path, out, *a, **k):
        try:
            return real(model, path, out, *a, **{**k, "block_bytes": 256})
        finally:
            out.seek(0)
            written.append(out.read().count("\n"))

    real = score_file.score_file
    monkeypatch.setattr(score_file, "score_file", functools.update_wrapper(small_blocks, real))
    code, stdout, err = run_cli(capsys, "predict", "coat", data, "--keep", "sample")
    assert code == 2 and "line 61, column 'viscosity_mpas': 'thick' is not a number" in err
    assert written[0] > 30  # many blocks were scored and buffered before the refusal …
    assert stdout == ""  # … and none of them was written out


def test_keep_names_are_checked_before_anything(trained, samples, tmp_path, capsys):
    data = tmp_path / "new.csv"
    samples.to_csv(data, index=False)
    code, out, err = run_cli(capsys, "predict", "coat", data, "--keep", "sample,batch")
    assert code == 2 and out == "" and "unknown kept column(s) 'batch'" in err
    code, out, err = run_cli(capsys, "predict", "coat", data, "--keep", "sample,sample")
    assert code == 2 and "--keep lists a column twice" in err
    frame = samples.rename(columns={"note": "inside"})
    frame.to_csv(data, index=False)
    code, out, err = run_cli(capsys, "predict", "coat", data, "--keep", "inside")
    assert code == 2 and "result column of that name" in err


def test_parquet_and_excel_inputs(trained, samples, tmp_path, capsys):
    frame = samples.copy()
    frame["taken"] = pd.to_datetime(frame["taken"], format="%d.%m.%Y %H:%M")
    model = load_model(trained, "coat")
    want = model.predict(frame[FEATURES].to_numpy())
    for name, write in (("in.parquet", frame.to_parquet), ("in.xlsx", frame.to_excel)):
        data = tmp_path / name
        write(data, index=False)
        code, out, err = run_cli(capsys, "predict", "coat", data, "--keep", "sample,taken",
                                 "--decimal", ",")
        assert code == 0, (name, err)
        back = pd.read_csv(__import__("io").StringIO(out), sep=";", decimal=",")
        assert list(back["sample"]) == list(frame["sample"]), name
        # a typed time is written as ISO 8601 text
        assert pd.to_datetime(back["taken"]).tolist() == frame["taken"].tolist(), name
        np.testing.assert_allclose(back[["hardness_s_predicted", "gloss_gu_predicted"]],
                                   want, rtol=1e-14, err_msg=name)


def test_help_names_every_format(capsys):
    from trainer.cli import main

    with pytest.raises(SystemExit):
        main(["predict", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    for fmt in ("CSV", "Parquet", ".parquet", ".xlsx", ".xlsm", "decimal point or comma"):
        assert fmt in text
