"""Where the Nyström CG solve starts: the tuning sample's own Nyström fit, not zero.

From β = 0 the first CG iterations only climb to a model the tuning sample already gives:
the direct solve (:func:`trainer.nystrom.numerics.fit_in_memory`) on the sample's fit rows,
with a uniform subset of at most :data:`START_LANDMARKS` of the landmarks (zero on the
others) at the sample's ridge, costs a few seconds; CG from there needs fewer passes over all
rows to reach the same validation error (README, "The CG solver", for the measured count).
The start changes where CG begins, not what it solves: run to the residual rule it reaches
the same β (tests/test_nystrom_cg.py), and the validation rule scores the start as iteration
0, keeping it only if no iterate beats it.
"""

from __future__ import annotations

import numpy as np

from service.kernels import KernelSpec
from trainer.nystrom import numerics
from trainer.nystrom.tune import FINE_MAX_LANDMARKS, SampleProblem

#: Landmarks of the start's fit at most (the width search's second stage decides on as many:
#: two m × m eigendecompositions, seconds at 2,500).
START_LANDMARKS = FINE_MAX_LANDMARKS


def sample_start(spec: KernelSpec, landmarks: np.ndarray, problem: SampleProblem,
                 ridge: float, seed: int) -> tuple[np.ndarray, dict]:
    """(β₀ (m, t), its account): the sample fit rows' Nyström solution on a landmark subset.

    Parameters
    ----------
    spec, landmarks : the final fit's kernel and its m standardized landmarks.
    problem : the tuning sample (its fit rows and targets).
    ridge : the sample's ridge (chosen for those rows).
    seed : the job's seed (which landmarks the start uses).
    """
    m = landmarks.shape[0]
    if m <= START_LANDMARKS:
        pick = np.arange(m)
    else:
        pick = np.sort(np.random.default_rng([seed, 11]).choice(m, START_LANDMARKS,
                                                                replace=False))
    sub, _mean = numerics.fit_in_memory(spec, landmarks[pick], problem.x_s, problem.y, ridge)
    beta = np.zeros((m, sub.shape[1]))
    beta[pick] = sub
    rows = int(problem.x_s.shape[0])
    return beta, {"from": "sample fit", "rows": rows, "landmarks": int(pick.size),
                  "ridge": float(ridge),
                  "how": f"the direct Nyström solve on the tuning sample's {rows} fit rows "
                         f"with {pick.size} of the {m} landmarks (zero on the others) at the "
                         f"sample's ridge {ridge:.4g}"}
