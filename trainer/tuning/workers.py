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
        self.bar = tqdm(total=total_hint, desc="tuning", unit="fit", leave=False,
                        disable=quiet or not sys.stderr.isatty(), file=sys.stderr)
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

    def __call__(self, problem: Problem, specs: list[KernelSpec]) -> list[Curve]:
        if self.parallel and len(specs) > 1:
            from joblib import Parallel, delayed, parallel_config

            with parallel_config(backend="loky", inner_max_num_threads=1):
                out = Parallel(n_jobs=min(self.cores, len(specs)))(
                    delayed(evaluate)(problem, s) for s in specs)
            # the workers counted on their own copies
            problem.evaluated += len(specs) * problem.decompositions
            self.bar.update(len(specs))
            return out
        out = []
        for s in specs:
            out.append(evaluate(problem, s))
            self.bar.update(1)
        return out

    def close(self) -> None:
        """Close the progress bar and end the worker processes (they would idle for minutes)."""
        self.bar.close()
        if self.parallel:
            from joblib.externals.loky import get_reusable_executor

            get_reusable_executor().shutdown(wait=True)
