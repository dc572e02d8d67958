"""The grown envelope end to end: a real gunicorn answers with the new fields (held to the
answer schema the OpenAPI document is generated from), ``kridge predict`` writes them,
``--target-range`` clips values and interval ends, its bad values exit 2 with one line, and
an old bundle still serves without the checks it never stored.

The data are invented spectra-like rows (bench/spectra_data.py); the rows that must be
flagged are built from the generator's own band shapes."""

from __future__ import annotations

import csv
import shutil
from pathlib import Path

import numpy as np
import pytest
from cli_helpers import run_cli
from service_helpers import Gunicorn

from bench.spectra_data import TARGETS, bands, reversed_row, spectra, write_csv
from service import load_model
from service.schemas import PredictionBatch

FIXTURE = Path(__file__).parent / "fixtures" / "store_schema1"


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    from trainer.cli import main

    root = tmp_path_factory.mktemp("served")
    x, y = spectra(300, seed=4)
    write_csv(root / "train.csv", x, y)
    store = root / "store"
    assert main(["train", str(root / "train.csv"), "--target", ",".join(TARGETS), "--name",
                 "nir", "--kernel", "rbf", "--gamma", "1e-5", "--ridge", "1e-3",
                 "--target-range", "0:,0:100", "--release", "--no-report", "--quiet",
                 "--store", str(store)]) == 0
    return store, x, root


def _low_fat(x: np.ndarray) -> np.ndarray:
    """The mean spectrum with 1.3 × the fat band taken away: its fat prediction is negative."""
    return x.mean(axis=0) - 1.3 * bands()[0]


def test_target_range_clips_values_and_interval_ends(trained):
    store, x, _ = trained
    model = load_model(str(store), "nir")
    assert model.manifest["target_bounds"]["bounds"] == {
        "fat": {"low": 0.0, "high": None}, "protein": {"low": 0.0, "high": 100.0}}
    row = _low_fat(x)[None, :]
    raw = model.engine.predict(row, raw=True)  # the unclipped model
    assert raw[0, 0] < 0
    half = model.half_width(0.9)
    scored = model.answer(row, half)
    assert scored.values[0, 0] == 0.0 and scored.values[0, 1] == raw[0, 1]
    np.testing.assert_allclose(scored.lower[0], np.maximum(raw[0] - half, 0.0))
    np.testing.assert_allclose(scored.upper[0], np.maximum(raw[0] + half, 0.0))
    assert model.predict(row)[0, 0] == 0.0  # the Python API clips too
    flag = scored.envelope[0]["target_out_of_range"]["fat"]
    assert flag["value"] == pytest.approx(raw[0, 0])  # the unclipped value is reported
    assert flag["min"] == pytest.approx(model.y_lo[0])
    assert "target_range" in scored.envelope[0]["flagged_by"]


@pytest.mark.parametrize("given, says", [
    ("5:1,0:", "'fat': the low bound 5 is not below the high bound 1"),
    ("0:", "1 range(s) for 2 target(s)"),
    ("0:,x:3", "'protein': 'x' is not a number"),
    ("0:,:", "'protein': give at least one bound"),
])
def test_bad_target_range_exits_2_with_one_line(trained, capsys, given, says):
    store, _, root = trained
    code, out, err = run_cli(capsys, "train", root / "train.csv", "--target", "fat,protein",
                             "--name", "bad", "--target-range", given, "--store", store)
    assert code == 2
    assert len(err.strip().splitlines()) == 1 and says in err, err
    assert "Traceback" not in err
    assert not (store / "bad").exists()  # nothing written


def test_served_answer_carries_the_grown_envelope(trained):
    store, x, _ = trained
    rows = [x[5].tolist(), reversed_row(x, 5).tolist(), _low_fat(x).tolist()]
    with Gunicorn(store, workers=1) as g:
        r = g.post("/models/nir/predict", json={"rows": rows, "coverage": 0.9})
        assert r.status_code == 200, r.text
        body = r.json()
        PredictionBatch.model_validate(body)  # closed schema: every field declared
        doc = g.get("/openapi.json").json()
    inside, flipped, low = body["results"]
    for res in body["results"]:
        env = res["envelope"]
        assert {"t2", "q", "flagged_by", "target_out_of_range"} <= set(env)
        assert env["inside"] == (not env["flagged_by"])
        assert res["interval_calibrated"] == env["inside"]
    assert inside["envelope"]["flagged_by"] == [] and inside["interval_calibrated"] is True
    assert "q" in flipped["envelope"]["flagged_by"] and not flipped["interval_calibrated"]
    assert low["value"][0] == 0.0 and low["interval"][0][0] == 0.0
    assert "target_range" in low["envelope"]["flagged_by"]
    assert "caution" in body
    envelope_doc = doc["components"]["schemas"]["Envelope"]["properties"]
    assert {"t2", "q", "flagged_by", "target_out_of_range"} <= set(envelope_doc)


def test_kridge_predict_writes_the_envelope_columns(trained, capsys, tmp_path):
    store, x, _ = trained
    data = tmp_path / "rows.csv"
    write_csv(data, np.vstack([x[5], reversed_row(x, 5)]), np.zeros((2, 2)))
    out = tmp_path / "scored.csv"
    code, _, err = run_cli(capsys, "predict", "nir", data, "--out", out, "--coverage", "0.9",
                           "--store", store)
    assert code == 0, err
    rows = list(csv.DictReader(out.open()))
    assert rows[0]["inside"] == "true" and rows[0]["flagged_by"] == ""
    assert rows[0]["interval_calibrated"] == "true"
    assert "q" in rows[1]["flagged_by"].split(";") and rows[1]["inside"] == "false"
    assert rows[1]["interval_calibrated"] == "false"
    assert float(rows[1]["q"]) > 1.0
    assert list(rows[0])[:2] == ["fat_predicted", "protein_predicted"]


def test_old_bundle_serves_without_the_new_checks(tmp_path):
    store = tmp_path / "store"
    shutil.copytree(FIXTURE, store)
    with Gunicorn(store, workers=1) as g:
        r = g.post("/models/coat/predict",
                   json={"rows": [[190.0, 22.0, 60.0]], "coverage": 0.9})
        assert r.status_code == 200, r.text
        PredictionBatch.model_validate(r.json())
    env = r.json()["results"][0]["envelope"]
    assert "t2" not in env and "q" not in env and "target_out_of_range" not in env
    assert env["flagged_by"] == [c for c, hit in (("range", env["out_of_range"]),
                                                  ("novelty", env["novel"])) if hit]


def test_a_manifest_naming_the_check_without_its_arrays_is_refused(trained, tmp_path):
    from service.model import Model
    from service.store import Store

    store, _, _ = trained
    st = Store(str(store))
    manifest = st.read_manifest("nir", 1)
    arrays = dict(st.load_arrays("nir", 1, manifest))
    del arrays["pca_loadings"]
    with pytest.raises(KeyError, match="pca_loadings"):
        Model(manifest, arrays)
