"""Nyström kernel ridge regression: the numerics against exact KRR and scikit-learn, the
streamed fit, a real Dask cluster, memory, and the bundle served like any other."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from dask_helpers import dask_cluster

from service import load_model
from service.kernels import KernelSpec, kernel_matrix
from service.store import Store
from trainer.cli import main
from trainer.exact.fit import fit_exact
from trainer.nystrom.numerics import (
    LandmarkKernel,
    accumulate,
    default_landmarks,
    fit_in_memory,
    memory_landmarks,
    pick_landmarks,
)
from trainer.read.source import Source


def _function(x: np.ndarray) -> np.ndarray:
    """A smooth synthetic response of our own (the demo's numbers are not needed here)."""
    return (np.sin(2 * x[:, 0]) + x[:, 1] * x[:, 2] + 0.5 * np.cos(3 * x[:, 3]))[:, None]


def _data(n: int, d: int = 4, noise: float = 0.1, seed: int = 0):
    rng = np.random.default_rng(seed)
    x = rng.uniform(-1, 1, (n, d))
    return x, _function(x) + noise * rng.standard_normal((n, 1))


def _write_csv(path: Path, x: np.ndarray, y: np.ndarray) -> Path:
    import pyarrow as pa
    import pyarrow.csv as pcsv

    cols = {f"x{i}": x[:, i] for i in range(x.shape[1])}
    cols["y"] = y[:, 0]
    pcsv.write_csv(pa.table(cols), path)
    return path


def test_all_rows_as_landmarks_equals_exact_krr():
    # with L = X: (K² + λK)β = Ky gives Kβ = K(K + λI)⁻¹y, exact KRR's fit (Williams & Seeger
    # 2001); the exact fit is itself checked against scikit-learn KernelRidge elsewhere
    x, y = _data(300)
    spec, ridge = KernelSpec("rbf", gamma=0.3), 0.5
    exact = fit_exact(x, y, spec, ridge)
    xs = exact.x_s
    beta, ybar = fit_in_memory(spec, xs, xs, y, ridge)
    q = exact.scaler(_data(40, seed=1)[0])
    ours = kernel_matrix(spec, q, xs) @ beta + ybar
    want = kernel_matrix(spec, q, xs) @ exact.dual + exact.intercept
    np.testing.assert_allclose(ours, want, rtol=1e-8, atol=1e-8 * np.abs(want).max())


def test_equals_scikit_learn_nystroem_plus_ridge_on_the_same_landmarks():
    """Reference: scikit-learn 1.9 ``Nystroem`` (features Φ = k(x, L)·K_mm^{-1/2}) followed by
    ``Ridge``. Mapping of the penalties: with Φ = K_nm K_mm^{-1/2}, the ridge problem
    min ‖y_c − Φw‖² + λ'‖w‖² has (ΦᵀΦ + λ'I)w = Φᵀy_c; substituting w = K_mm^{1/2}β gives
    (K_nmᵀK_nm + λ'K_mm)β = K_nmᵀy_c, our system: λ' = ridge exactly. Ridge is fitted on the
    centered target without an intercept, as our ȳ is the training mean."""
    from sklearn.kernel_approximation import Nystroem
    from sklearn.linear_model import Ridge

    x, y = _data(800, seed=2)
    xs = (x - x.mean(0)) / x.std(0)
    spec, ridge = KernelSpec("rbf", gamma=0.4), 0.3
    landmarks = xs[pick_landmarks(xs, 60, "uniform", np.random.default_rng(0))]
    # n_components equal to the rows given: every one of them becomes a component
    ny = Nystroem(kernel="rbf", gamma=0.4, n_components=60).fit(landmarks)
    reg = Ridge(alpha=ridge, fit_intercept=False).fit(ny.transform(xs), y - y.mean(0))
    q = xs[:50]
    want = reg.predict(ny.transform(q)).reshape(-1, 1) + y.mean(0)
    beta, ybar = fit_in_memory(spec, landmarks, xs, y, ridge)
    np.testing.assert_allclose(kernel_matrix(spec, q, landmarks) @ beta + ybar, want,
                               rtol=1e-9, atol=1e-9)


def test_held_out_error_falls_as_landmarks_grow():
    x, y = _data(4000, noise=0.05, seed=3)
    xt, yt = _data(2000, noise=0.0, seed=4)
    mean, sd = x.mean(0), x.std(0)
    xs, qt = (x - mean) / sd, (xt - mean) / sd
    spec = KernelSpec("rbf", gamma=0.5)
    errors = []
    for m in (10, 40, 160, 640):
        lm = xs[pick_landmarks(xs, m, "uniform", np.random.default_rng(m))]
        beta, ybar = fit_in_memory(spec, lm, xs, y, 1e-3)
        errors.append(float(np.sqrt(np.mean((kernel_matrix(spec, qt, lm) @ beta + ybar
                                             - yt) ** 2))))
    assert all(a > b for a, b in zip(errors, errors[1:], strict=False)), errors
    assert errors[-1] < 0.2 * errors[0]


def test_chunked_sums_equal_the_one_shot_product():
    x, y = _data(1000, seed=5)
    spec = KernelSpec("laplacian", gamma=0.7)
    lm = x[:70]
    knm = kernel_matrix(spec, x, lm)
    one = accumulate(spec, lm, x, y, sub_rows=10_000)
    parts = accumulate(spec, lm, x[:333], y[:333], sub_rows=50)
    accumulate(spec, lm, x[333:], y[333:], sums=parts, sub_rows=97)
    for s in (one, parts):
        np.testing.assert_allclose(s.full_gram(), knm.T @ knm, rtol=1e-12, atol=1e-10)
        np.testing.assert_allclose(s.ky, knm.T @ y, rtol=1e-12, atol=1e-11)
        np.testing.assert_allclose(s.k_sum, knm.sum(0), rtol=1e-12)
        assert s.count == 1000


@pytest.mark.parametrize("spec", [
    KernelSpec("rbf", gamma=0.3), KernelSpec("matern32", gamma=0.2),
    KernelSpec("matern52", gamma=0.5), KernelSpec("laplacian", gamma=0.4),
    KernelSpec("linear"), KernelSpec("polynomial", gamma=0.5, degree=3.0, coef0=1.0),
    KernelSpec("sigmoid", gamma=0.1, coef0=0.5)], ids=lambda s: s.name)
def test_prepared_landmark_kernel_equals_the_plain_kernel_matrix(spec):
    # the augmented product sums the same d + 2 terms in another order: rounding only
    x, _ = _data(300, d=5, seed=12)
    lm = x[:40]
    kern = LandmarkKernel(spec, lm)
    buf = np.full((128, 40), np.nan)
    want = kernel_matrix(spec, x, lm)
    for i in range(0, 300, 128):  # the last block is shorter than the buffer
        got = kern.block(np.ascontiguousarray(x[i:i + 128]), buf, np.empty((128, 40)))
        np.testing.assert_allclose(got, want[i:i + 128], rtol=1e-12, atol=1e-13)


def test_two_stage_width_search_decides_with_all_landmarks(monkeypatch):
    """The first stage searches widths on a landmark subset; the width and ridge returned
    are those that score best with every landmark, and their score is that of a fresh
    evaluation with all of them."""
    from trainer.nystrom import tune as nystrom_tune
    from trainer.plan import Parameters

    monkeypatch.setattr(nystrom_tune, "COARSE_LANDMARKS", 30)
    x, y = _data(2400, seed=13)
    xs = (x - x.mean(0)) / x.std(0)
    lm = xs[:120]
    problem = nystrom_tune.sample_problem(xs, y, None, lm, None, np.random.default_rng(0))
    spec, ridge, info = nystrom_tune.tune_on_sample(Parameters("rbf"), 0, problem,
                                                    lambda *_: None, np.random.default_rng(1))
    assert "subset of 30 landmarks" in info["method"]
    assert len(info["coarse_curves"]) >= 8 and len(info["curves"]) >= 3
    fresh = nystrom_tune._evaluate(problem, spec)  # all 120 landmarks
    assert fresh.best_score == pytest.approx(info["chosen"]["score"], rel=1e-9)
    assert ridge == fresh.ridges[fresh.best]
    fine = [c["params"]["gamma"] for c in info["curves"]]
    assert spec.gamma in fine and all(
        c["score"] is not None for c in info["curves"])


def test_kmeans_plus_plus_spreads_landmarks():
    # two clusters, 95 % of the rows in one: D² sampling reaches the small cluster
    rng = np.random.default_rng(6)
    x = np.vstack([rng.normal(0, 0.1, (950, 2)), rng.normal(5, 0.1, (50, 2))])
    lm = pick_landmarks(x, 4, "kmeans++", np.random.default_rng(0))
    assert (x[lm, 0] > 2.5).any() and (x[lm, 0] < 2.5).any()
    assert default_landmarks(1_000_000) == 2500 and default_landmarks(300) == 300
    assert default_landmarks(200_000) == 2000  # the floor (4·√n is 1,789)
    assert default_landmarks(300_000) == 2191  # 4·√n
    assert default_landmarks(1_000_000, 4 * 2**30) == memory_landmarks(4 * 2**30) == 1831


def test_streamed_standardization_equals_numpy(tmp_path):
    # reference: numpy 2.4 mean and std (ddof=0) over the whole array at once
    from trainer.nystrom.scan import scan

    x, y = _data(5000, d=4, seed=7)
    x = x[:, :3]
    x[:, 1] = x[:, 1] * 1e4 + 3e6  # a large offset: the merged moments must not cancel
    path = _write_csv(tmp_path / "s.csv", x, y)
    sc = scan(Source(path), ["x0", "x1", "x2"], ["y"], None, False, 0, 4096,
              lambda items, _: items)
    assert len(sc.blocks) > 20  # really in many blocks
    np.testing.assert_allclose(sc.mean, x.mean(0), rtol=1e-14)
    np.testing.assert_allclose(np.sqrt(sc.m2 / sc.count), x.std(0), rtol=1e-10)
    assert np.array_equal(sc.lo, x.min(0)) and np.array_equal(sc.hi, x.max(0))


def _train(store, path, *extra, name="big"):
    args = ["train", str(path), "--target", "y", "--name", name, "--store", str(store),
            "--no-report", "--quiet", "--json", *extra]
    return main(args)


@pytest.mark.slow
def test_streamed_fit_publishes_a_bundle_served_like_any_other(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("KRIDGE_BLOCK_BYTES", str(64 << 10))  # many blocks
    x, y = _data(20_000, seed=8)
    path = _write_csv(tmp_path / "big.csv", x, y)
    store = tmp_path / "st"
    assert _train(store, path, "--landmarks", "300") == 0  # auto: 20,000 rows → Nyström
    summary = json.loads(capsys.readouterr().out)
    assert summary["method"].startswith("nystrom with 300 uniform landmarks")
    model = load_model(store, "big", 1)
    man = model.manifest
    assert man["training"]["method"] == "nystrom"
    assert man["training"]["landmarks"]["count"] == 300
    assert model.engine.n == 300  # the landmarks are the bundle's training rows
    parts = man["training"]["parts"]
    assert sum(parts.values()) == 20_000 and parts["calibrate"] > 0
    # noise 0.1: the held-out error sits near the noise floor
    assert man["metrics"]["holdout"]["y"]["rmse"] < 0.13
    # split-conformal on the unseen calibration part: holdout coverage near nominal
    for level in man["intervals"]["holdout_coverage"]:
        assert abs(level["empirical"][0] - level["nominal"]) < 0.03
    # the same prediction as the formula: f(x) = k(s(x), L)·β + ȳ
    q = x[:5]
    st = Store(store)
    arrays = st.load_arrays("big", 1, man)
    spec = KernelSpec.from_params(man["kernel"]["name"], man["kernel"]["params"])
    qs = (q - np.array(man["standardization"]["mean"])) / np.array(
        man["standardization"]["scale"])
    want = kernel_matrix(spec, qs, np.asarray(arrays["x_train"])) @ arrays["dual"] + np.array(
        man["intercept"])
    np.testing.assert_allclose(model.predict(q), want[:, 0], rtol=1e-10)
    assert main(["inspect", "big", "--store", str(store)]) == 0
    shown = capsys.readouterr().out
    assert "nystrom" in shown
    lm = man["training"]["landmarks"]
    assert [line.split(None, 1)[1] for line in shown.splitlines()
            if line.startswith("landmarks ")] == [
        f"{lm['count']} ({lm['scheme']}; {lm['how_many']})"]


def test_method_choice_is_explained(tmp_path, capsys):
    x, y = _data(200, seed=9)
    path = _write_csv(tmp_path / "small.csv", x, y)
    store = tmp_path / "st"
    assert _train(store, path, "--gamma", "0.3", "--ridge", "0.1") == 0
    assert "exact (200 rows with a target ≤ 15000" in json.loads(capsys.readouterr().out)[
        "method"]
    assert _train(store, path, "--method", "nystrom", "--landmarks", "50", "--gamma", "0.3",
                  "--ridge", "0.1") == 0
    assert json.loads(capsys.readouterr().out)["method"].startswith("nystrom with 50")
    assert _train(store, path, "--method", "exact", "--cluster", "tcp://127.0.0.1:1") == 2
    assert "--cluster runs the Nyström accumulation" in capsys.readouterr().err


# A first fit on the file's first 2,000 rows runs untraced, so that the modules the job
# imports on first use (pyarrow, and pandas where it is installed) are not counted as the
# fit's memory: the figure is what the fit itself holds.
_MEMORY_PROBE = r"""
import json, sys, tracemalloc
from pathlib import Path
from trainer.job import TrainOptions, train

def fit(data, name):
    train(TrainOptions(data=data, targets=["y"], name=name, store=sys.argv[2],
                       method="nystrom", landmarks=int(sys.argv[3]), gamma=0.5, ridge=1e-3,
                       report=False, quiet=True), log=lambda *a: None)

head = Path(sys.argv[2] + "-head.csv")
with open(sys.argv[1]) as f:
    head.write_text("".join(line for _, line in zip(range(2001), f)))
fit(str(head), "warm")
tracemalloc.start()
fit(sys.argv[1], "mem")
print(json.dumps(tracemalloc.get_traced_memory()[1]))
"""


@pytest.mark.slow
def test_streamed_fit_memory_is_bounded_by_landmarks_and_block(tmp_path):
    n, m = 120_000, 200
    x, y = _data(n, seed=10)
    path = _write_csv(tmp_path / "m.csv", x, y)
    env = dict(os.environ, KRIDGE_BLOCK_BYTES=str(1 << 20))
    out = subprocess.run([sys.executable, "-c", _MEMORY_PROBE, str(path), str(tmp_path / "st"),
                          str(m)], capture_output=True, text=True, env=env, timeout=300,
                         cwd=Path(__file__).resolve().parents[1])
    assert out.returncode == 0, out.stderr
    peak = json.loads(out.stdout.strip().splitlines()[-1])
    whole_knm = n * m * 8  # the n × m kernel matrix a one-shot fit would hold: 192 MB
    # bound: the kept parts and the 50,000-row sample (≈ 25 MB), one block's kernel and
    # parsed numbers (≈ 10 MB), m² work matrices: far below n·m
    assert peak < 64 * 2**20, peak
    assert peak < whole_knm / 3


@pytest.mark.slow
def test_dask_cluster_fit_equals_the_local_fit(tmp_path, capsys):
    """A real scheduler and two workers on localhost (the ``dask`` command of
    dask.distributed); the cluster's sums, added in block order, equal the local ones."""
    pytest.importorskip("distributed")
    with dask_cluster(tmp_path) as address:
        x, y = _data(20_000, seed=11)
        path = _write_csv(tmp_path / "c.csv", x, y)
        store = tmp_path / "st"
        common = ["--method", "nystrom", "--landmarks", "150", "--gamma", "0.4", "--ridge",
                  "0.01"]
        os.environ["KRIDGE_BLOCK_BYTES"] = str(128 << 10)
        try:
            assert _train(store, path, *common, name="local") == 0
            assert _train(store, path, *common, "--cluster", address, name="remote") == 0
        finally:
            del os.environ["KRIDGE_BLOCK_BYTES"]
        capsys.readouterr()
        st = Store(store)
        a = st.load_arrays("local", 1, st.read_manifest("local", 1))
        b = st.load_arrays("remote", 1, st.read_manifest("remote", 1))
        assert np.array_equal(a["x_train"], b["x_train"])
        np.testing.assert_allclose(b["dual"], a["dual"], rtol=1e-8,
                                   atol=1e-8 * np.abs(a["dual"]).max())
        assert st.read_manifest("remote", 1)["training"]["cluster"] is True
