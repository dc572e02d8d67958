"""A prediction that overflows is refused by name, never sent as JSON null."""

from __future__ import annotations

import numpy as np
import orjson
import pytest

from service import load_model
from service.answers import parse_body, predict_response
from service.errors import ApiError
from tests.cli_helpers import run_cli

FEATURES = "oven_temp_c,line_speed_m_min,wet_film_um,humidity_pct,viscosity_mpas"


def test_overflowing_polynomial_prediction_is_a_named_422(small_csv, store_dir, capsys):
    # (γ·aᵀb + c₀)^40 is modest on the training rows but passes 1e308 for an input near the
    # request bound (1e12): the float64 range ends at about 1.8e308 (IEEE 754)
    code, _, err = run_cli(capsys, "train", small_csv, "--target", "hardness_s", "--features",
                           FEATURES, "--name", "poly", "--kernel", "polynomial", "--degree",
                           "40", "--gamma", "0.01", "--coef0", "1", "--ridge", "1",
                           "--no-report", "--release", "--quiet")
    assert code == 0, err
    model = load_model(store_dir, "poly")
    centre = [float(v) for v in model.manifest["standardization"]["mean"]]
    far = list(centre)
    far[0] = 1e12
    body = parse_body(orjson.dumps({"rows": [centre, far]}), max_rows=10)
    assert np.isfinite(model.predict(np.array([centre]))).all()
    with pytest.raises(ApiError) as caught:
        predict_response(model, body, 0.0, 0.0)
    assert caught.value.status == 422
    assert caught.value.code == "prediction_not_finite"
    assert caught.value.message.startswith("row 1: the prediction overflowed")
