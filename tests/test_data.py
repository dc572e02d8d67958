"""Reading training and scoring files: numbers, refusals naming line and column."""

from __future__ import annotations

import hashlib

import numpy as np
import pytest

from trainer.errors import UserError
from trainer.read.columns import iter_chunks, read_table, split_columns


def write(tmp_path, text, name="d.csv"):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_reads_numbers_header_and_fingerprint(tmp_path):
    path = write(tmp_path, "a, b ,y\n1,2.5,3\n-4,5e-1,6\n7,8,9\n")
    t = read_table(path)
    assert t.columns == ["a", "b", "y"]  # header cells are trimmed
    np.testing.assert_array_equal(t.values, [[1, 2.5, 3], [-4, 0.5, 6], [7, 8, 9]])
    # reference: the data fingerprint is the sha256 of the input file's bytes (hashlib)
    assert t.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()


def test_byte_order_mark_and_blank_lines_are_tolerated(tmp_path):
    path = tmp_path / "bom.csv"
    path.write_bytes("\ufeffa,y\n1,2\n\n3,4\n5,7\n".encode())
    t = read_table(path)
    assert t.columns == ["a", "y"] and t.values.shape == (3, 2)


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("a,b,y\n1,2,3\n4,,6\n7,8,9\n", "line 3, column 'b': missing value"),
        ("a,b,y\n1,2,3\n4,5,NaN\n7,8,9\n", "line 3, column 'y': missing value"),
        ("a,b,y\n1,2,3\n4,5,6\n7,eight,9\n", "line 4, column 'b': 'eight' is not a number"),
        ("a,b,y\n1,inf,3\n4,5,6\n7,8,9\n", "line 2, column 'b': 'inf' is not a finite number"),
        ("a,b,y\n1,2,3\n4,5,-Infinity\n", "line 3, column 'y': '-Infinity' is not a finite"),
        ("a,b,a\n1,2,3\n", "column name 'a' appears twice (columns 1 and 3)"),
        ("a,,y\n1,2,3\n", "line 1, column 2 has an empty name"),
        ("a,b,y\n1,2,3\n4,5\n", "line 3 has 2 cells, the header has 3"),
    ],
)
def test_bad_cells_are_named_by_line_and_column(tmp_path, text, message):
    with pytest.raises(UserError) as info:
        read_table(write(tmp_path, text))
    assert message in str(info.value)
    assert "\n" not in str(info.value)


def test_line_numbers_count_blank_lines_and_multiline_cells(tmp_path):
    # The bad cell is on file line 6: a blank line and a quoted two-line cell come before it.
    text = 'a,b,y\n1,2,3\n\n"4\n",5,6\n7,x,9\n'
    with pytest.raises(UserError, match="line 6, column 'b'"):
        read_table(write(tmp_path, text))
    with pytest.raises(UserError, match="line 6, column 'b'"):
        list(iter_chunks(write(tmp_path, text, "s.csv"), ["a", "b"]))


def test_empty_and_missing_files(tmp_path):
    with pytest.raises(UserError, match="the file is empty"):
        read_table(write(tmp_path, ""))
    with pytest.raises(UserError, match="no such file"):
        read_table(tmp_path / "absent.csv")


def test_split_columns_defaults_and_order(tmp_path):
    t = read_table(write(tmp_path, "x1,y,x2\n1,10,5\n2,20,4\n3,31,2\n"))
    features, x, y = split_columns(t, ["y"], None)
    assert features == ["x1", "x2"]
    np.testing.assert_array_equal(x, [[1, 5], [2, 4], [3, 2]])
    np.testing.assert_array_equal(y, [[10], [20], [31]])
    features, x, _ = split_columns(t, ["y"], ["x2", "x1"])
    np.testing.assert_array_equal(x[:, 0], [5, 4, 2])


@pytest.mark.parametrize(
    ("text", "targets", "features", "message"),
    [
        ("a,y\n1,2\n3,4\n", ["y"], None, "2 data row(s); training needs at least 3"),
        ("a,y\n", ["y"], None, "0 data row(s)"),
        ("a,y\n1,2\n3,2\n5,2\n", ["y"], None, "target column 'y' is constant"),
        ("a,y\n1,2\n3,4\n5,6\n", ["z"], None, "unknown target column(s) 'z'"),
        ("a,y\n1,2\n3,4\n5,6\n", ["y"], ["a", "q"], "unknown feature column(s) 'q'"),
        ("a,y\n1,2\n3,4\n5,6\n", ["y"], ["a", "y"], "cannot be feature and target"),
        ("y\n1\n3\n5\n", ["y"], None, "no feature columns"),
    ],
)
def test_split_columns_refusals(tmp_path, text, targets, features, message):
    t = read_table(write(tmp_path, text))
    with pytest.raises(UserError) as info:
        split_columns(t, targets, features)
    assert message in str(info.value)


def test_chunks_convert_only_the_needed_columns(tmp_path):
    # a text column the model does not use must not stop scoring
    path = write(tmp_path, "id,a,b\nx1,1,2\nx2,3,4\nx3,5,6\n")
    chunks = list(iter_chunks(path, ["b", "a"], block_bytes=14))  # two 7-byte records per block
    assert [start for start, _ in chunks] == [0, 2]
    np.testing.assert_array_equal(np.vstack([c for _, c in chunks]), [[2, 1], [4, 3], [6, 5]])
    with pytest.raises(UserError, match="missing feature column"):
        list(iter_chunks(path, ["a", "zz"]))
