"""The fast search: Cholesky-scored points, the coarse stage and the race, what they count.

The stages are exercised at small sizes by lowering the coarse stage's subsample size
(``race.COARSE_ROWS``); "the full search" is the search without a subsample and without
racing (every setting searched whole on all rows, as before the race existed).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
from sklearn.datasets import load_diabetes
from sklearn.kernel_ridge import KernelRidge
from sklearn.model_selection import LeaveOneOut
from threadpoolctl import threadpool_info, threadpool_limits

from bench.tuning_data import competing, fine_sine, plant
from service.kernels import KernelSpec, kernel_matrix
from trainer.exact import cholesky_score, fit, loo
from trainer.exact.fit import Standardizer, fit_exact
from trainer.tuning import race, workers
from trainer.tuning import search as tuning
from trainer.validation import folds as validation


def _quiet(*_a, **_k) -> None:
    pass


def _tune(x, y, kernel="rbf", **given) -> tuning.Tuned:
    return tuning.tune(x, y, kernel=kernel, given=tuning.Given(**given), quiet=True, log=_quiet)


def _full_search(monkeypatch) -> None:
    monkeypatch.setattr(race, "COARSE_ROWS", 10**9)
    monkeypatch.setattr(race, "COARSE_MARGIN", 1.0)  # error × 0 never exceeds the leader's


def _spy(monkeypatch, module, name: str) -> list[int]:
    """Record the size of every matrix handed to module.name."""
    sizes: list[int] = []
    real = getattr(module, name)

    def spy(a, *args, **kw):
        sizes.append(np.shape(a)[0])
        return real(a, *args, **kw)

    monkeypatch.setattr(module, name, spy)
    return sizes


def _holdout_rmse(x, y, tuned: tuning.Tuned, n_train: int) -> float:
    model = fit_exact(x[:n_train], y[:n_train], tuned.spec, tuned.ridge)
    return float(np.sqrt(np.mean((model.predict(x[n_train:]) - y[n_train:]) ** 2)))


def test_cholesky_points_equal_the_spectral_closed_forms():
    rng = np.random.default_rng(0)
    x = rng.standard_normal((160, 3))
    y = rng.standard_normal((160, 2))
    k = kernel_matrix(KernelSpec("matern52", gamma=0.3), x)
    w, q = loo.eigen_kernel(k.copy())
    folds = [(np.arange(40, 160), np.arange(0, 40)), (np.arange(0, 120), np.arange(120, 160))]
    for ridge in (1e-3, 0.1, 3.0):
        ref = loo.loo_residuals(w, q, y, np.array([ridge]))[0]
        np.testing.assert_allclose(cholesky_score.loo_point(k, y, ridge), ref, atol=1e-9)
        ref_folds, _ = loo.kfold_residuals(k, y, folds, np.array([ridge]), True)
        got, runs = cholesky_score.kfold_point(k, y, folds, ridge)
        np.testing.assert_allclose(got, ref_folds[0], atol=1e-9)
        assert runs == 2
    # a system that is not safely positive definite scores nothing (as on the ridge path)
    dup = kernel_matrix(KernelSpec("rbf", gamma=50.0), np.repeat(x[:20], 3, axis=0))
    assert cholesky_score.loo_point(dup, y[:60], 1e-15) is None


def test_chosen_loo_error_is_exact_against_brute_force_refits(monkeypatch):
    # reference: scikit-learn 1.9 KernelRidge refitted under LeaveOneOut at the chosen
    # setting, on the standardized rows and centered target (the PRESS setting)
    monkeypatch.setattr(race, "COARSE_ROWS", 40)
    x, y = plant(90, seed=3)
    tuned = _tune(x, y)
    acc = tuned.account
    assert acc["coarse_rows"] == 40 and acc["chosen"]["rows"] == 90
    x_s = Standardizer.fit(x)(x)
    y_c = y[:, 0] - y[:, 0].mean()
    brute = np.empty(90)
    for tr, te in LeaveOneOut().split(x_s):
        kr = KernelRidge(alpha=tuned.ridge, kernel="rbf", gamma=tuned.spec.gamma)
        brute[te] = y_c[te] - kr.fit(x_s[tr], y_c[tr]).predict(x_s[te])
    rmse = float(np.sqrt(np.mean(brute**2)))
    np.testing.assert_allclose(acc["chosen"]["rmse"][0], rmse, rtol=1e-7)
    np.testing.assert_allclose(acc["chosen"]["score"], rmse**2 / y_c.var(), rtol=1e-7)


@pytest.mark.parametrize(("data", "kernel"), [
    ("plant", "rbf"), ("plant", "auto"), ("competing", "auto"), ("competing", "matern32"),
    ("fine_sine", "rbf"), ("diabetes", "rbf"), ("diabetes", "auto")])
def test_same_answer_as_the_full_search(monkeypatch, data, kernel):
    # the race (subsample of 120 rows, finalists settled on all 360) against the full search:
    # held-out error within 2 % (diabetes: scikit-learn's bundled data set, Efron et al. 2004)
    if data == "diabetes":
        x, y = load_diabetes(return_X_y=True)
        y = y[:, None]
    else:
        x, y = {"plant": plant, "competing": competing, "fine_sine": fine_sine}[data](600)
    n = 360
    # one BLAS thread: small systems otherwise spend their time in thread hand-offs
    with monkeypatch.context() as m, threadpool_limits(1, user_api="blas"):
        m.setattr(race, "COARSE_ROWS", 120)
        fast = _tune(x[:n], y[:n], kernel)
    assert fast.account["coarse_rows"] == 120
    with monkeypatch.context() as m, threadpool_limits(1, user_api="blas"):
        _full_search(m)
        whole = _tune(x[:n], y[:n], kernel)
    assert whole.account["coarse_rows"] is None and not whole.account["raced_out"]
    ours, ref = _holdout_rmse(x, y, fast, n), _holdout_rmse(x, y, whole, n)
    assert ours <= 1.02 * ref, (ours, ref, fast.spec, whole.spec)


def test_records_and_summary_count_what_ran(monkeypatch):
    monkeypatch.setattr(race, "COARSE_ROWS", 80)
    eigh = _spy(monkeypatch, scipy.linalg, "eigh")
    chol = _spy(monkeypatch, scipy.linalg, "cho_factor")
    made: list[workers.Runner] = []

    class Kept(workers.Runner):  # the search's runner, kept to read its progress counts
        def __init__(self, *args, **kw):
            super().__init__(*args, **kw)
            made.append(self)

    monkeypatch.setattr(tuning, "Runner", Kept)
    x, y = competing(200, seed=4)
    acc = _tune(x, y, "auto").account
    assert acc["decompositions"] == len(eigh) and acc["factorizations"] == len(chol) > 0
    # the progress bar counts the same work and the same settings raced out
    assert made[0].counts == {"eigh": len(eigh), "cholesky": len(chol),
                              "raced out": len(acc["raced_out"])}
    # every eigendecomposition ran on the subsample: all rows are only ever factorized
    assert set(eigh) == {80} and set(chol) == {200}
    assert f"{len(eigh)} decompositions, {len(chol)} factorizations" in acc["summary"]
    raced = acc["raced_out"]
    assert raced and f"{len(raced)} raced out" in acc["summary"]
    assert {r["stage"] for r in raced} <= {"coarse grid", "coarse stage",
                                           "all rows, ridge settled"}
    assert set(acc["per_kernel"]) == set(tuning.AUTO_KERNELS)
    for name, entry in acc["per_kernel"].items():
        assert entry["rows"] == (200 if "raced_out" not in entry or any(
            c["kernel"] == name for c in acc["curves"]) else 80)
    # the chosen kernel reached all rows and its error is the best scored there
    assert acc["per_kernel"][acc["chosen"]["kernel"]]["rows"] == 200
    best_full = min(s for c in acc["curves"] for s in c["score"] if s is not None)
    assert acc["chosen"]["score"] == best_full


def test_kfold_fallback_races_on_a_subsample_and_factorizes_each_fold(monkeypatch):
    monkeypatch.setattr(validation, "EXACT_MAX_ROWS", 200)
    monkeypatch.setattr(validation, "FALLBACK_ROWS", 150)
    monkeypatch.setattr(race, "COARSE_ROWS", 60)
    chol = _spy(monkeypatch, scipy.linalg, "cho_factor")
    x, y = plant(300, seed=5)
    acc = _tune(x, y).account
    assert acc["error_method"] == "k-fold" and acc["coarse_rows"] == 60
    assert acc["factorizations"] == len(chol)
    assert set(chol) == {150 - 150 // validation.FALLBACK_FOLDS}  # one per fold, 4/5 of 150


def test_every_new_factorization_runs_under_the_openblas_guard(monkeypatch):
    # the guard (trainer.exact.fit.safe_lapack) lowered to every size: each Cholesky the
    # search runs must then see one BLAS thread
    monkeypatch.setattr(fit, "SINGLE_THREAD_FROM", 1)
    monkeypatch.setattr(race, "COARSE_ROWS", 40)
    threads: list[int] = []
    real = scipy.linalg.cho_factor

    def spy(a, *args, **kw):
        threads.append(_blas_threads())
        return real(a, *args, **kw)

    monkeypatch.setattr(scipy.linalg, "cho_factor", spy)
    x, y = plant(100, seed=6)
    with threadpool_limits(2, user_api="blas"):
        if _blas_threads() < 2:
            pytest.skip("BLAS runs one thread here: the guard would not be seen")
        _tune(x, y)
    assert threads and set(threads) == {1}


def _blas_threads() -> int:
    return max(p["num_threads"] for p in threadpool_info() if p["user_api"] == "blas")
