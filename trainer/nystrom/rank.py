"""How much of the landmark kernel a width leaves: the numerical rank of K_mm, and the
warning when a chosen width collapses it.

A very wide kernel makes k(l_i, l_j) nearly constant: K_mm keeps only a few eigenvalues above
round-off, the model can fit only a few directions (at the extreme a linear fit), and more
landmarks buy nothing. Such a width can still win the validation score, for a response that
really is that smooth, so it is not refused; it is said, in ``kridge train``'s output and the
manifest. The width search itself (:func:`rank_guard`) prefers a width above the fraction
when one scores nearly as well, and says so.
"""

from __future__ import annotations

from dataclasses import replace

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


#: The rank guard of the width search: a width that keeps less than RANK_WARN_FRACTION of the
#: landmarks gives way to the best width above the fraction whose validation score is at
#: most (1 + this) times the collapsed width's (relative, a choice of ours: 2 % of the
#: score is about 1 % of the validation RMSE).
RANK_PREFER_TOLERANCE = 0.02
#: Steps of the width (×FINE_STEP of trainer.nystrom.tune, towards narrower kernels) the
#: guard may score beyond the searched widths when none of those is above the fraction.
RANK_GUARD_STEPS = 4


def _fraction(spec: KernelSpec, landmarks: np.ndarray, seed: int) -> tuple[float, int, int]:
    rank, of = landmark_rank(spec, landmarks, np.random.default_rng([seed, 7]))
    return rank / max(of, 1), rank, of


def rank_guard(best, curves: list, landmarks: np.ndarray, seed: int, score_width,
               step: float):
    """(curve kept, the manifest's account or None): the width search's choice, unless its
    kernel collapses the landmark rank (:func:`landmark_rank` below
    :data:`RANK_WARN_FRACTION`) and a width above the fraction scores within
    :data:`RANK_PREFER_TOLERANCE` of it.

    ``curves``: the scored widths (comparable with ``best``); ``score_width(spec)`` scores
    one more width the same way (used for at most :data:`RANK_GUARD_STEPS` narrower steps of
    ×``step`` when no searched width qualifies). The rank is measured as
    :func:`rank_check` measures it (same landmark subset).
    """
    spec = best.spec
    if spec.uses not in ("sqdist", "l1") or "gamma" not in spec.params():
        return best, None
    frac, rank, of = _fraction(spec, landmarks, seed)
    if frac >= RANK_WARN_FRACTION:
        return best, None
    limit = best.best_score * (1.0 + RANK_PREFER_TOLERANCE)
    tried: dict[float, float] = {}

    def above(c) -> bool:
        if c.spec.gamma not in tried:
            tried[c.spec.gamma] = _fraction(c.spec, landmarks, seed)[0]
        return tried[c.spec.gamma] >= RANK_WARN_FRACTION

    same = [c for c in curves if c.spec.name == spec.name and c is not best]
    near = sorted((c for c in same if c.best_score <= limit), key=lambda c: c.best_score)
    kept = next((c for c in near if above(c)), None)
    top = max(same, key=lambda c: c.spec.gamma, default=best)
    if kept is None and (top is best or not above(top)):
        # every searched width collapses the rank: score narrower ones
        gamma = max(top.spec.gamma, spec.gamma)
        for _ in range(RANK_GUARD_STEPS):
            gamma *= step
            curve = score_width(replace(spec, gamma=float(gamma)))
            if above(curve):
                kept = curve if curve.best_score <= limit else None
                break
    account = {
        "collapsed": {"kernel": spec.describe(), "rank": rank, "of": of,
                      "fraction": round(frac, 4), "score": best.best_score},
        "tolerance": RANK_PREFER_TOLERANCE, "threshold": RANK_WARN_FRACTION,
        "fractions_tried": {f"{g:.6g}": round(f, 4) for g, f in tried.items()},
        "kept": (kept or best).spec.describe(),
        "summary": (f"{spec.describe()} keeps rank {rank} of {of} landmarks "
                    f"({frac:.1%} < {RANK_WARN_FRACTION:.0%}); "
                    + (f"{kept.spec.describe()} keeps more and scored within "
                       f"{RANK_PREFER_TOLERANCE:.0%} of it ({kept.best_score:.4g} against "
                       f"{best.best_score:.4g}), so it was chosen instead" if kept else
                       f"no width above {RANK_WARN_FRACTION:.0%} scored within "
                       f"{RANK_PREFER_TOLERANCE:.0%} of it, so it was kept"))}
    return (kept or best), account
