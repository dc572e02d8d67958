"""The opt-in float32 engine and the error it records in the manifest."""

from __future__ import annotations

import json

import numpy as np
import pytest
from make_coating_data import TYPICAL_ROW

from service import load_model
from service.engine import Engine
from service.kernels import KERNEL_NAMES, default_spec
from service.store import Store, StoreError
from trainer.cli import main


@pytest.mark.parametrize("name", [k for k in KERNEL_NAMES if k != "sigmoid"])
@pytest.mark.parametrize("m", [1, 300])
def test_float32_engine_tracks_float64(name, m):
    rng = np.random.default_rng(3)
    x, dual, q = rng.normal(size=(3000, 6)), rng.normal(size=(3000, 2)), rng.normal(size=(m, 6))
    spec = default_spec(name, 6, gamma=0.1)
    exact = Engine(spec, x, dual).predict(q)
    single = Engine(spec, x, dual, dtype=np.float32).predict(q)
    assert single.dtype == np.float64  # tile sums are accumulated in double
    # single precision: ~1e-7 relative per operation, a few thousand terms per sum
    assert np.max(np.abs(single - exact)) <= 1e-5 * np.max(np.abs(exact))
    assert not np.array_equal(single, exact)  # it really ran in single precision


def test_train_records_the_float32_error(small_csv, store_dir, capsys):
    rc = main(["train", str(small_csv), "--target", "hardness_s", "--name", "f32",
               "--features", ",".join(TYPICAL_ROW),
               "--gamma", "0.2", "--ridge", "0.5", "--precision", "float32", "--no-report"])
    out = capsys.readouterr().out
    assert rc == 0 and "precision  float32" in out
    model = load_model(store_dir, "f32", 1)
    assert model.engine.dtype == np.float32
    check = model.manifest["precision_check"]
    # recompute independently: float64 engine on the same stored arrays and training rows
    st = Store(store_dir)
    arrays = st.load_arrays("f32", 1, model.manifest)
    x_s = np.asarray(arrays["x_train"])
    exact = Engine(model.spec, x_s, arrays["dual"]).predict(x_s)
    single = model.predict_standardized(x_s) - model.intercept
    measured = float(np.max(np.abs(single - exact)))
    assert check["rows"] == x_s.shape[0]
    assert check["max_abs_error"]["hardness_s"] == pytest.approx(measured, rel=1e-9, abs=1e-12)
    assert 0 < measured < 1e-3
    main(["inspect", "f32"])
    assert "largest difference from float64" in capsys.readouterr().out


def test_unknown_precision_in_a_manifest_is_refused(small_csv, store_dir):
    assert main(["train", str(small_csv), "--target", "hardness_s", "--name", "p",
                 "--features", ",".join(TYPICAL_ROW),
                 "--gamma", "0.2", "--ridge", "0.5", "--no-report"]) == 0
    path = store_dir / "p" / "versions" / "1" / "manifest.json"
    manifest = json.loads(path.read_text())
    assert manifest["precision"] == "float64" and manifest["precision_check"] is None
    manifest["precision"] = "float16"
    path.write_text(json.dumps(manifest))
    with pytest.raises(StoreError, match="precision"):
        load_model(store_dir, "p", 1)
