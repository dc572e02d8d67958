"""FALKON's preconditioner for the Nyström CG solve, and the landmark factor it rests on.

With uniform landmarks K_nmᵀK_nm ≈ (n/m) K_mm², so H = K_nmᵀK_nm + λ K_mm ≈
Tᵀ((n/m) T Tᵀ + λ I) T for K_mm = TᵀT; with (n/m) T Tᵀ + λ I = AᵀA the preconditioner is
B = T⁻¹A⁻¹ (Rudi, Carratino & Rosasco, NeurIPS 2017, Sec. 3; the factor order of Meanti et al.,
NeurIPS 2020). :mod:`trainer.nystrom.cg` has the whole derivation and the CG loop.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import scipy.linalg as sla

#: First jitter on K_mm's diagonal (times m·max diag), grown ×100 until the factor exists.
JITTER_START, JITTER_MAX = 1e-10, 1e-4


def landmark_factor(make_kmm: Callable[[], np.ndarray]) -> tuple[np.ndarray, float]:
    """(T upper, jitter): K_mm + jitter·I = TᵀT by Cholesky, jitter the smallest of
    m·max diag·{1e-10, 1e-8, …} that lets the factor exist (one of order m·eps,
    as FALKON adds, left CG stalling on a singular K_mm: tests/test_nystrom_cg.py).

    ``make_kmm()`` gives K_mm as a new array that the factor overwrites (one m × m array
    in memory, not two); it is called again for each larger jitter.
    """
    rel = JITTER_START
    while True:
        a = np.asfortranarray(make_kmm())
        m = a.shape[0]
        base = m * max(float(np.max(np.diag(a))), 1e-300)
        a[np.diag_indices(m)] += rel * base
        t, info = sla.lapack.dpotrf(a, lower=0, overwrite_a=1, clean=1)
        if info == 0:
            return t, rel * base
        if rel >= JITTER_MAX:
            raise np.linalg.LinAlgError("K_mm has no Cholesky factor even with jitter "
                                        f"{rel * base:.3g}")
        del a, t
        rel *= 100.0


@dataclass
class Preconditioner:
    """FALKON's B = T⁻¹A_λ⁻¹ for one or more ridge values (module notes).

    Column j of a right-hand side with t targets belongs to ridge ``j // t``.
    """

    t: np.ndarray  # (m, m) upper, K_mm + jitter·I = TᵀT
    a: list[np.ndarray]  # (m, m) upper, (n/m) T Tᵀ + λ_i I = A_iᵀA_i
    targets: int
    jitter: float

    @classmethod
    def build(cls, kmm: np.ndarray | Callable[[], np.ndarray], n: int, ridges: list[float],
              targets: int) -> Preconditioner:
        """T once, T Tᵀ once (LAPACK dlauum, m³/3), one Cholesky per ridge, the last one in
        T Tᵀ's place: at most 2 + len(ridges) − 1 m × m arrays at a time.

        ``kmm``: K_mm, or a function giving it anew (then factored in place).
        """
        make = kmm if callable(kmm) else (lambda: np.array(kmm, order="F"))
        t, jitter = landmark_factor(make)
        m = t.shape[0]
        ttt, info = sla.lapack.dlauum(t, lower=0)  # T Tᵀ, upper triangle
        if info:
            raise np.linalg.LinAlgError(f"dlauum failed ({info})")
        ttt *= n / m
        factors = []
        for i, lam in enumerate(ridges):
            last = i == len(ridges) - 1
            a = ttt if last else ttt.copy(order="F")
            a[np.diag_indices(m)] += lam
            f, info = sla.lapack.dpotrf(a, lower=0, overwrite_a=1, clean=1)
            if info:
                raise np.linalg.LinAlgError(f"(n/m)TTᵀ + {lam:g}·I has no Cholesky factor")
            factors.append(f)
        return cls(t, factors, targets, jitter)

    def kmm_times(self, v: np.ndarray) -> np.ndarray:
        """K_mm v = Tᵀ(T v) − jitter·v (K_mm itself is not kept)."""
        return self.t.T @ (self.t @ v) - self.jitter * v

    def _groups(self, cols: np.ndarray | None, c: int):
        """(A_i, positions in v) for the ridges of v's c columns, which are the solve's
        columns ``cols`` (all of them if None)."""
        ridge = (np.arange(c) if cols is None else cols) // self.targets
        for i, a in enumerate(self.a):
            at = np.flatnonzero(ridge == i)
            if at.size:
                yield a, at

    def apply(self, v: np.ndarray, cols: np.ndarray | None = None) -> np.ndarray:
        """B v = T⁻¹(A⁻¹ v), column groups by ridge; ``cols``: which of the solve's columns
        v holds (all if None)."""
        out = np.empty_like(v)
        for a, at in self._groups(cols, v.shape[1]):
            out[:, at] = sla.solve_triangular(a, v[:, at], lower=False, check_finite=False)
        return sla.solve_triangular(self.t, out, lower=False, check_finite=False)

    def inverse(self, v: np.ndarray) -> np.ndarray:
        """B⁻¹ v = A(T v): the preconditioned coordinates w of a β (a warm start's)."""
        tv = self.t @ v
        out = np.empty_like(tv)
        for a, at in self._groups(None, v.shape[1]):
            out[:, at] = a @ tv[:, at]
        return out

    def apply_t(self, v: np.ndarray, cols: np.ndarray | None = None) -> np.ndarray:
        """Bᵀ v = A⁻ᵀ(T⁻ᵀ v)."""
        w = sla.solve_triangular(self.t, v, trans="T", lower=False, check_finite=False)
        for a, at in self._groups(cols, v.shape[1]):
            w[:, at] = sla.solve_triangular(a, w[:, at], trans="T", lower=False,
                                            check_finite=False)
        return w


class NoPreconditioner:
    """B = I: plain CG on H β = b (for comparison only)."""

    jitter = 0.0

    def __init__(self, kmm: np.ndarray):
        self.kmm = kmm

    def kmm_times(self, v: np.ndarray) -> np.ndarray:
        return self.kmm @ v

    def apply(self, v: np.ndarray, cols: np.ndarray | None = None) -> np.ndarray:
        return v

    apply_t = apply

    def inverse(self, v: np.ndarray) -> np.ndarray:
        return v
