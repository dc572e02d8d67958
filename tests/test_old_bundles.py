"""Bundles already in a store stay served: a version published by an earlier kridge (manifest
schema 1, committed under tests/fixtures/store_schema1) loads, verifies and predicts the
numbers it was published with."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest
from cli_helpers import run_cli

from service import load_model
from service.model import verify
from service.store import Store

FIXTURE = Path(__file__).parent / "fixtures" / "store_schema1"
#: Written by the kridge of schema 1 (``kridge train`` on the first 40 demo rows, rbf with
#: gamma 0.3, ridge tuned), with the predictions and half-width it gave then.
ROWS = np.array([[190.0, 22.0, 60.0], [185.0, 20.0, 55.0]])
PREDICTED = np.array([113.93040987, 105.10254857])
HALF_WIDTH_90 = 14.76463857


@pytest.fixture
def old_store(tmp_path) -> Path:
    root = tmp_path / "store"
    shutil.copytree(FIXTURE, root)
    return root


def test_schema_1_bundle_loads_and_predicts_as_published(old_store):
    model = load_model(str(old_store), "coat")
    assert model.manifest["schema"] == 1
    np.testing.assert_allclose(np.ravel(model.predict(ROWS)), PREDICTED, rtol=1e-8)
    np.testing.assert_allclose(model.half_width(0.9), [HALF_WIDTH_90], rtol=1e-8)
    verify(Store(str(old_store)), "coat", 1)


def test_schema_1_bundle_in_inspect_and_versions(old_store, capsys):
    code, out, err = run_cli(capsys, "inspect", "coat", "--store", old_store)
    assert code == 0, err
    assert "rbf(gamma=0.3)" in out and "LOO" in out
    code, out, err = run_cli(capsys, "versions", "coat", "--store", old_store)
    assert code == 0, err
    assert "* " in out or "*  " in out
