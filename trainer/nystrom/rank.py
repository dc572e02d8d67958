"""How much of the landmark kernel a width leaves: the numerical rank of K_mm, and the
warning when a chosen width collapses it.

A very wide kernel makes k(l_i, l_j) nearly constant: K_mm keeps only a few eigenvalues above
round-off, the model can fit only a few directions (at the extreme a linear fit), and more
landmarks buy nothing. Such a width can still win the validation score, for a response that
really is that smooth, so it is not refused; it is said, in ``kridge train``'s output and the
manifest.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla

from service.kernels import KernelSpec, kernel_matrix
from trainer.nystrom.numerics import RANK_RTOL

#: Landmarks the rank is measured on (a uniform subset of more): one eigvalsh of this size.
RANK_CHECK_LANDMARKS = 2000
#: Below this share of the landmarks kept (eigenvalues above RANK_RTOL·s_max) the fit warns.
RANK_WARN_FRACTION = 0.10


def landmark_rank(spec: KernelSpec, landmarks: np.ndarray, rng: np.random.Generator
                  ) -> tuple[int, int]:
    """(rank, of): eigenvalues of K_mm above :data:`RANK_RTOL`·s_max, on at most
    :data:`RANK_CHECK_LANDMARKS` of the landmarks (a uniform subset)."""
    m = landmarks.shape[0]
    if m > RANK_CHECK_LANDMARKS:
        landmarks = landmarks[np.sort(rng.choice(m, RANK_CHECK_LANDMARKS, replace=False))]
    s = sla.eigvalsh(kernel_matrix(spec, landmarks), check_finite=False, driver="evd")
    return int((s > RANK_RTOL * max(float(s.max()), 0.0)).sum()), int(landmarks.shape[0])


def rank_check(spec: KernelSpec, landmarks: np.ndarray, rng: np.random.Generator
               ) -> dict | None:
    """The manifest's ``rank_check``: rank, of, fraction, and a warning below
    :data:`RANK_WARN_FRACTION` (None otherwise). Only for the distance kernels: the rank of a
    linear or polynomial kernel is bounded by its feature space, whatever the width."""
    if spec.uses not in ("sqdist", "l1"):
        return None
    rank, of = landmark_rank(spec, landmarks, rng)
    frac = rank / max(of, 1)
    warning = None
    if frac < RANK_WARN_FRACTION:
        warning = (f"the kernel {spec.describe()} keeps rank {rank} of {of} landmarks "
                   f"({frac:.1%} < {RANK_WARN_FRACTION:.0%}): so wide a kernel fits only a few "
                   "directions of the data, close to a linear fit; give a larger --gamma "
                   "if the response is not that smooth")
    return {"rank": rank, "of": of, "fraction": round(frac, 4),
            "threshold": RANK_WARN_FRACTION,
            "how": f"eigenvalues of K_mm above {RANK_RTOL:g}·largest, on a uniform subset of "
                   f"at most {RANK_CHECK_LANDMARKS} landmarks", "warning": warning}
