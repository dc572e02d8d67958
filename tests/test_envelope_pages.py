"""The grown envelope for people: an unbounded half-width is never shown as 100 % coverage
(trainer check, report, model page, ``kridge inspect``), and the try-a-row page explains the
shape check, the target range and an interval that is not calibrated outside the envelope.

The conformal rank ⌈(c + 1)·coverage⌉ (Lei et al., JASA 2018) is worked out by hand here:
11 residuals give rank 12 > 11 at 0.95 (unbounded) and rank 10 at 0.8."""

from __future__ import annotations

from urllib.parse import urlencode

import numpy as np
import pytest

from bench.spectra_data import TARGETS, reversed_row, spectra, write_csv
from service.app import create_app
from service.page_data import _intervals
from service.settings import Settings
from trainer.calibration import interval_coverage
from trainer.report import _intervals_section
from trainer.show import coverage_text


def test_unbounded_half_width_is_not_measured():
    rng = np.random.default_rng(0)
    res = np.abs(rng.standard_normal((11, 1)))
    actual = rng.standard_normal((40, 1))
    cov = interval_coverage(res, actual, actual + 0.1, levels=(0.8, 0.95))
    assert cov[0]["empirical"] is not None and cov[0]["half_width"][0] == np.sort(res[:, 0])[9]
    assert cov[1]["empirical"] is None and cov[1]["half_width"] is None
    assert "coverage 0.95 is more than" in cov[1]["unavailable"]


@pytest.mark.parametrize("level", [
    {"nominal": 0.95, "empirical": [1.0], "half_width": [float("inf")], "rows": 11},  # old
    {"nominal": 0.95, "empirical": None, "half_width": None, "rows": 11, "unavailable": "…"},
])
def test_pages_report_and_inspect_never_say_100_percent(level):
    ok = {"nominal": 0.8, "empirical": [0.82], "half_width": [1.5], "rows": 11}
    manifest = {"targets": ["fat"], "features": ["a"],
                "intervals": {"method": "jackknife", "calibration_rows": 11,
                              "holdout_coverage": [ok, level],
                              "holdout_coverage_method": "holdout"}}
    _, lines = _intervals(manifest)
    assert lines[0] == "80 %: 82.0 % on 11 rows"
    assert lines[1].startswith("95 %: not available") and "100" not in lines[1]
    assert coverage_text(level).startswith("not available")
    html = "".join(_intervals_section(manifest, None, None))
    assert "not available: too few residuals" in html and "100.0" not in html


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    from trainer.cli import main

    root = tmp_path_factory.mktemp("pages")
    x, y = spectra(300, seed=5)
    write_csv(root / "train.csv", x, y)
    assert main(["train", str(root / "train.csv"), "--target", ",".join(TARGETS), "--name",
                 "nir", "--gamma", "1e-5", "--ridge", "1e-3", "--target-range", "0:,0:100",
                 "--release", "--quiet", "--store", str(root / "store")]) == 0
    app = create_app(Settings(store=str(root / "store")), watch=False)
    c = app.test_client()
    c.x = x
    return c


def _try(client, row) -> str:
    query = urlencode({**{f"f{j}": repr(float(v)) for j, v in enumerate(row)},
                       "coverage": "0.9"})
    r = client.get(f"/page/nir/try?{query}")
    assert r.status_code == 200
    return r.get_data(as_text=True)


def test_try_page_explains_the_shape_check_and_uncalibrated_interval(client):
    flipped = _try(client, reversed_row(client.x, 3))
    assert "Unfamiliar shape: Q is" in flipped
    assert "not calibrated here" in flipped
    plain = _try(client, client.x[3])
    assert "Inside the training envelope: no check flagged the row." in plain
    assert "not calibrated here" not in plain and "Unfamiliar" not in plain
    assert "follows the pattern" in plain


def test_model_page_shows_the_shape_check_and_bounds(client):
    page = client.get("/page/nir").get_data(as_text=True)
    assert "Shape check" in page and "T² and Q on" in page
    assert "<bdi>fat</bdi> 0 to +∞" in page
    report = client.get("/models/nir/versions/1/report").get_data(as_text=True)
    assert "T² limit at 0.99" in report and "clipped to (--target-range)" in report
