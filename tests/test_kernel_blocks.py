"""service.kernels.KernelBlocks: the one kernel and distance computation, and who uses it.

References: scikit-learn 1.9.1 ``sklearn.metrics.pairwise.pairwise_kernels`` (linear,
polynomial, rbf, laplacian, sigmoid) and ``pairwise_distances`` (sqeuclidean, cityblock);
``pairwise_kernels`` has no Matérn, so those two go against scikit-learn 1.9.1
``sklearn.gaussian_process.kernels.Matern`` with ℓ = 1/√(2γ) (Rasmussen & Williams 2006,
eq. 4.17).
"""

from __future__ import annotations

from collections import Counter

import numpy as np
import pytest
from sklearn.gaussian_process.kernels import Matern
from sklearn.metrics.pairwise import pairwise_distances, pairwise_kernels

from service.engine import Engine
from service.envelope import NeighbourIndex
from service.kernels import KERNEL_NAMES, KernelBlocks, KernelSpec, finish_tile

RNG = np.random.default_rng(21)
A = RNG.standard_normal((37, 5))
B = RNG.standard_normal((29, 5))

SPECS = {
    "linear": KernelSpec("linear"),
    "polynomial": KernelSpec("polynomial", gamma=0.3, degree=3.0, coef0=1.5),
    "rbf": KernelSpec("rbf", gamma=0.4),
    "laplacian": KernelSpec("laplacian", gamma=0.2),
    "sigmoid": KernelSpec("sigmoid", gamma=0.1, coef0=-0.3),
    "matern32": KernelSpec("matern32", gamma=0.4),
    "matern52": KernelSpec("matern52", gamma=0.7),
}


def sklearn_kernel(spec: KernelSpec, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    if spec.name.startswith("matern"):
        nu = 1.5 if spec.name == "matern32" else 2.5
        return Matern(length_scale=1.0 / np.sqrt(2.0 * spec.gamma), nu=nu)(a, b)
    return pairwise_kernels(a, b, metric=spec.name, **spec.params())


def test_every_kernel_has_a_case():
    assert sorted(SPECS) == sorted(KERNEL_NAMES)


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_blocks_match_sklearn_pairwise_kernels(name):
    spec = SPECS[name]
    want = sklearn_kernel(spec, A, B)
    np.testing.assert_allclose(KernelBlocks(spec, B).block(A), want, rtol=1e-12, atol=1e-13)
    # a column-major fixed side (how laplacian bundles store X) gives the same values
    got = KernelBlocks(spec, np.asfortranarray(B)).block(A)
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-13)
    # float32 blocks: single-precision rounding only
    got32 = KernelBlocks(spec, B, dtype=np.float32).block(A)
    assert got32.dtype == np.float32
    np.testing.assert_allclose(got32, want, rtol=2e-5, atol=2e-5)


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_the_three_steps_on_kept_buffers_give_the_block(name):
    """The engine's use: Q̃ into a kept buffer with standardization folded in, u for a run
    of columns, the finish in place; equal to the whole block of the standardized rows."""
    spec = SPECS[name]
    shift, scale = RNG.uniform(-1, 1, 5), RNG.uniform(0.5, 2.0, 5)
    raw = A * scale + shift
    blocks = KernelBlocks(spec, B, shift=shift, scale=scale)
    want = KernelBlocks(spec, B).block(A)
    qa = blocks.rows(raw, blocks.rows_buffer(A.shape[0]), raw=True)
    for start, stop in ((0, 11), (11, 29)):
        u = np.empty((A.shape[0], stop - start))
        got = finish_tile(spec, blocks.exponent(qa, u, start), np.empty_like(u))
        np.testing.assert_allclose(got, want[:, start:stop], rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("metric", ["sqeuclidean", "cityblock"])
def test_distances_match_sklearn_pairwise_distances(metric):
    got = KernelBlocks(metric, B).block(A)
    np.testing.assert_allclose(got, pairwise_distances(A, B, metric=metric),
                               rtol=1e-12, atol=1e-12)
    assert (got >= 0).all()
    same = KernelBlocks(metric, A).block(A)  # rounding must not make a distance negative
    assert (same >= 0).all() and np.abs(np.diag(same)).max() < 1e-12


def test_an_unknown_distance_is_refused():
    with pytest.raises(ValueError, match="unknown distance 'cosine'"):
        KernelBlocks("cosine", B)


@pytest.fixture
def calls(monkeypatch):
    """Counts of KernelBlocks.exponent calls by form (kernel or distance name)."""
    seen: Counter = Counter()
    real = KernelBlocks.exponent

    def spy(self, qa, out, start=0):
        seen[self.spec.name if self.spec is not None else
             ("sqeuclidean" if self.uses == "sqdist" else "cityblock")] += 1
        return real(self, qa, out, start)

    monkeypatch.setattr(KernelBlocks, "exponent", spy)
    return seen


def test_width_search_kmeans_and_novelty_go_through_the_blocks(calls):
    from trainer.envelope_stats import envelope_stats
    from trainer.nystrom.numerics import pick_landmarks
    from trainer.tuning.widths import width_range

    x = RNG.standard_normal((300, 4))
    width_range("rbf", x)
    assert calls == {"sqeuclidean": 1}
    width_range("laplacian", x)
    assert calls["cityblock"] == 1
    width_range("polynomial", x)
    assert calls["linear"] == 1
    calls.clear()
    pick_landmarks(x, 12, "kmeans++", np.random.default_rng(0))
    assert calls == {"sqeuclidean": 12}  # one D² row per chosen landmark
    calls.clear()
    envelope_stats(x, x, ["a", "b", "c", "d"])
    assert calls == {"sqeuclidean": 1}
    calls.clear()
    NeighbourIndex(x[:50], 5).distances(x[:3])
    assert calls == {"sqeuclidean": 1}


def test_exact_fit_nystrom_and_engine_go_through_the_blocks(calls):
    from trainer.exact.fit import fit_exact
    from trainer.nystrom.numerics import accumulate

    x = RNG.standard_normal((80, 3))
    y = np.sin(x[:, :1])
    fit_exact(x, y, SPECS["matern52"], 0.1)
    assert calls == {"matern52": 1}
    calls.clear()
    accumulate(SPECS["laplacian"], x[:10], x, y, sub_rows=32)
    assert calls == {"laplacian": 3}  # one block per 32 rows
    calls.clear()
    engine = Engine(SPECS["rbf"], x, np.ones(80), threads=1)
    engine.predict(x[:1])
    engine.predict(x[:5])
    assert calls == {"rbf": 2}  # the single-tile path: one product per call
    engine.predict(np.tile(x, (13, 1)))  # 1,040 rows: the tiled path, 9 row tiles
    assert calls == {"rbf": 11}
