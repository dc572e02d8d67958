"""Time columns written as people write dates: ``--time-format`` and day-first detection.

Reference: Python's ``datetime.strptime`` (standard library) read with the same format and
taken as UTC; our own synthetic time series (a coating line sampled every 7 hours).
"""

from __future__ import annotations

from datetime import datetime, timezone

import numpy as np
import pandas as pd
import pytest
from cli_helpers import run_cli

from trainer.errors import UserError
from trainer.read.columns import load_training
from trainer.read.dates import TimeRule, decide, given_format

RBF = ["--kernel", "rbf", "--gamma", "0.1", "--ridge", "0.5", "--no-report", "--quiet"]
TARGETS = ["hardness_s", "gloss_gu"]


def _utc_seconds(text: str, fmt: str) -> float:
    stamp = datetime.strptime(text, fmt)
    stamp = stamp if stamp.tzinfo else stamp.replace(tzinfo=timezone.utc)
    return stamp.timestamp()


def _dated(demo_csv, tmp_path, stamps: list[str], name: str, sep=";", decimal=","):
    frame = pd.read_csv(demo_csv).head(len(stamps))
    frame.insert(0, "taken", stamps)
    path = tmp_path / name
    frame.to_csv(path, index=False, sep=sep, decimal=decimal)
    return path


def _cells(texts):
    return [(t, lambda i=i: f"line {i + 2}") for i, t in enumerate(texts)]


def test_time_format_reads_like_strptime(demo_csv, tmp_path):
    fmt = "%d.%m.%Y %H:%M"
    stamps = pd.date_range("2024-05-01 06:00", periods=40, freq="7h").strftime(fmt).tolist()
    path = _dated(demo_csv, tmp_path, stamps, "given.csv")
    data = load_training(path, TARGETS, time="taken", time_format=fmt)
    want = np.array([_utc_seconds(s, fmt) for s in stamps])  # datetime.strptime, UTC
    assert np.array_equal(data.time, want)
    # a zone offset in the format is honoured, as strptime's %z gives it
    rule = given_format("%d/%m/%Y %H:%M %z")
    assert rule.seconds("02/05/2024 10:30 +0200") == _utc_seconds("02/05/2024 10:30 +0200",
                                                                  "%d/%m/%Y %H:%M %z")
    with pytest.raises(UserError, match="holds no strftime code"):
        given_format("dd.mm.yyyy")


@pytest.mark.parametrize("fmt", ["%d.%m.%Y", "%d/%m/%Y %H:%M", "%d-%m-%Y %H:%M:%S"])
def test_day_first_is_detected_when_a_day_above_12_decides(demo_csv, tmp_path, fmt):
    # 60 stamps 7 h apart from 1 May: the 13th of May comes late, in the last rows only
    stamps = pd.date_range("2024-05-01 06:00", periods=60, freq="7h").strftime(fmt).tolist()
    path = _dated(demo_csv, tmp_path, stamps, "days.csv")
    data = load_training(path, TARGETS, time="taken")
    assert np.array_equal(data.time, [_utc_seconds(s, fmt) for s in stamps])


def test_month_first_is_detected_the_same_way():
    stamps = ["05/01/2024", "05/13/2024", "06/02/2024"]
    rule = decide(_cells(stamps), "taken")
    assert [rule.seconds(s) for s in stamps] == [_utc_seconds(s, "%m/%d/%Y") for s in stamps]


def test_ambiguous_dates_are_refused_naming_the_column(demo_csv, tmp_path, capsys, store_dir):
    # the first twelve days of a month read as day-first and month-first alike
    stamps = [f"{d:02d}.05.2024" for d in range(1, 13)] * 3
    path = _dated(demo_csv, tmp_path, stamps, "ambiguous.csv")
    code, out, err = run_cli(capsys, "train", path, "--target", ",".join(TARGETS),
                             "--name", "d", "--time", "taken", *RBF)
    assert code == 2 and out == ""
    assert err.strip() == (
        f"kridge train: error: {path}: column 'taken': no date has a day above 12, so "
        "day-first and month-first read its 36 dates alike; give --time-format '%d.%m.%Y' "
        "(day first) or '%m.%d.%Y', with ' %H:%M' when they carry a time")
    assert not store_dir.exists() or not any(store_dir.rglob("manifest.json"))
    # told, it trains, and the manifest says how the column was read
    code, _, err = run_cli(capsys, "train", path, "--target", ",".join(TARGETS), "--name", "d",
                           "--time", "taken", "--time-format", "%d.%m.%Y", *RBF)
    assert code == 0, err
    code, out, _ = run_cli(capsys, "inspect", "d", "1", "--json")
    assert '"read_as": "%d.%m.%Y"' in out


def test_mixed_orders_are_refused():
    with pytest.raises(UserError, match=r"'13\.01\.2024' \(line 2\) is day-first but "
                                        r"'01\.13\.2024' \(line 3\) is month-first"):
        decide(_cells(["13.01.2024", "01.13.2024"]), "taken")
    with pytest.raises(UserError, match="written with - and ."):
        decide(_cells(["13.01.2024", "14-01-2024"]), "taken")


def test_iso_and_numbers_need_no_rule():
    assert decide(_cells(["2024-05-01T06:00:00", "1714543200"]), "t") == TimeRule()


def test_messages_never_suggest_time_when_time_was_given(demo_csv, tmp_path, capsys,
                                                          store_dir):
    stamps = [f"week {i}" for i in range(30)]
    path = _dated(demo_csv, tmp_path, stamps, "words.csv")
    code, _, err = run_cli(capsys, "train", path, "--target", ",".join(TARGETS), "--name", "d",
                           "--time", "taken", *RBF)
    assert code == 2
    assert "line 2, column 'taken': 'week 0' is neither an ISO 8601 time nor a number" in err
    assert "--time-format" in err and "--time " not in err.replace("--time-format", "")
    # a text column that is not the time column: the hint names --features, not --time
    frame = pd.read_csv(path, sep=";", decimal=",")
    frame.insert(1, "shift_note", ["early"] * 30)
    frame["taken"] = pd.date_range("2024-05-01", periods=30, freq="D").strftime("%Y-%m-%d")
    frame.to_csv(path, index=False)
    code, _, err = run_cli(capsys, "train", path, "--target", ",".join(TARGETS), "--name", "d",
                           "--time", "taken", *RBF)
    assert code == 2 and "'shift_note'" in err and "--time" not in err
    code, _, err = run_cli(capsys, "train", path, "--target", ",".join(TARGETS), "--name", "d",
                           "--time-format", "%Y-%m-%d", *RBF)
    assert code == 2 and "give --time COL" in err


def test_day_first_in_excel_and_parquet_text(demo_csv, tmp_path):
    fmt = "%d.%m.%Y %H:%M"
    stamps = pd.date_range("2024-05-01 06:00", periods=60, freq="7h").strftime(fmt).tolist()
    frame = pd.read_csv(demo_csv).head(60)
    frame.insert(0, "taken", stamps)
    want = np.array([_utc_seconds(s, fmt) for s in stamps])
    for name, write in (("d.parquet", frame.to_parquet), ("d.xlsx", frame.to_excel)):
        write(tmp_path / name, index=False)
        data = load_training(tmp_path / name, TARGETS, time="taken")
        assert np.array_equal(data.time, want), name
