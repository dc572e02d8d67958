"""The model's row path (raw rows → prediction and envelope) against independent references.

References:
- predictions: scikit-learn ``sklearn.kernel_ridge.KernelRidge.predict`` (kernels linear,
  polynomial, rbf, laplacian, sigmoid) and ``sklearn.gaussian_process.kernels.Matern`` (Matérn),
  given the same standardized training rows and dual coefficients; the version in use is
  named in each failure message (written against scikit-learn 1.9);
- novelty: the k-th nearest reference distance by the expansion the envelope has always used,
  √max(‖q‖² − 2qᵀr + ‖r‖², 0), written out here with plain numpy, divided by τ.
"""

from __future__ import annotations

import numpy as np
import pytest

from service import Model
from service.engine import Engine
from service.envelope import rows_within
from service.kernels import KERNEL_NAMES, default_spec

sklearn = pytest.importorskip("sklearn")

D = 5
N_TRAIN = 1_500
#: 1 and 7 take the single-tile and the lean path, 50 the lean path over several laplacian
#: row tiles, 259 ends in a partial row tile, 1,000 the parallel path
BATCHES = (1, 7, 50, 259, 1_000)
FEATURES = [f"f{j}" for j in range(D)]
TARGETS = ["y1", "y2", "y3"]
MEAN = np.array([20.0, -3.0, 0.5, 1e3, 0.0])
SCALE = np.array([4.0, 0.25, 1.0, 50.0, 2.0])
TAU = 1.7


def _spec(name: str):
    gamma = 0.3 if name in ("rbf", "laplacian", "matern32", "matern52") else 0.1
    return default_spec(name, D, gamma=gamma, coef0=0.5, degree=3)


def _model(name: str, x_s, dual, reference, k: int = 5, precision: str = "float64") -> Model:
    spec = _spec(name)
    manifest = {
        "model": "probe",
        "version": 1,
        "features": FEATURES,
        "targets": TARGETS[: dual.shape[1]],
        "standardization": {"mean": MEAN.tolist(), "scale": SCALE.tolist()},
        "intercept": np.linspace(1.0, 3.0, dual.shape[1]).tolist(),
        "kernel": {"name": name, "params": spec.params()},
        "precision": precision,
        "envelope": {
            "ranges": {f: {"min": float(MEAN[j] - 2 * SCALE[j]),
                           "max": float(MEAN[j] + 2 * SCALE[j])} for j, f in enumerate(FEATURES)},
            "novelty": {"k": k, "threshold_distance": TAU},
        },
    }
    return Model(manifest, {"x_train": x_s, "dual": dual, "novelty_reference": reference})


def _sklearn_predict(spec, x_s, dual, q_s):
    if spec.name.startswith("matern"):
        from sklearn.gaussian_process.kernels import Matern

        kern = Matern(length_scale=1.0 / np.sqrt(2.0 * spec.gamma),
                      nu=1.5 if spec.name == "matern32" else 2.5)
        return kern(q_s, x_s) @ dual
    from sklearn.kernel_ridge import KernelRidge

    ref = KernelRidge(kernel=spec.name, **spec.params())
    ref.X_fit_, ref.dual_coef_ = x_s, dual
    return ref.predict(q_s).reshape(q_s.shape[0], -1)


def _novelty_by_expansion(q_s, reference, k):
    """The envelope's formula, written out: k-th smallest √max(‖q‖² − 2qᵀr + ‖r‖², 0) / τ."""
    sq = (q_s**2).sum(1)[:, None] - 2.0 * q_s @ reference.T + (reference**2).sum(1)[None, :]
    kth = np.sort(sq, axis=1)[:, min(k, reference.shape[0]) - 1]
    return np.sqrt(np.maximum(kth, 0.0)) / TAU


@pytest.fixture(scope="module")
def data():
    rng = np.random.default_rng(11)
    x_s = rng.standard_normal((N_TRAIN, D))
    dual = rng.standard_normal((N_TRAIN, 3))
    reference = x_s[np.sort(rng.choice(N_TRAIN, 400, replace=False))]
    return x_s, dual, reference


def _raw_rows(m: int, seed: int) -> np.ndarray:
    """Raw rows: most near the data, some far outside it (novel and out of range)."""
    q_s = np.random.default_rng(seed).standard_normal((m, D)) * 1.3
    q_s[::5] *= 4.0
    return q_s * SCALE + MEAN


@pytest.mark.parametrize("name", KERNEL_NAMES)
@pytest.mark.parametrize("m", BATCHES)
@pytest.mark.parametrize("targets", [1, 3])
def test_predict_matches_scikit_learn(data, name, m, targets):
    x_s, dual, reference = data
    dual = dual[:, :targets]
    model = _model(name, x_s, dual, reference)
    x = _raw_rows(m, seed=m)
    want = _sklearn_predict(model.spec, x_s, dual, (x - MEAN) / SCALE) + model.intercept
    got = model.predict(x)
    assert got.shape == ((m,) if targets == 1 else (m, targets))
    scale = np.max(np.abs(want))
    np.testing.assert_allclose(got.reshape(m, -1), want, rtol=1e-10, atol=1e-10 * scale,
                               err_msg=f"against scikit-learn {sklearn.__version__}")
    y, _ = model.score(x)
    np.testing.assert_allclose(y, want, rtol=1e-10, atol=1e-10 * scale,
                               err_msg=f"against scikit-learn {sklearn.__version__}")


@pytest.mark.parametrize("name", ["rbf", "matern52", "polynomial", "laplacian"])
@pytest.mark.parametrize("m", BATCHES)
def test_envelope_matches_the_expansion_formula(data, name, m):
    """Same novelty (1e-12) and the same flags as the envelope's formula computed here, whether
    the distances come with the prediction (distance kernels) or from a separate product."""
    x_s, dual, reference = data
    model = _model(name, x_s, dual, reference)
    assert model.engine.gives_neighbours == (model.spec.uses == "sqdist")
    x = _raw_rows(m, seed=100 + m)
    q_s = (x - MEAN) / SCALE
    want = _novelty_by_expansion(q_s, reference, 5)
    _, env = model.score(x)
    got = np.array([e["novelty"] for e in env])
    np.testing.assert_allclose(got, np.round(want, 4), rtol=0, atol=1e-12)
    lo, hi = MEAN - 2 * SCALE, MEAN + 2 * SCALE
    for i, e in enumerate(env):
        outside = [FEATURES[j] for j in range(D) if x[i, j] < lo[j] or x[i, j] > hi[j]]
        assert sorted(e["out_of_range"]) == outside
        assert e["novel"] == bool(want[i] > 1.0)
        assert e["inside"] == (not outside and not e["novel"])
    assert any(e["novel"] for e in env) or m == 1
    assert env == model.envelope(x)  # the separate path agrees too


@pytest.mark.parametrize("tiles", [dict(), dict(tile_elements=997, row_tile=9)])
@pytest.mark.parametrize("threads", [1, 2])
def test_engine_neighbour_distances_unrounded(data, tiles, threads):
    """The engine's k-th neighbour distances before rounding, over many column tiles."""
    x_s, dual, reference = data
    rows = rows_within(reference, x_s)
    eng = Engine(_spec("rbf"), x_s, dual, threads=threads, neighbours=(rows, 5), **tiles)
    q = np.random.default_rng(4).standard_normal((203, D)) * 2
    for batch in (q[:1], q[:7], q):
        near = np.empty(batch.shape[0])
        eng.predict(batch, near=near)
        want = _novelty_by_expansion(batch, reference, 5) * TAU
        np.testing.assert_allclose(near, want, rtol=1e-12, atol=1e-12)


def test_reference_rows_found_among_training_rows():
    rng = np.random.default_rng(2)
    x = rng.standard_normal((50, 3))
    x[10] = x[20]  # a duplicated training row, taken twice by the reference
    picked = [3, 10, 20, 47]
    got = rows_within(x[picked], x)
    assert sorted(got.tolist()) == sorted(picked)
    assert rows_within(x[[10, 20, 20]], x) is None  # three copies, two training rows
    assert rows_within(x[:3] + 1e-12, x) is None  # not training rows
    assert rows_within(x[:3, :2], x) is None


def test_reference_not_from_training_rows_uses_separate_product(data):
    x_s, dual, _ = data
    other = np.random.default_rng(5).standard_normal((300, D))
    model = _model("rbf", x_s, dual, other, k=3)
    assert not model.engine.gives_neighbours
    x = _raw_rows(9, seed=9)
    _, env = model.score(x)
    want = _novelty_by_expansion((x - MEAN) / SCALE, other, 3)
    np.testing.assert_allclose([e["novelty"] for e in env], np.round(want, 4), atol=1e-12)


def test_float32_models_keep_the_separate_product(data):
    x_s, dual, reference = data
    model = _model("rbf", x_s, dual, reference, precision="float32")
    assert not model.engine.gives_neighbours
    x = _raw_rows(3, seed=3)
    _, env = model.score(x)
    want = _novelty_by_expansion((x - MEAN) / SCALE, reference, 5)
    np.testing.assert_allclose([e["novelty"] for e in env], np.round(want, 4), atol=1e-12)


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
@pytest.mark.parametrize("m", [1, 4, 2_000])
def test_non_finite_values_are_named(data, bad, m):
    x_s, dual, reference = data
    model = _model("rbf", x_s, dual, reference)
    x = _raw_rows(m, seed=1)
    x[m - 1, 3] = bad
    with pytest.raises(ValueError, match=rf"row {m - 1}, feature 'f3': value is not finite"):
        model.predict(x)


def test_huge_finite_values_are_predicted(data):
    """Finite values whose products overflow are still values: answered, not refused."""
    x_s, dual, reference = data
    model = _model("rbf", x_s, dual, reference)
    x = _raw_rows(2, seed=1)
    x[0, 0] = 1e300
    y = model.predict(x)
    assert y.shape == (2, 3) and np.isfinite(y[1]).all()


def test_a_row_beyond_every_scale_gets_the_laplacian_s_limit(data):
    """exp(−γ·∞) = 0: a row whose L1 distances overflow to ∞ is predicted as the intercept
    (the compiled loop keeps IEEE arithmetic, so ∞ stays ∞)."""
    x_s, dual, reference = data
    model = _model("laplacian", x_s, dual, reference)
    x = _raw_rows(2, seed=1)
    x[0, :] = 1e308
    y = model.predict(x)
    np.testing.assert_array_equal(y[0], model.intercept)


def test_single_rows_leave_blas_threads_as_they_were(data):
    from threadpoolctl import threadpool_info, threadpool_limits

    def blas_threads():
        return [i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"]

    x_s, dual, reference = data
    model = _model("rbf", x_s, dual, reference)
    before = blas_threads()
    model.predict(_raw_rows(1, seed=2))
    assert blas_threads() == before
    with threadpool_limits(2, user_api="blas"):
        model.predict(_raw_rows(1, seed=2))
        assert set(blas_threads()) == {2}


@pytest.mark.parametrize("n", [5, 200, 257, 2_000])
def test_kth_value_is_exact(n):
    """Against a full sort: random, ascending, descending and tied values, both ends."""
    from service.envelope import kth_value

    rng = np.random.default_rng(n)
    base = rng.standard_normal(n)
    cases = [base, np.sort(base), np.sort(base)[::-1].copy(), np.round(base, 1)]
    for v in cases:
        full = np.sort(v)
        for k in {0, 1, 4, min(n - 1, 9)}:
            assert kth_value(v, k) == full[k]
            assert kth_value(v, k, largest=True) == full[n - 1 - k]


def test_numpy_blas_runs_one_thread_during_a_row_and_other_blas_is_left_alone(
    data, monkeypatch
):
    """BLAS threads would split the single row's product and wait on each other; only the
    BLAS numpy's products run on is held (a second OpenBLAS, scipy's here, is not on the
    path and keeps its setting)."""
    import os

    import scipy.linalg  # noqa: F401  (loads scipy's own OpenBLAS, as a notebook would)
    from threadpoolctl import threadpool_info, threadpool_limits

    import service.engine as engine_mod

    home = os.path.dirname(os.path.realpath(np.__file__))

    def threads_by_owner() -> dict[str, set[int]]:
        seen: dict[str, set[int]] = {"numpy": set(), "other": set()}
        for info in threadpool_info():
            if info["user_api"] == "blas":
                owner = "numpy" if os.path.realpath(info["filepath"]).startswith(
                    (home + os.sep, home + ".libs" + os.sep)) else "other"
                seen[owner].add(info["num_threads"])
        return seen

    during = []
    finish = engine_mod.finish_tile

    def spy(*args, **kwargs):
        during.append(threads_by_owner())
        return finish(*args, **kwargs)

    monkeypatch.setattr(engine_mod, "finish_tile", spy)
    x_s, dual, reference = data
    model = _model("rbf", x_s, dual, reference)
    with threadpool_limits(2, user_api="blas"):
        assert threads_by_owner()["numpy"] == {2}  # control: the limit took
        model.predict(_raw_rows(1, seed=3))
        after = threads_by_owner()
    assert during and during[0]["numpy"] == {1}
    assert during[0]["other"] in (set(), {2})  # scipy's BLAS untouched (absent if not split)
    assert after["numpy"] == {2}
