"""Prediction engine: numbers against scikit-learn, tiling edge cases, bounded memory.

Reference: scikit-learn 1.9 ``sklearn.kernel_ridge.KernelRidge.predict`` (kernels linear,
polynomial, rbf, laplacian, sigmoid) and ``sklearn.gaussian_process.kernels.Matern`` for the
Matérn kernels, given the very same training rows and dual coefficients.
"""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
import tracemalloc
from pathlib import Path

import numpy as np
import pytest

from service import engine
from service import engine_threads as engine_mod
from service.engine import ROW_TILE, Engine
from service.kernels import KERNEL_NAMES, default_spec, kernel_matrix

ROOT = Path(__file__).resolve().parents[1]
D = 6
N_TRAIN = 1_500
#: 1 and 7 take the lean path, 1000 the parallel one; 2·ROW_TILE + 3 ends in a partial tile.
#: 50 rows take the column split on two threads (the threshold lowered by ``split_small``)
BATCHES = (1, 7, 50, 1_000, 2 * ROW_TILE + 3)
RTOL = 1e-10

sklearn = pytest.importorskip("sklearn")


def _rng(seed: int = 0) -> np.random.Generator:
    return np.random.default_rng(seed)


def _spec(name: str):
    # a smaller gamma for the dot kernels keeps sigmoid out of its flat tails and the cubic
    # moderate, so the comparison tests the numbers rather than saturation
    gamma = 0.3 if name in ("rbf", "laplacian", "matern32", "matern52") else 0.1
    return default_spec(name, D, gamma=gamma, coef0=0.5, degree=3)


def _reference(spec, x: np.ndarray, dual: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Predictions by scikit-learn on the identical model."""
    if spec.name.startswith("matern"):
        from sklearn.gaussian_process.kernels import Matern

        # ℓ = 1/√(2γ) ties the length scale to γ (see service.kernels)
        kern = Matern(
            length_scale=1.0 / np.sqrt(2.0 * spec.gamma),
            nu=1.5 if spec.name == "matern32" else 2.5,
        )
        return kern(q, x) @ dual
    from sklearn.kernel_ridge import KernelRidge

    ref = KernelRidge(kernel=spec.name, **spec.params())
    ref.X_fit_ = x
    ref.dual_coef_ = dual
    out = ref.predict(q)
    return out.reshape(q.shape[0], -1)


def _assert_close(got: np.ndarray, want: np.ndarray) -> None:
    # relative to the size of the predictions, so a value that happens to sit near zero
    # is not held to a tolerance finer than its rounding
    scale = np.max(np.abs(want))
    np.testing.assert_allclose(got, want, rtol=RTOL, atol=RTOL * scale)


@pytest.fixture(scope="module")
def model_data():
    rng = _rng(1)
    x = rng.standard_normal((N_TRAIN, D))
    dual = rng.standard_normal((N_TRAIN, 3))  # several targets
    return x, dual


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_kernel_matrix_matches_reference(name):
    """kernel_matrix against scikit-learn's pairwise kernels (Matérn: its GP kernel)."""
    from sklearn.metrics.pairwise import pairwise_kernels

    spec = _spec(name)
    rng = _rng(2)
    a, b = rng.standard_normal((40, D)), rng.standard_normal((55, D))
    got = kernel_matrix(spec, a, b)
    if name.startswith("matern"):
        eye = np.eye(55)
        want = _reference(spec, b, eye, a)
    else:
        want = pairwise_kernels(a, b, metric=name, **spec.params())
    _assert_close(got, want)
    square = kernel_matrix(spec, a)
    if spec.uses != "dot":
        assert np.all(np.diag(square) == 1.0)


@pytest.fixture
def split_small(monkeypatch):
    """Column splits from 50 rows of these 1,500 training rows on, for every kernel."""
    monkeypatch.setattr(engine, "COLUMN_SPLIT_MIN", 50 * N_TRAIN)
    monkeypatch.setattr(engine, "SPLIT_WEIGHT", {})


@pytest.mark.parametrize("name", KERNEL_NAMES)
@pytest.mark.parametrize("m", BATCHES)
def test_engine_matches_reference(model_data, name, m, split_small):
    x, dual = model_data
    spec = _spec(name)
    q = _rng(m).standard_normal((m, D)) * 1.2
    want = _reference(spec, x, dual, q)
    for threads in (1, 2):
        got = Engine(spec, x, dual, threads=threads).predict(q)
        assert got.shape == (m, 3)
        _assert_close(got, want)


@pytest.mark.parametrize("name", ["rbf", "laplacian", "polynomial", "matern52"])
def test_many_small_tiles(model_data, name, split_small):
    """Tiles far smaller than the data: column tiles with a remainder, partial row tiles."""
    x, dual = model_data
    spec = _spec(name)
    q = _rng(3).standard_normal((203, D))
    want = _reference(spec, x, dual, q)
    for threads in (1, 2):
        eng = Engine(spec, x, dual, threads=threads, tile_elements=997, row_tile=9)
        _assert_close(eng.predict(q), want)
        _assert_close(eng.predict(q[:1]), want[:1])
        _assert_close(eng.predict(q[:50]), want[:50])  # column shares of many small tiles


def test_single_target_vector_dual(model_data):
    x, dual = model_data
    spec = _spec("rbf")
    q = _rng(4).standard_normal((5, D))
    got = Engine(spec, x, dual[:, 0]).predict(q)
    assert got.shape == (5, 1)
    _assert_close(got[:, 0], _reference(spec, x, dual[:, :1], q)[:, 0])


def test_memory_mapped_rows_are_not_copied(tmp_path, model_data):
    x, dual = model_data
    np.save(tmp_path / "x.npy", x)
    mm = np.load(tmp_path / "x.npy", mmap_mode="r")
    eng = Engine(_spec("rbf"), mm, dual)
    assert np.shares_memory(eng.x, mm)
    q = _rng(5).standard_normal((3, D))
    _assert_close(eng.predict(q), _reference(_spec("rbf"), x, dual, q))


def test_non_contiguous_and_integer_queries(model_data):
    x, dual = model_data
    spec = _spec("sigmoid")
    q = _rng(6).integers(-2, 3, size=(20, 2 * D))[:, ::2]  # ints, strided
    want = _reference(spec, x, dual, q.astype(float))
    _assert_close(Engine(spec, x, dual).predict(q), want)


def test_wrong_width_and_empty_batch(model_data):
    x, dual = model_data
    eng = Engine(_spec("rbf"), x, dual)
    with pytest.raises(ValueError, match="features"):
        eng.predict(np.zeros((2, D + 1)))
    assert eng.predict(np.zeros((0, D))).shape == (0, 3)


def test_blas_threads_restored_after_batches(model_data):
    """The one-thread BLAS bound is lifted again once no batch is running."""
    from threadpoolctl import threadpool_info

    def blas_threads():
        return [i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"]

    before = blas_threads()
    x, dual = model_data
    eng = Engine(_spec("rbf"), x, dual, threads=2)
    eng.predict(_rng(7).standard_normal((1_000, D)))
    eng.predict(_rng(7).standard_normal((3, D)))
    assert blas_threads() == before


def test_thread_count_bounded_by_cores(monkeypatch):
    cores = engine_mod.available_cores()
    monkeypatch.setenv("KRIDGE_ENGINE_THREADS", str(cores + 7))
    assert engine_mod.engine_threads() == cores
    monkeypatch.setenv("KRIDGE_ENGINE_THREADS", "1")
    assert engine_mod.engine_threads() == 1
    monkeypatch.setenv("KRIDGE_ENGINE_THREADS", "nonsense")
    assert engine_mod.engine_threads() == cores


_MEMORY_PROBE = textwrap.dedent(
    """
    import json, resource, sys, tracemalloc
    import numpy as np
    sys.path.insert(0, {root!r})
    from service.engine import Engine
    from service.kernels import default_spec

    rng = np.random.default_rng(0)
    x = rng.standard_normal((20_000, 16))
    dual = rng.standard_normal((20_000, 1))
    q = rng.standard_normal((100_000, 16))
    eng = Engine(default_spec("rbf", 16), x, dual)
    eng.predict(q[:1_000])  # warm up: thread pool, per-thread buffers, BLAS buffers
    rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    tracemalloc.start()
    out = eng.predict(q)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    rss1 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(json.dumps({{"traced_peak": peak, "rss_growth": (rss1 - rss0) * 1024,
                      "finite": bool(np.isfinite(out).all()), "shape": list(out.shape)}}))
    """
)


@pytest.mark.slow
def test_large_batch_memory_is_bounded():
    """100,000 queries × 20,000 training rows (a 16 GB kernel matrix if built whole) stay
    under 256 MB of extra memory: tracemalloc peak of numpy buffers and growth of peak RSS,
    measured in a fresh process."""
    proc = subprocess.run(
        [sys.executable, "-c", _MEMORY_PROBE.format(root=str(ROOT))],
        capture_output=True,
        text=True,
        timeout=600,
        check=True,
    )
    res = json.loads(proc.stdout.strip().splitlines()[-1])
    assert res["finite"] and res["shape"] == [100_000, 1]
    limit = 256 * 2**20
    assert res["traced_peak"] < limit, res
    assert res["rss_growth"] < limit, res


def _tiny_model(rng: np.random.Generator):
    """A Model built straight from arrays and a minimal manifest (no training needed)."""
    from service.model import Model

    n, feats = 300, ["a", "b", "c"]
    xs = rng.standard_normal((n, len(feats)))
    manifest = {
        "model": "probe",
        "version": 1,
        "features": feats,
        "targets": ["y"],
        "standardization": {"mean": [0.0] * 3, "scale": [1.0] * 3},
        "intercept": [0.0],
        "kernel": {"name": "rbf", "params": {"gamma": 0.5}},
        "envelope": {
            "ranges": {f: {"min": -3.0, "max": 3.0} for f in feats},
            "novelty": {"k": 5, "threshold_distance": 1.0},
        },
    }
    arrays = {
        "x_train": xs,
        "dual": rng.standard_normal((n, 1)),
        "novelty_reference": xs,
    }
    return Model(manifest, arrays)


@pytest.mark.slow
def test_scoring_a_large_csv_streams(tmp_path):
    """kridge predict's scorer holds one chunk at a time: the traced peak while scoring
    120,000 rows in 128 KiB blocks (~2,000 rows) stays far below what the whole file would need."""
    from trainer.score_file import score_file

    rng = _rng(8)
    model = _tiny_model(rng)
    path = tmp_path / "big.csv"
    rows = 120_000
    values = rng.standard_normal((rows, 3))
    with path.open("w") as fh:
        fh.write("a,b,c,note\n")
        np.savetxt(fh, values, delimiter=",", fmt="%.17g", footer="", comments="")
    # the note column is empty: give every line a fourth cell
    text = path.read_text().replace("\n", ",x\n")
    path.write_text(text.replace("a,b,c,note,x\n", "a,b,c,note\n", 1))
    del text

    with open(Path(tmp_path / "out.csv"), "w") as out:
        tracemalloc.start()
        total = score_file(model, path, out, quiet=True, block_bytes=1 << 17)
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
    assert total.rows == rows
    # one chunk's strings and arrays are a few MB; the whole file as parsed rows would be
    # well over 50 MB of Python objects
    assert peak < 20 * 2**20, peak
    first = (tmp_path / "out.csv").read_text().splitlines()[1].split(",")
    want = model.predict(values[:1])[0]
    assert float(first[0]) == pytest.approx(want, rel=1e-12)  # the inputs are not echoed


def test_a_small_batch_is_split_by_columns_across_threads(monkeypatch):
    """Enough work (weighted by the kernel's cost per value) is shared out by training rows,
    one share per thread, together exactly [0, n); less work, or one thread, is not."""
    from service.engine import COLUMN_SPLIT_MIN, SPLIT_WEIGHT

    n = 12_000
    rows_matern = int(np.ceil(COLUMN_SPLIT_MIN / SPLIT_WEIGHT["matern32"] / n))  # 9
    assert rows_matern * n < COLUMN_SPLIT_MIN  # the weight is what tips it
    rng = _rng(8)
    x, dual = rng.standard_normal((n, D)), rng.standard_normal((n, 1))
    seen = []
    rows = Engine._rows

    def spy(self, q, out, near=None, raw=False, columns=None):
        seen.append(columns)
        return rows(self, q, out, near, raw, columns)

    monkeypatch.setattr(Engine, "_rows", spy)
    q = rng.standard_normal((rows_matern, D))
    Engine(_spec("matern32"), x, dual, threads=2).predict(q)
    assert sorted(seen) == [(0, n // 2), (n // 2, n)]
    for name, threads in (("rbf", 2), ("matern32", 1)):
        seen.clear()
        Engine(_spec(name), x, dual, threads=threads).predict(q)
        assert seen == [None], name
