"""Running tuning candidates: one after another, or spread over worker processes.

From :data:`PARALLEL_FROM` rows up to the exact leave-one-out limit, candidates run in
separate processes (joblib's loky backend), one BLAS thread each. Threads do not help: scipy's
``eigh`` holds the GIL, so threaded candidates run one after another on one BLAS thread.
Below that size a decomposition is so quick that starting worker processes costs more than
it saves. (Measurements behind both limits: DEVELOPERS.md, "Measured limits".)
"""

from __future__ import annotations

import sys

from threadpoolctl import threadpool_info

from service.kernels import KernelSpec
from service.settings import usable_cores
from trainer.exact.candidates import Curve, evaluate
from trainer.validation.folds import EXACT_MAX_ROWS, Problem

#: Smallest number of rows for which candidates run in worker processes.
PARALLEL_FROM = 1000


class Runner:
    """Evaluates lists of candidates on ``n`` rows, in parallel where that pays, with a
    progress bar on a terminal. ``how`` says which was chosen and why; call :meth:`close`
    when done."""

    def __init__(self, n: int, quiet: bool, total_hint: int):
        from tqdm.auto import tqdm

        self.cores = usable_cores()
        # the bar counts the LAPACK work that really runs: eigendecompositions and
        # Cholesky factorizations, with the kernel settings raced out beside them
        self.bar = tqdm(total=total_hint, desc="tuning", unit="factorization", leave=False,
                        disable=quiet or not sys.stderr.isatty(), file=sys.stderr)
        self.counts = {"eigh": 0, "cholesky": 0, "raced out": 0}
        self.parallel = self.cores > 1 and PARALLEL_FROM <= n <= EXACT_MAX_ROWS
        blas_threads = max((p.get("num_threads", 1) for p in threadpool_info()
                            if p.get("user_api") == "blas"), default=1)
        if self.parallel:
            self.how = (f"candidates spread over {self.cores} worker processes with joblib, "
                        f"one BLAS thread each (measured faster than one decomposition at a "
                        f"time on {blas_threads} BLAS threads)")
        else:
            self.how = (f"candidates one after another: BLAS already uses {blas_threads} "
                        f"thread(s) for each n = {n} decomposition")

    def _count(self, key: str, k: int) -> None:
        self.counts[key] += k
        if key != "raced out":
            if self.bar.n + k > self.bar.total:
                self.bar.total = self.bar.n + k
            self.bar.update(k)
        self.bar.set_postfix(self.counts, refresh=True)

    def count_eigh(self, decompositions: int) -> None:
        """Count eigendecompositions run outside :meth:`__call__`."""
        self._count("eigh", decompositions)

    def step(self, factorizations: int) -> None:
        """Count Cholesky factorizations run outside :meth:`__call__`."""
        self._count("cholesky", factorizations)

    def raced(self, k: int) -> None:
        """Count kernel settings that left the race."""
        if k:
            self._count("raced out", k)

    def expect(self, more: int) -> None:
        """Raise the bar's total by work now foreseen."""
        self.bar.total = self.bar.n + more
        self.bar.refresh()

    def __call__(self, problem: Problem, specs: list[KernelSpec]) -> list[Curve]:
        if self.parallel and len(specs) > 1:
            from joblib import Parallel, delayed, parallel_config

            with parallel_config(backend="loky", inner_max_num_threads=1):
                out = Parallel(n_jobs=min(self.cores, len(specs)))(
                    delayed(evaluate)(problem, s) for s in specs)
            # the workers counted on their own copies
            problem.evaluated += len(specs) * problem.decompositions
            self._count("eigh", len(specs) * problem.decompositions)
            return out
        out = []
        for s in specs:
            before = problem.evaluated
            out.append(evaluate(problem, s))
            self._count("eigh", problem.evaluated - before)
        return out

    def close(self) -> None:
        """Close the progress bar and end the worker processes (they would idle for minutes)."""
        self.bar.close()
        if self.parallel:
            from joblib.externals.loky import get_reusable_executor

            get_reusable_executor().shutdown(wait=True)
