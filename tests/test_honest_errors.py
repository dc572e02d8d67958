"""Every error kridge reports is what its name says: the time-ordered folds fit on their own
past only, the intervals name the residuals that calibrated them, and the tuning record
counts what was computed."""

from __future__ import annotations

import numpy as np

from service.kernels import KernelSpec
from trainer.exact.fit import fit_exact
from trainer.tuning import search as tuning
from trainer.validation import folds as validation


def _series(n: int = 120, seed: int = 5) -> tuple[np.ndarray, np.ndarray]:
    """A drifting autocorrelated series: the later rows sit elsewhere than the early ones."""
    rng = np.random.default_rng(seed)
    t = np.arange(n, dtype=float)
    x = np.column_stack([np.sin(t / 9) + t / 40, np.cumsum(rng.normal(0, 0.3, n)),
                         rng.normal(0, 1, n)])
    y = np.column_stack([np.cos(x[:, 0]) + 0.5 * x[:, 1] + 0.1 * rng.normal(0, 1, n)])
    return x, y


def test_time_fold_error_is_that_of_models_fitted_on_each_folds_past():
    # reference: each fold refitted from scratch by trainer.exact.fit.fit_exact (its own
    # standardization and intercept, Cholesky) on the fold's training rows only
    x, y = _series()
    spec, ridge = KernelSpec("rbf", gamma=0.4), 0.05
    got = tuning.tune(x, y, kernel="rbf", given=tuning.Given(gamma=0.4, ridge=ridge),
                      quiet=True, log=lambda *_: None, time_ordered=True)
    residuals = [y[val] - fit_exact(x[tr], y[tr], spec, ridge).predict(x[val])
                 for tr, val in validation.time_series_folds(len(x))]
    want = np.sqrt(np.mean(np.concatenate(residuals) ** 2, axis=0))
    np.testing.assert_allclose(got.account["chosen"]["rmse"], want, rtol=1e-7)


def test_a_time_folds_scaler_ignores_its_validation_block():
    x, y = _series()
    problem, _ = validation.standardized_problem(x, y, None, 0, time_ordered=True)
    first_train, first_val = problem.folds[0]
    x2, y2 = x.copy(), y.copy()
    x2[first_val] *= 50.0  # only the first fold's validation block (and so later folds) move
    y2[first_val] += 1e3
    moved, _ = validation.standardized_problem(x2, y2, None, 0, time_ordered=True)
    for p in (problem, moved):
        assert np.array_equal(p.folds[0][0], first_train)
    a, b = problem.fold_scaling(0), moved.fold_scaling(0)
    np.testing.assert_array_equal(a.scaler.mean, b.scaler.mean)
    np.testing.assert_array_equal(a.scaler.scale, b.scaler.scale)
    np.testing.assert_array_equal(a.y_mean, b.y_mean)
    np.testing.assert_allclose(a.scaler.mean, x[first_train].mean(axis=0))


def _train(csv, store, name: str, **extra) -> dict:
    from service.store import Store
    from trainer.job import TrainOptions, train

    opts = TrainOptions(data=str(csv), targets=["hardness_s"], name=name, store=str(store),
                        kernel="rbf", gamma=0.3, ridge=0.01, quiet=True, report=False, **extra)
    summary = train(opts, log=lambda *_: None)
    return Store(str(store)).read_manifest(name, summary["version"])


def test_interval_name_is_the_method_that_calibrated_the_served_model(small_csv, store_dir,
                                                                      monkeypatch):
    # the jackknife limit lowered so that both sides of it, and the band where only the
    # training part is under it (60 rows: 48 training rows), run in a test
    from trainer import calibration

    monkeypatch.setattr(calibration, "LOO_MAX_ROWS", 50)
    band = _train(small_csv, store_dir, "band")["intervals"]
    assert band["name"] == "split-conformal"
    assert "jackknife" not in (band["holdout_coverage_method"] or "")
    assert "split-conformal" in band["holdout_coverage_method"]
    monkeypatch.setattr(calibration, "LOO_MAX_ROWS", 60)
    small = _train(small_csv, store_dir, "small")["intervals"]
    assert small["name"] == "jackknife"
    assert small["holdout_coverage_method"].startswith("jackknife")


def _counting_eigh(monkeypatch) -> list:
    import scipy.linalg

    calls: list = []
    real = scipy.linalg.eigh

    def eigh(*args, **kw):
        calls.append(1)
        return real(*args, **kw)

    monkeypatch.setattr(scipy.linalg, "eigh", eigh)
    return calls


def test_tuning_record_counts_every_decomposition_and_names_its_error(monkeypatch):
    x, y = _series(90)
    monkeypatch.setattr(validation, "EXACT_MAX_ROWS", 40)
    monkeypatch.setattr(validation, "FALLBACK_ROWS", 60)
    for time_ordered, name in ((False, "k-fold"), (True, "time-fold")):
        calls = _counting_eigh(monkeypatch)
        got = tuning.tune(x, y, kernel="rbf", given=tuning.Given(gamma=0.4), quiet=True,
                          log=lambda *_: None, time_ordered=time_ordered).account
        assert got["decompositions"] == len(calls) > 2
        assert got["error_method"] == name
        assert f"{name} RMSE" in got["summary"] and "LOO" not in got["summary"]
        assert all("loo_rmse" not in c and "rmse" in c for c in got["curves"])
    calls = _counting_eigh(monkeypatch)
    exact = tuning.tune(x[:30], y[:30], kernel="rbf", given=tuning.Given(gamma=0.4), quiet=True,
                        log=lambda *_: None).account
    assert exact["decompositions"] == len(calls) and exact["error_method"] == "LOO"


def test_every_error_is_labelled_by_its_method_in_summary_inspect_and_report(
        small_csv, store_dir, monkeypatch, capsys):
    from cli_helpers import run_cli

    from service.store import Store

    monkeypatch.setattr(validation, "EXACT_MAX_ROWS", 30)
    monkeypatch.setattr(validation, "FALLBACK_ROWS", 40)
    code, out, err = run_cli(capsys, "train", small_csv, "--target", "hardness_s", "--name",
                             "folds", "--kernel", "rbf", "--gamma", "0.3")
    assert code == 0, err
    lines = dict(line.split(None, 1) for line in out.splitlines() if line.strip())
    assert "k-fold RMSE" in lines["tuning"] and "LOO RMSE" not in lines["tuning"]
    assert lines["LOO"].startswith("hardness_s: RMSE")  # the final model's own exact LOO
    man = Store(str(store_dir)).read_manifest("folds", 1)
    assert man["tuning"]["error_method"] == "k-fold"
    assert man["intervals"]["residuals"] == "LOO" and man["intervals"]["name"] == "jackknife"
    code, out, _ = run_cli(capsys, "inspect", "folds")
    assert "k-fold RMSE" in out and "LOO RMSE" not in out
    page = (store_dir / "folds" / "versions" / "1" / "report.html").read_text()
    assert "Tuning: k-fold RMSE against ridge" in page and "LOO RMSE" not in page


def test_the_runtimes_argument_checks_raise_the_one_user_error_type(monkeypatch):
    # the command line maps this one type to exit 2; any other ValueError is a bug (exit 70)
    import pytest

    from service.errors import UserError
    from service.intervals import check_coverage
    from service.settings import drain_seconds, worker_count

    with pytest.raises(UserError, match="gamma"):
        KernelSpec("rbf", gamma=-1.0)
    with pytest.raises(UserError, match="coverage"):
        check_coverage(1.5)
    monkeypatch.setenv("KRIDGE_WORKERS", "many")
    with pytest.raises(UserError, match="KRIDGE_WORKERS"):
        worker_count()
    monkeypatch.setenv("KRIDGE_DRAIN_SECONDS", "-1")
    with pytest.raises(UserError, match="KRIDGE_DRAIN_SECONDS"):
        drain_seconds()
