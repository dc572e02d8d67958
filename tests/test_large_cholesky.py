"""Large Cholesky factorizations must not crash the process.

Reference: measured on this project's machines (README, "Large models on AVX-512 machines") — on
these SkylakeX machines the OpenBLAS bundled with the numpy 2.4.6 / scipy 1.17.1 wheels
segfaults in a multi-threaded Cholesky of n ≥ 16,000 (rbf kernel of random 16-feature rows
plus 0.1 on the diagonal). trainer.exact.fit.solve_dual factorizes on one BLAS thread from
``SINGLE_THREAD_FROM`` rows on. The large test runs the solve in a subprocess so that a
segfault shows up as a negative return code instead of taking pytest down with it.

Measured while writing this (2 cores, shared): an unguarded ``cho_factor`` of the 16,000-row
matrix crashed in 2 of 2 runs when handed the C-ordered matrix (scipy then copies it), and
survived 2 of 2 runs on the Fortran-ordered view that solve_dual now passes. A pass at this
size therefore does not by itself prove the guard, so the test also checks that the
factorization ran on one BLAS thread.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap

import pytest
from threadpoolctl import threadpool_info

from trainer.exact.fit import SINGLE_THREAD_FROM, safe_lapack

N_CRASHED = 16_000  # smallest size measured to crash on these machines

SCRIPT = textwrap.dedent(
    """
    import json, sys
    import numpy as np
    from threadpoolctl import threadpool_info
    import trainer.exact.fit
    from service.kernels import KernelSpec, kernel_matrix
    from trainer.exact.fit import solve_dual

    # spy on the factorization: BLAS thread counts at the moment it runs
    seen = []
    factor = trainer.exact.fit.sla.cho_factor

    def spy(*args, **kwargs):
        seen.append([lib["num_threads"] for lib in threadpool_info()
                     if lib["user_api"] == "blas"])
        return factor(*args, **kwargs)

    trainer.exact.fit.sla.cho_factor = spy

    n, d, ridge = int(sys.argv[1]), 16, 0.1
    rng = np.random.default_rng(0)
    x = rng.standard_normal((n, d))
    y = rng.standard_normal((n, 2))
    spec = KernelSpec("rbf", gamma=1.0 / d)
    k = kernel_matrix(spec, x)
    dual, _ = solve_dual(k, y, ridge)
    del k
    # residual of (K + λI) α = y on a few rows, with those rows of K rebuilt from scratch
    rows = rng.choice(n, 6, replace=False)
    k_rows = kernel_matrix(spec, x[rows], x)
    lhs = k_rows @ dual + ridge * dual[rows]
    scale = np.abs(k_rows) @ np.abs(dual) + np.abs(y[rows])
    print(json.dumps({
        "max_rel_residual": float(np.max(np.abs(lhs - y[rows]) / scale)),
        "finite": bool(np.isfinite(dual).all()),
        "shape": list(dual.shape),
        "blas_threads_in_factorization": seen,
    }))
    """
)


def _clean_env() -> dict[str, str]:
    # Run under the machine's defaults: a thread-count variable inherited from the caller's
    # shell would hide the crash this test is about.
    prefixes = ("OPENBLAS_", "OMP_", "MKL_", "GOTO", "KRIDGE_")
    return {k: v for k, v in os.environ.items() if not k.startswith(prefixes)}


def _blas_threads() -> list[int]:
    return [lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas"]


def test_the_guard_covers_the_crashing_size_at_the_factorization(monkeypatch):
    # At the smallest size measured to crash, and from the threshold on, the factorization
    # inside solve_dual runs on one BLAS thread; below the threshold it keeps the library's
    # own count. The boundary is checked on a small system by moving the threshold down
    # (the real sizes need gigabytes; the slow test below runs one).
    import numpy as np

    import trainer.exact.fit
    from service.kernels import KernelSpec, kernel_matrix
    from trainer.exact.fit import solve_dual

    with safe_lapack(N_CRASHED):
        assert set(_blas_threads()) == {1}
    default = _blas_threads()
    seen = []
    factor = trainer.exact.fit.sla.cho_factor

    def spy(*args, **kwargs):  # BLAS thread counts at the moment the factorization runs
        seen.append(_blas_threads())
        return factor(*args, **kwargs)

    monkeypatch.setattr(trainer.exact.fit.sla, "cho_factor", spy)
    monkeypatch.setattr(trainer.exact.fit, "SINGLE_THREAD_FROM", 300)
    rng = np.random.default_rng(2)
    for n in (299, 300):
        x = rng.standard_normal((n, 3))
        solve_dual(kernel_matrix(KernelSpec("rbf", gamma=0.3), x), rng.standard_normal((n, 1)),
                   0.1)
    assert seen == [default, [1] * len(default)]


def test_guard_limits_every_blas_library_to_one_thread():
    # The guard must reach the OpenBLAS that scipy's LAPACK calls (scipy ships its own copy,
    # separate from numpy's); threadpoolctl reports each loaded BLAS library.
    with safe_lapack(SINGLE_THREAD_FROM):
        inside = [lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas"]
        paths = [lib["filepath"] for lib in threadpool_info() if lib["user_api"] == "blas"]
    assert inside and all(t == 1 for t in inside)
    assert any("scipy" in p for p in paths)
    # small systems keep the library's own thread count
    outside = [lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas"]
    with safe_lapack(100):
        small = [lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas"]
    assert small == outside


def test_solve_dual_factorizes_in_place():
    # At the sizes above, a second or third n × n copy is gigabytes (3.2 GB
    # per matrix at n = 20,000). numpy reports its allocations to tracemalloc, so the peak
    # of new memory during the solve must stay well below one more matrix.
    import tracemalloc

    import numpy as np

    from service.kernels import KernelSpec, kernel_matrix
    from trainer.exact.fit import solve_dual

    rng = np.random.default_rng(1)
    x = rng.standard_normal((2500, 4))
    y = rng.standard_normal((2500, 1))
    k = kernel_matrix(KernelSpec("rbf", gamma=0.25), x)
    k_orig = k.copy()
    tracemalloc.start()
    try:
        dual, loo = solve_dual(k, y, 0.1, want_loo=True)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 0.5 * k.nbytes
    # and the in-place solve is still the right one
    np.testing.assert_allclose(k_orig @ dual + 0.1 * dual, y, atol=1e-9)
    assert loo is not None and np.isfinite(loo).all()


@pytest.mark.slow
def test_solve_dual_at_a_size_that_crashed_before():
    proc = subprocess.run(
        [sys.executable, "-c", SCRIPT, str(N_CRASHED)],
        capture_output=True,
        text=True,
        env=_clean_env(),
        timeout=1200,
    )
    # a segfault shows as return code -11 (SIGSEGV)
    assert proc.returncode == 0, f"return code {proc.returncode}: {proc.stderr[-2000:]}"
    result = json.loads(proc.stdout.strip().splitlines()[-1])
    assert result["finite"] and result["shape"] == [N_CRASHED, 2]
    assert result["max_rel_residual"] < 1e-10
    # The crash is a thread race and does not strike on every run or memory layout, so a
    # passing run alone does not show the guard at work: check the factorization really ran
    # on one BLAS thread.
    threads = result["blas_threads_in_factorization"]
    assert len(threads) == 1 and threads[0] and all(t == 1 for t in threads[0])
