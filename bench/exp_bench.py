"""Is numpy's float64 exp the bottleneck of a CG iteration? np.exp against a compiled one.

A CG iteration spends about half of each kernel value's time in ``np.exp``. A fused compiled
kernel (distance, exp and products in one loop) could only pay if a compiled exp were much
faster than numpy's. This bench writes the textbook vectorizable one in numba — range
reduction u = n·ln 2 + r with a two-part ln 2 (Cody & Waite), a degree-13 Taylor polynomial
of e^r for |r| ≤ ln 2 / 2, and 2ⁿ built from its exponent bits — checks that LLVM turned it
into AVX-512 code (zmm registers in the assembly) and that it is correct, and times both on
one thread over an array that fits the L2 cache and one that does not, as a kernel tile does;
then a CG pass's products over 12 chunks of rows on both cores with either exp in the tiles.

    .venv/bin/python bench/exp_bench.py
"""

from __future__ import annotations

import math
import sys
import time
from pathlib import Path

import numpy as np
from llvmlite import ir
from numba import njit, types
from numba.extending import intrinsic
from threadpoolctl import threadpool_limits

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from bench.machine import header  # noqa: E402

# fast-math without reassociation (which would fold the rounding step away)
FAST = {"nnan", "ninf", "nsz", "arcp", "contract", "afn"}
LN2_HI, LN2_LO = 6.93147180369123816490e-01, 1.90821492927058770002e-10
INV_FACT = np.array([1.0 / math.factorial(k) for k in range(14)])


@intrinsic
def _as_float(typingctx, bits):
    def codegen(context, builder, sig, args):
        return builder.bitcast(args[0], ir.DoubleType())
    return types.float64(types.int64), codegen


@njit(fastmath=FAST, nogil=True, boundscheck=False, error_model="numpy")
def compiled_exp(x: np.ndarray) -> None:
    """x ← exp(x) in place for x ≤ 0 (clamped at −700: e⁻⁷⁰⁰ ≈ 1e−304, nothing in a sum)."""
    c = INV_FACT
    for j in range(x.size):
        u = max(x[j], -700.0)
        n = (u * (1.0 / LN2_HI) + 6755399441055744.0) - 6755399441055744.0  # round(u / ln 2)
        r = (u - n * LN2_HI) - n * LN2_LO
        p = c[13]
        for k in range(12, -1, -1):
            p = c[k] + r * p
        x[j] = p * _as_float((np.int64(n) + 1023) << 52)


def _best(fn, reps: int = 200) -> float:
    fn()
    best = math.inf
    for _ in range(5):
        t0 = time.perf_counter()
        for _ in range(reps):
            fn()
        best = min(best, (time.perf_counter() - t0) / reps)
    return best


def main() -> int:
    print(header("exp bench: np.exp against a vectorized numba exp, one thread"))
    rng = np.random.default_rng(0)
    x = -rng.uniform(0.0, 30.0, 300_000)
    got = x.copy()
    compiled_exp(got)
    want = np.exp(x)
    err = float(np.max(np.abs(got - want) / want))
    asm = next(iter(compiled_exp.inspect_asm().values()))
    print(f"compiled exp: max relative error {err:.2g}; zmm (AVX-512) operands in its "
          f"assembly: {asm.count('zmm')}")
    with threadpool_limits(1):
        for size in (100_000, 300_000):  # 0.8 MB fits the 1 MB L2, 2.4 MB does not
            src, buf = x[:size], np.empty(size)
            copy = _best(lambda: np.copyto(buf, src))  # noqa: B023
            ours = _best(lambda: (np.copyto(buf, src), compiled_exp(buf))) - copy  # noqa: B023
            ref = _best(lambda: np.exp(src, out=buf))  # noqa: B023
            print(f"{size * 8 / 1e6:.1f} MB: np.exp {ref / size * 1e9:.3f} ns/value, "
                  f"compiled {ours / size * 1e9:.3f} ns/value, ratio np/compiled "
                  f"{ref / ours:.2f}")
    print(tile_pass())
    return 0


def tile_pass(m: int = 10_000, chunks: int = 12) -> str:
    """One CG pass's products K_xmᵀ(K_xm v) over chunks of rows on both cores, with np.exp
    and with the compiled exp in the tiles (the rest of the pass unchanged)."""
    from concurrent.futures import ThreadPoolExecutor

    from service.kernels import KernelBlocks, KernelSpec
    from trainer.nystrom import cg

    rng = np.random.default_rng(1)
    kern = KernelBlocks(KernelSpec("rbf", gamma=0.5), rng.uniform(-1, 1, (m, 8)))
    v = rng.standard_normal((m, 3))
    rows = [rng.uniform(-1, 1, (cg.CHUNK_ROWS, 8)) for _ in range(chunks)]
    real = cg.finish_tile

    def compiled(_spec, u, _scratch=None):
        compiled_exp(u.reshape(-1))
        return u

    got = {}
    try:
        with threadpool_limits(1), ThreadPoolExecutor(2) as pool:
            for _ in range(2):
                for name, fn in (("np.exp", real), ("compiled", compiled)):
                    cg.finish_tile = fn
                    list(pool.map(lambda c: cg.gram_times(kern, c, v), rows[:2]))
                    t0 = time.perf_counter()
                    list(pool.map(lambda c: cg.gram_times(kern, c, v), rows))
                    per = (time.perf_counter() - t0) / (chunks * cg.CHUNK_ROWS * m) * 1e9
                    got[name] = min(got.get(name, math.inf), per)
    finally:
        cg.finish_tile = real
    return (f"CG pass, m = {m}, 2 threads: np.exp tiles {got['np.exp']:.3f} ns/value, "
            f"compiled-exp tiles {got['compiled']:.3f} ns/value, ratio "
            f"{got['np.exp'] / got['compiled']:.2f}")


if __name__ == "__main__":
    raise SystemExit(main())
