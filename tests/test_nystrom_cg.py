"""The Nyström solve by preconditioned CG: against the direct solve, scikit-learn and exact
KRR; the preconditioner's algebra and its effect on an ill-conditioned case; the job's
solver choice and record; the rank warning; a real Dask cluster."""

from __future__ import annotations

import json

import numpy as np
import pytest
from dask_helpers import dask_cluster

from service import load_model
from service.kernels import KernelSpec, kernel_matrix
from service.store import Store
from trainer.cli import main
from trainer.nystrom import cg
from trainer.nystrom.cg_rows import LocalRows
from trainer.nystrom.numerics import accumulate, pick_landmarks, ridge_path


def _function(x: np.ndarray) -> np.ndarray:
    """A smooth response of our own with two targets."""
    f = np.sin(2 * x[:, 0]) + x[:, 1] * x[:, 2] + 0.5 * np.cos(3 * x[:, 3])
    return np.column_stack([f, x[:, 0] * x[:, 3] - 0.3 * f])


def _standardized(n: int, seed: int = 0, noise: float = 0.1):
    rng = np.random.default_rng(seed)
    x = rng.uniform(-1, 1, (n, 4))
    y = _function(x) + noise * rng.standard_normal((n, 2))
    return (x - x.mean(0)) / x.std(0), y


def _cg(spec, landmarks, xs, y, ridges, dtype=np.float64, **kw) -> cg.CgFit:
    """CG on rows in memory; float64 tiles unless asked (the algorithm's checks run to
    tolerance need them: float32 tiles are checked on their own below)."""
    rows = LocalRows(spec, landmarks, xs, y, dtype=dtype)
    return cg.solve_nystrom_cg(spec, landmarks, rows, rows.mean, rows.count, ridges, **kw)


def _landmarks(xs, m, seed=0):
    return xs[pick_landmarks(xs, m, "uniform", np.random.default_rng(seed))]


def test_cg_equals_the_direct_nystrom_solve_for_several_ridges_and_targets():
    xs, y = _standardized(6000, seed=1)
    spec = KernelSpec("rbf", gamma=0.5)
    lm = _landmarks(xs, 200)
    path = ridge_path(spec, lm, accumulate(spec, lm, xs, y))
    ridges = [0.1, 3.0, 100.0]
    fit = _cg(spec, lm, xs, y, ridges, tol=1e-12, max_iter=500)
    assert fit.run.converged
    np.testing.assert_allclose(fit.intercept, path.intercept, rtol=1e-14)
    for ridge, beta in zip(ridges, fit.betas, strict=True):
        want = path.dual(ridge)
        np.testing.assert_allclose(beta, want, rtol=0, atol=1e-6 * np.abs(want).max())
        # the ridges solved side by side equal each solved alone
        alone = _cg(spec, lm, xs, y, [ridge], tol=1e-12, max_iter=500).betas[0]
        np.testing.assert_allclose(beta, alone, rtol=0, atol=1e-8 * np.abs(want).max())


def test_cg_equals_scikit_learn_nystroem_plus_ridge_on_the_same_landmarks():
    """Reference: scikit-learn 1.9.1 ``Nystroem`` (Φ = k(x, L)·K_mm^{-1/2}) and ``Ridge`` on
    the centered targets without intercept; with w = K_mm^{1/2}β its normal equations are
    ours, (K_nmᵀK_nm + λK_mm)β = K_nmᵀ(y − ȳ), with Ridge's alpha = our ridge."""
    from sklearn.kernel_approximation import Nystroem
    from sklearn.linear_model import Ridge

    xs, y = _standardized(3000, seed=2)
    spec, ridge = KernelSpec("rbf", gamma=0.4), 0.3
    lm = _landmarks(xs, 80)
    ny = Nystroem(kernel="rbf", gamma=0.4, n_components=80).fit(lm)
    reg = Ridge(alpha=ridge, fit_intercept=False).fit(ny.transform(xs), y - y.mean(0))
    q = xs[:200]
    want = reg.predict(ny.transform(q)) + y.mean(0)
    fit = _cg(spec, lm, xs, y, [ridge], tol=1e-12, max_iter=500)
    got = kernel_matrix(spec, q, lm) @ fit.betas[0] + fit.intercept
    np.testing.assert_allclose(got, want, rtol=1e-6, atol=1e-6 * np.abs(want).max())


def test_cg_with_every_row_a_landmark_equals_exact_krr():
    """Reference: scikit-learn 1.9.1 ``KernelRidge`` on the centered target. With L = X the
    system is (K² + λK)β = K(y − ȳ), so β = (K + λI)⁻¹(y − ȳ), KernelRidge's dual."""
    from sklearn.kernel_ridge import KernelRidge

    xs, y = _standardized(300, seed=3)
    ridge = 0.5
    kr = KernelRidge(alpha=ridge, kernel="rbf", gamma=0.3).fit(xs, y - y.mean(0))
    fit = _cg(KernelSpec("rbf", gamma=0.3), xs, xs, y, [ridge], tol=1e-12, max_iter=1000)
    q = _standardized(50, seed=4)[0]
    want = kr.predict(q) + y.mean(0)
    got = kernel_matrix(KernelSpec("rbf", gamma=0.3), q, xs) @ fit.betas[0] + fit.intercept
    np.testing.assert_allclose(got, want, rtol=1e-6, atol=1e-6 * np.abs(want).max())
    np.testing.assert_allclose(fit.betas[0], kr.dual_coef_, rtol=0,
                               atol=1e-6 * np.abs(kr.dual_coef_).max())


def test_preconditioner_inverts_its_approximation_of_the_normal_matrix():
    # Bᵀ((n/m)K_mm² + λK_mm)B = I: B = T⁻¹A⁻¹ is exactly FALKON's factorization
    xs, _y = _standardized(500, seed=5)
    spec = KernelSpec("rbf", gamma=0.5)
    lm = _landmarks(xs, 60)
    kmm = kernel_matrix(spec, lm)
    n, m = 10_000, 60
    p = cg.Preconditioner.build(kmm, n, [0.7, 20.0], targets=1)
    eye = np.eye(m)
    for i, lam in enumerate((0.7, 20.0)):
        b = np.column_stack([p.apply(np.column_stack([e] * 2))[:, i] for e in eye])
        approx = (n / m) * kmm @ kmm + lam * kmm
        np.testing.assert_allclose(b.T @ approx @ b, eye, atol=1e-6)


def test_ill_conditioned_case_converges_in_bounded_iterations_and_plain_cg_does_not():
    # a small ridge against 5,000 rows: H = K_nmᵀK_nm + λK_mm spans many orders of magnitude
    # (measured: 91 preconditioned iterations to 1e-8, 1,659 plain ones)
    xs, y = _standardized(5000, seed=6)
    spec, ridge = KernelSpec("rbf", gamma=1.0), 1e-3
    lm = _landmarks(xs, 300)
    tol = 1e-8
    pre = _cg(spec, lm, xs, y[:, :1], [ridge], tol=tol, max_iter=600)
    assert pre.run.converged and pre.run.iterations <= 150, pre.run.iterations
    assert pre.run.residuals.max() <= tol
    # plain CG on the same system: not there after four times as many iterations
    plain = _cg(spec, lm, xs, y[:, :1], [ridge], tol=tol, max_iter=4 * pre.run.iterations,
                precondition=False)
    assert not plain.run.converged and plain.run.residuals.max() > 10 * tol
    # the record states the rule and what happened
    rec = pre.run.record(tol, 400)
    assert rec["iterations"] == pre.run.iterations and rec["converged"] is True
    assert "preconditioned" in rec["stopping_rule"]


def test_rank_deficient_landmarks_still_give_the_direct_predictions():
    # repeated landmark rows make K_mm singular: the factor takes a jitter, H keeps K_mm
    xs, y = _standardized(4000, seed=7)
    spec, ridge = KernelSpec("rbf", gamma=0.5), 1.0
    lm = np.concatenate([_landmarks(xs, 100), _landmarks(xs, 100)[:30]])
    path = ridge_path(spec, lm, accumulate(spec, lm, xs, y))
    fit = _cg(spec, lm, xs, y, [ridge], tol=1e-10, max_iter=500)
    assert fit.jitter > 0
    q = xs[:300]
    want = kernel_matrix(spec, q, lm) @ path.dual(ridge)
    got = kernel_matrix(spec, q, lm) @ fit.betas[0]
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-6 * np.abs(want).max())


def _csv(tmp_path, n, seed=0):
    import pyarrow as pa
    import pyarrow.csv as pcsv

    rng = np.random.default_rng(seed)
    x = rng.uniform(-1, 1, (n, 4))
    y = _function(x)[:, 0] + 0.1 * rng.standard_normal(n)
    cols = {f"x{i}": x[:, i] for i in range(4)}
    cols["y"] = y
    path = tmp_path / "rows.csv"
    pcsv.write_csv(pa.table(cols), path)
    return path


def _train(store, path, *extra, name="m"):
    return main(["train", str(path), "--target", "y", "--name", name, "--store", str(store),
                 "--no-report", "--quiet", "--json", *extra])


def test_cli_cg_fit_records_the_solve_and_serves_like_the_direct_one(tmp_path, capsys):
    path = _csv(tmp_path, 6000, seed=8)
    store = tmp_path / "st"
    common = ["--method", "nystrom", "--landmarks", "150", "--gamma", "0.4", "--ridge", "1"]
    assert _train(store, path, *common, "--solver", "direct", name="direct") == 0
    # solved to the residual rule (the validation rule is checked on its own below)
    assert _train(store, path, *common, "--solver", "cg", "--cg-stop", "residual",
                  name="cg") == 0
    summary = json.loads(capsys.readouterr().out.split("\n}\n")[1] + "\n}")
    assert "cg solve (asked for with --solver cg)" in summary["method"]
    a, b = load_model(store, "direct", 1), load_model(store, "cg", 1)
    solve = b.manifest["training"]["solve"]
    assert solve["solver"] == "cg" and solve["converged"] is True
    assert 0 < solve["iterations"] <= solve["max_iterations"]
    assert solve["final_residual"] <= solve["tolerance"] and solve["seconds"] >= 0
    assert a.manifest["training"]["solve"]["solver"] == "direct"
    q = np.random.default_rng(9).uniform(-1, 1, (100, 4))
    np.testing.assert_allclose(b.predict(q), a.predict(q), rtol=0,
                               atol=1e-5 * np.abs(a.predict(q)).max())
    assert main(["inspect", "cg", "--store", str(store)]) == 0
    assert f"cg, {solve['iterations']} iterations" in capsys.readouterr().out


def test_solver_choice_is_checked_and_explained(tmp_path, capsys):
    from trainer.nystrom.cg_fit import CG_FROM_LANDMARKS, choose_solver

    assert choose_solver("auto", CG_FROM_LANDMARKS)[0] == "cg"
    assert choose_solver("auto", CG_FROM_LANDMARKS - 1)[0] == "direct"
    path = _csv(tmp_path, 300)
    assert _train(tmp_path / "st", path, "--method", "exact", "--solver", "cg") == 2
    assert "--solver cg solves the Nyström system" in capsys.readouterr().err


def test_a_width_that_collapses_the_landmark_rank_is_said(tmp_path, capsys):
    path = _csv(tmp_path, 3000, seed=10)
    store = tmp_path / "st"
    common = ["--method", "nystrom", "--landmarks", "200", "--ridge", "1e-3"]
    assert main(["train", str(path), "--target", "y", "--name", "wide", "--store", str(store),
                 "--no-report", "--json", *common, "--gamma", "1e-6"]) == 0
    err = capsys.readouterr().err
    assert "warning: the kernel rbf(gamma=1e-06) keeps rank" in err
    check = Store(store).read_manifest("wide", 1)["training"]["landmarks"]["rank_check"]
    assert check["fraction"] < check["threshold"] and check["warning"]
    assert _train(store, path, *common, "--gamma", "0.5", name="fine") == 0
    assert "keeps rank" not in capsys.readouterr().err
    check = Store(store).read_manifest("fine", 1)["training"]["landmarks"]["rank_check"]
    assert check["warning"] is None and check["rank"] == check["of"] == 200


@pytest.mark.slow
def test_dask_cluster_cg_fit_equals_the_local_cg_fit(tmp_path, capsys, monkeypatch):
    pytest.importorskip("distributed")
    monkeypatch.setenv("KRIDGE_BLOCK_BYTES", str(64 << 10))  # several blocks
    path = _csv(tmp_path, 8000, seed=11)
    store = tmp_path / "st"
    # the ridge is tuned, so both fits start from the sample's fit (summed on the workers
    # in the right-hand side's pass)
    common = ["--method", "nystrom", "--solver", "cg", "--landmarks", "120", "--gamma", "0.4"]
    with dask_cluster(tmp_path) as address:
        assert _train(store, path, *common, name="local") == 0
        assert _train(store, path, *common, "--cluster", address, name="remote") == 0
    capsys.readouterr()
    st = Store(store)
    a = st.load_arrays("local", 1, st.read_manifest("local", 1))
    b = st.load_arrays("remote", 1, st.read_manifest("remote", 1))
    assert np.array_equal(a["x_train"], b["x_train"])
    np.testing.assert_allclose(b["dual"], a["dual"], rtol=0,
                               atol=1e-9 * np.abs(a["dual"]).max())
    man = st.read_manifest("remote", 1)["training"]
    assert man["cluster"] is True and man["solve"]["solver"] == "cg"
    assert man["solve"]["start"] == st.read_manifest("local", 1)["training"]["solve"]["start"]
    assert man["solve"]["start"]["from"] == "sample fit"


def test_warm_start_reaches_the_same_solution_and_is_scored_as_iteration_zero():
    from trainer.nystrom.cg_start import sample_start
    from trainer.nystrom.tune import SampleProblem

    xs, y = _standardized(6000, seed=23)
    spec, ridges = KernelSpec("rbf", gamma=0.3), [1e-3, 0.1]
    lm = _landmarks(xs[:5000], 300)
    tr, ytr, val = xs[:5000], y[:5000], (xs[5000:], y[5000:])
    sample = SampleProblem(tr[:1500], ytr[:1500], tr[1500:2000], ytr[1500:2000], lm,
                           np.ones(2), None)
    beta0, info = sample_start(spec, lm, sample, ridges[0], seed=3)
    assert info["rows"] == 1500 and info["landmarks"] == 300 and beta0.shape == (300, 2)
    cold = _cg(spec, lm, tr, ytr, ridges, tol=1e-11, max_iter=600)
    warm = _cg(spec, lm, tr, ytr, ridges, tol=1e-11, max_iter=600, start=beta0)
    assert cold.run.converged and warm.run.converged
    for a, b in zip(cold.betas, warm.betas, strict=True):
        np.testing.assert_allclose(b, a, rtol=0, atol=1e-6 * np.abs(a).max())
    # the start is nearer the solution than zero is: its residual is below ‖Bᵀb‖
    assert warm.run.history[0] < 0.5 and warm.run.iterations <= cold.run.iterations
    # the direct solution as start: nothing left to do
    path = ridge_path(spec, lm, accumulate(spec, lm, tr, ytr))
    exact = _cg(spec, lm, tr, ytr, [ridges[0]], tol=1e-6, start=path.dual(ridges[0]))
    assert exact.run.iterations == 0
    np.testing.assert_allclose(exact.betas[0], path.dual(ridges[0]), rtol=0,
                               atol=1e-9 * np.abs(path.dual(ridges[0])).max())
    # the validation rule scores the start as iteration 0 and keeps the best of all
    fit = _cg(spec, lm, tr, ytr, ridges, tol=1e-11, max_iter=600, check=val, start=beta0)
    mon = fit.run.monitor
    kv = kernel_matrix(spec, val[0], lm)
    start_rmse = np.sqrt(np.mean((kv @ beta0 + fit.intercept - val[1]) ** 2, axis=0))
    np.testing.assert_allclose(mon.start_rmse[:2], start_rmse, rtol=1e-9)
    assert (np.asarray(mon.record()["best_rmse"]) <= np.tile(start_rmse, 2) + 1e-15).all()


def test_width_steps_use_a_bounded_landmark_subset_above_the_cap(monkeypatch):
    """Above FINE_MAX_LANDMARKS the second stage of the width search decides on a uniform
    subset of that many landmarks (the CG solver's m would cost minutes per step)."""
    from trainer.nystrom import tune
    from trainer.plan import Parameters

    monkeypatch.setattr(tune, "COARSE_LANDMARKS", 30)
    monkeypatch.setattr(tune, "FINE_MAX_LANDMARKS", 60)
    seen = []
    real = tune._evaluate
    monkeypatch.setattr(tune, "_evaluate", lambda p, s, r=None: (
        seen.append(p.landmarks.shape[0]), real(p, s, r))[1])
    xs, y = _standardized(2400, seed=13)
    problem = tune.sample_problem(xs, y[:, :1], None, xs[:120], None,
                                  np.random.default_rng(0))
    _spec, _ridge, info = tune.tune_on_sample(Parameters("rbf"), 0, problem, lambda *_: None,
                                              np.random.default_rng(1))
    assert "a uniform subset of 60 of the 120" in info["method"]
    assert set(seen) == {30, 60}  # never all 120


def test_float32_kernel_values_stay_close_to_the_float64_iteration():
    """The float32 tile option (float32 values, float64 products) against float64 tiles.

    Run to the residual rule at ridge 1: β within 3e-2 of its largest entry and predictions
    within 5e-4 of their largest (measured 9e-3 and 1.1e-4: float32 values perturb the
    system by ~1e-7 and β's ill-determined directions move, the predictions hardly). Twenty-
    five iterations at a tiny ridge (a tuned one's scale): predictions within 5e-3 of their
    spread and the RMSE against the noiseless response within 1e-3 of itself (measured 1.8e-3
    and 1.2e-4). With float32 products as well CG diverges (bench/cg_bench.py --float32-sums).
    """
    xs, y = _standardized(4800, seed=14)
    q = _standardized(2000, seed=15)[0]
    spec = KernelSpec("rbf", gamma=0.4)
    lm = _landmarks(xs, 150)
    kq = kernel_matrix(spec, q, lm)
    runs = [_cg(spec, lm, xs, y[:, :1], [1.0], dtype=dt, tol=1e-10, max_iter=500)
            for dt in (np.float64, np.float32)]
    (b64, b32), (p64, p32) = ([r.betas[0] for r in runs],
                              [kq @ r.betas[0] for r in runs])
    assert np.abs(b32 - b64).max() <= 3e-2 * np.abs(b64).max()
    assert np.abs(p32 - p64).max() <= 5e-4 * np.abs(p64).max()

    xs, y = _standardized(8000, seed=14)
    rng = np.random.default_rng(15)
    x0 = np.random.default_rng(14).uniform(-1, 1, (8000, 4))  # _standardized's draw
    xq = rng.uniform(-1, 1, (2000, 4))
    f_q = _function(xq)[:, :1]
    spec = KernelSpec("rbf", gamma=0.3)
    lm = _landmarks(xs, 400)
    kq = kernel_matrix(spec, (xq - x0.mean(0)) / x0.std(0), lm)
    runs = [_cg(spec, lm, xs, y[:, :1], [1e-4], dtype=dt, tol=0.0, max_iter=25)
            for dt in (np.float64, np.float32)]
    assert all(r.run.iterations == 25 and r.run.stopped_by == ["cap"] for r in runs)
    p64, p32 = (kq @ r.betas[0] + r.intercept for r in runs)
    assert np.abs(p32 - p64).max() <= 5e-3 * np.ptp(p64)
    r64, r32 = (np.sqrt(np.mean((p - f_q) ** 2)) for p in (p64, p32))
    assert abs(r32 - r64) <= 1e-3 * r64
    assert "float32 kernel values" in LocalRows(spec, lm, xs, y, dtype=np.float32).tiles
    assert LocalRows(spec, lm, xs, y).kern.dtype == cg.TILE_DTYPE == np.float64


def test_validation_rule_stops_early_keeps_the_best_iterate_and_says_why():
    from trainer.nystrom import cg_stop

    xs, y = _standardized(5000, seed=16)
    spec, ridge = KernelSpec("rbf", gamma=0.3), 1e-5
    lm = _landmarks(xs[:4000], 200)
    tr, ytr, val = xs[:4000], y[:4000, :1], (xs[4000:], y[4000:, :1])
    fit = _cg(spec, lm, tr, ytr, [ridge], tol=1e-10, max_iter=300, check=val)
    run, mon = fit.run, fit.run.monitor
    assert run.stopped_by == ["validation"] and run.iterations < 300
    best, stop = int(mon.best_iteration[0]), run.column_iterations[0]
    hist = np.array(mon.history)[:, 0]
    assert len(hist) == stop and hist[best - 1] == hist.min()
    # stalled: the last PATIENCE iterations gained less than MIN_GAIN on the MSE before them
    mse = hist**2
    cut = stop - cg_stop.PATIENCE
    assert mse[cut:].min() > mse[:cut].min() * (1 - cg_stop.MIN_GAIN)
    # the iterate kept is the one of the best iteration: the same solve stopped there
    again = _cg(spec, lm, tr, ytr, [ridge], tol=0.0, max_iter=best)
    np.testing.assert_allclose(fit.betas[0], again.betas[0], rtol=0,
                               atol=1e-12 * np.abs(again.betas[0]).max())
    kv = kernel_matrix(spec, val[0], lm)
    got = np.sqrt(np.mean((kv @ fit.betas[0] + fit.intercept - val[1]) ** 2))
    assert abs(got - hist.min()) <= 1e-9
    rec = run.record(1e-10, 300)
    assert "validation MSE on 1000 validation rows" in rec["stopping_rule"]
    assert rec["validation_check"]["best_iteration"] == [best]
    assert rec["stopped_by"] == ["validation"] and rec["converged"] is False


def test_cli_cg_fit_stops_by_the_validation_rule_and_records_it(tmp_path, capsys):
    path = _csv(tmp_path, 6000, seed=17)
    store = tmp_path / "st"
    assert _train(store, path, "--method", "nystrom", "--landmarks", "300", "--gamma", "0.3",
                  "--ridge", "1e-5", "--solver", "cg", name="v") == 0
    solve = Store(store).read_manifest("v", 1)["training"]["solve"]
    assert solve["stopped_by"] == ["validation"] and solve["iterations"] < 100
    check = solve["validation_check"]
    assert check["rows"] > 0 and len(check["rmse_by_iteration"]) == solve["iterations"]
    assert solve["kernel_tiles"] == "float64 kernel tiles and products"
    assert "validation MSE on" in solve["stopping_rule"]
    out = capsys.readouterr()
    assert "warning" not in out.err  # not the cap: no warning
    assert (f"stopped by the validation rule after {solve['iterations']} iterations"
            in json.loads(out.out)["method"])
    with pytest.raises(SystemExit) as bad:
        _train(store, path, "--method", "nystrom", "--cg-stop", "sideways", name="bad")
    assert bad.value.code == 2 and "--cg-stop" in capsys.readouterr().err


def _curve(gamma: float, score: float):
    from trainer.exact.candidates import Curve

    return Curve(KernelSpec("rbf", gamma=gamma), np.array([1e-3]), np.array([score]),
                 np.array([[np.sqrt(score)]]))


def test_rank_guard_prefers_a_width_that_keeps_the_landmark_rank_and_says_so():
    """A synthetic case of our own: the widest kernel (rank 3 of 300) scores best by a hair;
    a width that keeps the rank scores within the tolerance and is chosen instead."""
    from trainer.nystrom import rank

    lm = _landmarks(_standardized(3000, seed=18)[0], 300)
    wide, fine, narrow = _curve(1e-6, 0.100), _curve(0.3, 0.101), _curve(3.0, 0.2)
    assert rank.landmark_rank(wide.spec, lm, np.random.default_rng(0))[0] < 30
    scored = []
    kept, account = rank.rank_guard(wide, [wide, fine, narrow], lm, 0,
                                    lambda s: scored.append(s) or _curve(s.gamma, 1.0), 2.0)
    assert kept is fine and not scored
    assert account["kept"] == fine.spec.describe()
    assert account["collapsed"]["fraction"] < rank.RANK_WARN_FRACTION
    assert "so it was chosen instead" in account["summary"]
    # outside the tolerance the collapsed width stays, and the account says that too
    worse = _curve(0.3, 0.100 * (1 + 2 * rank.RANK_PREFER_TOLERANCE))
    kept, account = rank.rank_guard(wide, [wide, worse], lm, 0,
                                    lambda s: scored.append(s) or _curve(s.gamma, 1.0), 2.0)
    assert kept is wide and not scored and "so it was kept" in account["summary"]
    # every searched width collapsed: narrower widths are scored until one keeps the rank
    kept, account = rank.rank_guard(wide, [wide, _curve(2e-6, 0.1005)], lm, 0,
                                    lambda s: scored.append(s) or _curve(s.gamma, 0.1001),
                                    1e3)
    assert scored and kept.spec.gamma == scored[-1].gamma
    assert rank.landmark_rank(kept.spec, lm, np.random.default_rng(0))[0] >= 30
    # a width that keeps the rank is left alone
    assert rank.rank_guard(fine, [wide, fine], lm, 0, None, 2.0) == (fine, None)


def test_cg_max_iter_caps_the_solve_warns_and_is_checked(tmp_path, capsys):
    from trainer.cli_nystrom import SHOWN_CG_CAP

    assert SHOWN_CG_CAP == cg.CG_MAX_ITER  # the help states the cap the solver applies
    path = _csv(tmp_path, 3000, seed=19)
    store = tmp_path / "st"
    assert _train(store, path, "--method", "nystrom", "--landmarks", "200", "--gamma", "0.3",
                  "--ridge", "1e-6", "--solver", "cg", "--cg-stop", "residual",
                  "--cg-max-iter", "3", name="capped") == 0
    solve = Store(store).read_manifest("capped", 1)["training"]["solve"]
    assert solve["iterations"] == 3 and solve["max_iterations"] == 3
    assert solve["stopped_by"] == ["cap"]
    err = capsys.readouterr().err
    assert "cap of 3 iterations" in err and "--cg-max-iter" in err
    assert _train(store, path, "--method", "nystrom", "--cg-max-iter", "0", name="bad") == 2
    assert "--cg-max-iter must be at least 1" in capsys.readouterr().err
    with pytest.raises(SystemExit):
        main(["train", "--help"])
    assert f"(default {SHOWN_CG_CAP})" in " ".join(capsys.readouterr().out.split())
