"""The laplacian's compiled L1 loop against scipy's ``cdist(..., "cityblock")``
(scipy 1.17) and against the numpy form that serves when numba is missing."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.distance import cdist

from service import l1_distance
from service.engine import Engine
from service.kernels import KernelSpec


@pytest.fixture
def without_numba(monkeypatch):
    """The module as it behaves where numba cannot be imported."""
    monkeypatch.setattr(l1_distance, "_tried", True)
    monkeypatch.setattr(l1_distance, "_kernel", None)


def reference(q: np.ndarray, x: np.ndarray, scale: float) -> np.ndarray:
    return scale * cdist(q.astype(np.float64), x.astype(np.float64), "cityblock")


@pytest.mark.parametrize("m, n, d", [(1, 1, 1), (1, 5000, 16), (7, 2049, 3), (16, 4100, 9)])
@pytest.mark.parametrize("j0", [0, 3])
def test_compiled_loop_matches_cdist(m, n, d, j0):
    assert l1_distance.compiled()  # numba is a dependency: the compiled loop must serve
    rng = np.random.default_rng(m * n + d)
    q, x = rng.normal(size=(m, d)), rng.normal(size=(n + j0, d)) * 3.0
    out = np.full((m, n), np.nan)
    l1_distance.scaled_l1(q, np.ascontiguousarray(x.T), j0, -0.25, out)
    np.testing.assert_allclose(out, reference(q, x[j0:], -0.25), rtol=1e-13, atol=1e-13)


def test_float32_loop_matches_cdist_to_single_precision():
    rng = np.random.default_rng(5)
    q, x = rng.normal(size=(9, 16)).astype(np.float32), rng.normal(size=(3000, 16)).astype(
        np.float32)
    out = np.empty((9, 3000), dtype=np.float32)
    l1_distance.scaled_l1(q, np.ascontiguousarray(x.T), 0, -0.5, out)
    np.testing.assert_allclose(out, reference(q, x, -0.5), rtol=2e-6)


def test_numpy_form_matches_cdist(without_numba):
    assert not l1_distance.compiled()
    rng = np.random.default_rng(11)
    q, x = rng.normal(size=(5, 4)), rng.normal(size=(300, 4))
    out = np.empty((5, 290))
    l1_distance.scaled_l1(q, np.ascontiguousarray(x.T), 10, -1.5, out)
    np.testing.assert_allclose(out, reference(q, x[10:], -1.5), rtol=1e-13)


def test_laplacian_engine_without_numba_matches_scikit_learn(without_numba):
    # scikit-learn 1.9 KernelRidge.predict as the reference, as for the compiled loop
    from sklearn.kernel_ridge import KernelRidge

    rng = np.random.default_rng(3)
    x, y = rng.normal(size=(400, 6)), rng.normal(size=400)
    ref = KernelRidge(kernel="laplacian", gamma=0.3, alpha=0.5).fit(x, y)
    engine = Engine(KernelSpec("laplacian", gamma=0.3), x, ref.dual_coef_, threads=1)
    q = rng.normal(size=(70, 6))
    np.testing.assert_allclose(engine.predict(q)[:, 0], ref.predict(q), rtol=1e-10, atol=1e-12)


def test_a_failed_compile_falls_back_to_numpy_once(monkeypatch, caplog):
    """Where the JIT cannot run (a platform forbidding executable memory, say), the first
    call's compile error must not reach the caller: the numpy form serves from then on."""
    calls = []

    def broken(*args):
        calls.append(1)
        raise RuntimeError("cannot allocate executable memory")

    monkeypatch.setattr(l1_distance, "_tried", True)
    monkeypatch.setattr(l1_distance, "_kernel", broken)
    rng = np.random.default_rng(2)
    q, x = rng.normal(size=(3, 4)), rng.normal(size=(50, 4))
    for _ in range(3):
        out = l1_distance.scaled_l1(q, np.ascontiguousarray(x.T), 0, -1.0, np.empty((3, 50)))
        np.testing.assert_allclose(out, reference(q, x, -1.0), rtol=1e-13)
    assert calls == [1] and not l1_distance.compiled()
    assert "numpy form" in caplog.text
