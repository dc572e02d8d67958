"""The training report and the headline numbers of ``kridge inspect``."""

from __future__ import annotations

import base64
import json
import re

import numpy as np
import pytest
from make_coating_data import TYPICAL_ROW

from trainer.cli import main


@pytest.fixture(scope="module")
def csv_300(tmp_path_factory, demo_csv):
    lines = demo_csv.read_text().splitlines()
    path = tmp_path_factory.mktemp("data") / "coating_small.csv"
    path.write_text("\n".join(lines[:301]) + "\n")
    return path


def test_train_auto_writes_self_contained_report(csv_300, store_dir, capsys):
    rc = main(["train", str(csv_300), "--target", "hardness_s,gloss_gu", "--name", "c",
               "--kernel", "auto", "--quiet"])
    assert rc == 0
    out, err = capsys.readouterr()
    # --quiet: no progress, no log lines; only the model's own warnings (a ridge at the
    # low end of its range on these data)
    assert all(line.startswith("warning: ") for line in err.splitlines())
    assert "LOO" in out and "holdout" in out and "tuning" in out
    page = (store_dir / "c" / "versions" / "1" / "report.html").read_text()
    images = re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', page)
    # LOO-vs-ridge curves, parity + residual histogram, calibration histogram
    assert len(images) >= 3
    assert all(base64.b64decode(i)[:8] == b"\x89PNG\r\n\x1a\n" for i in images)
    assert not re.search(r'(src|href)="(https?:)?//', page)  # no network assets
    for heading in ("Data", "Chosen parameters", "Tuning: LOO RMSE against ridge",
                    "Holdout: parity and residuals", "Prediction intervals",
                    "Training envelope", "Cautions"):
        assert f"<h2>{heading}</h2>" in page
    cautions = page[page.index("<h2>Cautions</h2>"):page.index("<h2>Data</h2>")]
    for words in ("<code>out_of_range</code>", "<code>novel</code>", "extrapolation",
                  "site&#x27;s procedures", "qualified person", "jackknife"):
        assert words in cautions, words
    assert "Poor holdout score" not in cautions  # the demo targets are well predicted
    assert "holdout coverage" in page and "oven_temp_c" in page
    assert "Best of each kernel compared" in page  # --kernel auto lists each kernel


def test_inspect_prints_headline_numbers(csv_300, store_dir, capsys):
    main(["train", str(csv_300), "--target", "hardness_s", "--features", ",".join(TYPICAL_ROW),
          "--name", "c", "--quiet"])
    capsys.readouterr()
    assert main(["inspect", "c"]) == 0
    out = capsys.readouterr().out
    for key in ("LOO", "holdout", "tuning", "holdout coverage", "report"):
        assert re.search(rf"^{key}\s", out, re.M), key
    assert re.search(r"^LOO\s+hardness_s: RMSE [0-9.]+", out, re.M)
    assert "exact leave-one-out" in out
    assert re.search(r"^intervals\s+jackknife: .*No finite-sample coverage guarantee", out, re.M)
    assert re.search(r"^holdout coverage\s+80% → \d+\.\d%; 90% → \d+\.\d%; 95% → ", out, re.M)


def test_a_model_no_better_than_the_mean_is_warned_about_and_cautioned(tmp_path, store_dir,
                                                                        capsys):
    # a target unrelated to the inputs, and a narrow kernel with almost no ridge that
    # interpolates its noise: on unseen rows it does worse than the training mean
    rng = np.random.default_rng(0)
    path = tmp_path / "noise.csv"
    with open(path, "w") as fh:
        fh.write("a,b,y\n")
        for a, b, y in rng.standard_normal((200, 3)):
            fh.write(f"{a:.6f},{b:.6f},{y:.6f}\n")
    assert main(["train", str(path), "--target", "y", "--name", "noise", "--gamma", "2",
                 "--ridge", "1e-4", "--quiet"]) == 0
    err = capsys.readouterr().err  # the warning is printed even with --quiet
    manifest = json.loads((store_dir / "noise" / "versions" / "1" / "manifest.json").read_text())
    ours = manifest["metrics"]["holdout"]["y"]["rmse"]
    mean = manifest["baselines"]["training_mean"]["scores"]["y"]["rmse"]
    assert ours > mean
    assert err.startswith(f"warning: y: holdout RMSE {ours:.4g} vs {mean:.4g} for the "
                          "training mean")
    assert err.rstrip().endswith("[not_better_than_mean]") and err.count("\n") == 1
    assert [w["code"] for w in manifest["warnings"]] == ["not_better_than_mean"]
    page = (store_dir / "noise" / "versions" / "1" / "report.html").read_text()
    cautions = page[page.index("<h2>Cautions</h2>"):page.index("<h2>Data</h2>")]
    assert "Holdout no better than the training mean" in cautions and f"{ours:.4g}" in cautions
