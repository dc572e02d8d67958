"""Nyström kernel ridge regression: the numerics, free of files and processes.

With m landmark rows L (standardized), K_nm = k(X, L) and K_mm = k(L, L), the Nyström
estimator (Williams & Seeger, "Using the Nyström method to speed up kernel machines", NIPS
2001; the normal equations as in Rudi, Camoriano & Rosasco, "Less is more: Nyström
computational regularization", NIPS 2015) solves

    (K_nmᵀ K_nm + λ K_mm) β = K_nmᵀ (y − ȳ),      f(x) = k(x, L)·β + ȳ,

so a Nyström bundle is served exactly like an exact one, with the landmarks as its
"training rows" and β as its dual coefficients.

Stable solve. K_mm = U S Uᵀ is decomposed once and only the eigenpairs with
s > :data:`RANK_RTOL`·s_max are kept, T = U_r S_r^{-1/2}. With the Nyström features
Φ = K_nm T the system becomes the ridge problem (ΦᵀΦ + λI) w = Φᵀ(y − ȳ), β = T w, whose matrix
A = Tᵀ(K_nmᵀK_nm)T is decomposed once more, A = V D Vᵀ: every ridge then costs one division,
w(λ) = V (D + λ)⁻¹ Vᵀ Tᵀ b. No normal-equation matrix is ever inverted, and a rank-deficient
K_mm (duplicated landmarks, a very wide kernel) is handled as a pseudo-inverse.

Only sums over rows are needed — G = K_nmᵀK_nm, K_nmᵀ1, K_nmᵀy, Σy and the count — so the rows
can be streamed in blocks (memory O(m² + block·m)) and blocks can be summed on other machines.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg as sla

from service.kernels import KernelBlocks, KernelSpec, kernel_block, kernel_matrix
from trainer.exact.fit import safe_lapack

#: Eigenvalues of K_mm below this fraction of the largest are dropped (pseudo-inverse): they
#: carry round-off, not information, and would blow up T = U S^{-1/2}.
RANK_RTOL = 1e-10
#: Rows per kernel block inside a chunk: 4,096 × m floats (64 MB at m = 2,000).
SUB_ROWS = 4096


#: Default landmarks: m = clamp(LANDMARKS_PER_ROOT·√n, LANDMARKS_MIN, LANDMARKS_MAX).
LANDMARKS_PER_ROOT, LANDMARKS_MIN, LANDMARKS_MAX = 4, 2000, 2500
#: m × m float64 matrices alive at once while solving (sums, K_mm, its eigenvectors, T,
#: the normal matrix, its eigenvectors, their product), and the share of memory they may use.
WORK_MATRICES, MEMORY_SHARE = 8, 0.05


def default_landmarks(rows: int, memory_bytes: int | None = None) -> int:
    """Default m from the row count and the memory: min(n, clamp(4√n, 2000, 2500), m_mem).

    4√n grows with the data as the analysis of Nyström KRR suggests (m of order √n keeps the
    optimal learning rate for smooth targets: Rudi, Camoriano & Rosasco 2015, Thm. 1). The
    cap of 2,500 bounds the time: pass 2 costs n·m² multiply-adds (a 1,000,000-row fit with
    2,500 landmarks is about 6·10¹² flops of BLAS dsyrk; its time on the development
    machines: DEVELOPERS.md, "Measured limits"). m_mem lets the :data:`WORK_MATRICES`
    m × m matrices of the solve use at most :data:`MEMORY_SHARE` of ``memory_bytes``. The
    floor of 2,000 is measured: just above the exact/Nyström switch, 566 landmarks (4√n) cost
    twice the error of 2,000 (README, "Large data: Nyström"; ``bench/scale_bench.py --rows
    20000 --landmarks 566``). Floor and cap leave 4√n in charge only between 250,000 and
    390,625 rows.
    """
    m = int(min(LANDMARKS_MAX, max(LANDMARKS_MIN, round(LANDMARKS_PER_ROOT * np.sqrt(rows)))))
    if memory_bytes:
        m = min(m, memory_landmarks(memory_bytes))
    return max(1, min(rows, m))


def memory_landmarks(memory_bytes: int) -> int:
    """The largest m whose solve's m × m matrices fit in MEMORY_SHARE of the memory."""
    return int(np.sqrt(MEMORY_SHARE * memory_bytes / (WORK_MATRICES * 8)))


def describe_default(rows: int, memory_bytes: int | None = None) -> str:
    """How :func:`default_landmarks` arrived at its m, for the manifest."""
    m = default_landmarks(rows, memory_bytes)
    mem = (f", at most {memory_landmarks(memory_bytes)} for {memory_bytes / 2**30:.0f} GiB "
           "of memory" if memory_bytes else "")
    return (f"default for {rows} training rows: min(n, clamp({LANDMARKS_PER_ROOT}·√n, "
            f"{LANDMARKS_MIN}, {LANDMARKS_MAX})){mem} → {m}")


def pick_landmarks(x_s: np.ndarray, m: int, scheme: str, rng: np.random.Generator
                   ) -> np.ndarray:
    """Indices of m landmark rows of ``x_s``.

    ``uniform``: a uniform draw without replacement (Williams & Seeger 2001).
    ``kmeans++``: D² sampling, each next row drawn with probability proportional to its
    squared distance to the nearest row already chosen (Arthur & Vassilvitskii, "k-means++:
    the advantages of careful seeding", SODA 2007); it spreads landmarks over the data.
    """
    n = x_s.shape[0]
    m = min(m, n)
    if scheme == "uniform":
        return np.sort(rng.choice(n, size=m, replace=False))
    if scheme != "kmeans++":
        raise ValueError(f"unknown landmark scheme {scheme!r}")
    chosen = np.empty(m, dtype=np.int64)
    chosen[0] = rng.integers(n)
    rows = KernelBlocks("sqeuclidean", x_s)  # D² of every row to a chosen one: one GEMV
    best = rows.block(x_s[chosen[0], None])[0]
    for i in range(1, m):
        total = best.sum()
        nxt = int(rng.integers(n)) if total <= 0 else int(
            np.searchsorted(np.cumsum(best), rng.random() * total))
        nxt = min(nxt, n - 1)
        chosen[i] = nxt
        np.minimum(best, rows.block(x_s[nxt, None])[0], out=best)
    return np.sort(np.unique(chosen)) if np.unique(chosen).size == m else np.sort(chosen)


@dataclass
class Sums:
    """Row sums of one set of rows: everything the Nyström solve needs from them."""

    gram: np.ndarray  # (m, m) K_nmᵀ K_nm
    k_sum: np.ndarray  # (m,) K_nmᵀ 1
    ky: np.ndarray  # (m, t) K_nmᵀ y
    y_sum: np.ndarray  # (t,)
    count: int

    @classmethod
    def zeros(cls, m: int, t: int) -> Sums:
        return cls(np.zeros((m, m)), np.zeros(m), np.zeros((m, t)), np.zeros(t), 0)

    def add(self, other: Sums) -> None:
        self.gram += other.gram
        self.k_sum += other.k_sum
        self.ky += other.ky
        self.y_sum += other.y_sum
        self.count += other.count

    def full_gram(self) -> np.ndarray:
        """G, exactly symmetric: its lower triangle mirrored (the sums of the two triangles
        can differ in the last bit)."""
        g = np.tril(self.gram)
        return g + np.tril(g, -1).T

    def centered_rhs(self) -> tuple[np.ndarray, np.ndarray]:
        """(ȳ, b = K_nmᵀ(y − ȳ) = K_nmᵀy − K_nmᵀ1 ȳᵀ)."""
        mean = self.y_sum / max(self.count, 1)
        return mean, self.ky - np.outer(self.k_sum, mean)


#: k(·, L) for blocks of rows, the landmark side prepared once (``LandmarkKernel(spec, L)``).
LandmarkKernel = KernelBlocks


def accumulate(spec: KernelSpec, landmarks: np.ndarray, x_s: np.ndarray, y: np.ndarray,
               sums: Sums | None = None, sub_rows: int = SUB_ROWS) -> Sums:
    """Add the rows (x_s, y) to the sums.

    Per block of ``sub_rows`` rows: G += K_bmᵀK_bm by a symmetric rank-k update (BLAS dsyrk,
    half the flops of a general product), and [K_bmᵀ1, K_bmᵀy] = K_bmᵀ[1, y] by one product.
    Memory beyond the sums is one (sub_rows × m) kernel block, reused from block to block,
    and one m × m product.
    """
    m, t = landmarks.shape[0], y.shape[1]
    sums = Sums.zeros(m, t) if sums is None else sums
    kern = LandmarkKernel(spec, landmarks)
    rows = min(sub_rows, max(x_s.shape[0], 1))
    buf = np.empty((rows, m))
    scratch = None if spec.name in ("rbf", "linear") else np.empty((rows, m))
    ones_y = np.empty((rows, t + 1))
    ones_y[:, 0] = 1.0
    prod = np.empty((m, m))
    for i in range(0, x_s.shape[0], sub_rows):
        xb = np.ascontiguousarray(x_s[i:i + sub_rows])
        b = xb.shape[0]
        k = kern.block(xb, buf, scratch)
        # numpy computes a product with its own transpose by BLAS dsyrk (half the flops of a
        # general product, the other triangle copied) and, unlike scipy's BLAS wrappers,
        # releases the GIL meanwhile, so blocks in several threads run on several cores
        np.matmul(k.T, k, out=prod)
        sums.gram += prod
        ones_y[:b, 1:] = y[i:i + b]
        both = k.T @ ones_y[:b]
        sums.k_sum += both[:, 0]
        sums.ky += both[:, 1:]
    sums.y_sum += y.sum(axis=0)
    sums.count += x_s.shape[0]
    return sums


@dataclass
class RidgePath:
    """Everything needed to get β for any ridge from one set of sums.

    ``basis`` = T V (m × r), ``d`` the eigenvalues of A = Tᵀ G T, ``c`` = Vᵀ Tᵀ b (r × t).
    Then β(λ) = basis · c / (d + λ).
    """

    basis: np.ndarray
    d: np.ndarray
    c: np.ndarray
    intercept: np.ndarray
    rank: int

    def dual(self, ridge: float) -> np.ndarray:
        return self.basis @ (self.c / (self.d + ridge)[:, None])

    def predict_path(self, k_vm: np.ndarray, ridges: np.ndarray) -> np.ndarray:
        """(R, v, t) centered predictions k(x_v, L)·β(λ) for every ridge, rows of ``k_vm``."""
        z = k_vm @ self.basis  # (v, r)
        scale = 1.0 / (self.d[None, :] + ridges[:, None])  # (R, r)
        return np.einsum("vr,Rr,rt->Rvt", z, scale, self.c, optimize=True)


def ridge_path(spec: KernelSpec, landmarks: np.ndarray, sums: Sums) -> RidgePath:
    """Decompose K_mm and the Nyström normal matrix once; see the module notes.

    Parameters
    ----------
    spec, landmarks : kernel and (m, d) standardized landmark rows.
    sums : the training rows' :class:`Sums`.

    Returns
    -------
    RidgePath giving β(λ) = T V (D + λ)⁻¹ Vᵀ Tᵀ K_nmᵀ(y − ȳ) for any λ ≥ 0.
    """
    m = landmarks.shape[0]
    kmm = kernel_matrix(spec, landmarks)
    with safe_lapack(m):
        s, u = sla.eigh(kmm, driver="evd", overwrite_a=True, check_finite=False)
    keep = s > RANK_RTOL * max(float(s.max()), 0.0)
    t_mat = u[:, keep] / np.sqrt(s[keep])  # (m, r)
    a = t_mat.T @ sums.full_gram() @ t_mat
    a = 0.5 * (a + a.T)
    with safe_lapack(a.shape[0]):
        d, v = sla.eigh(a, driver="evd", overwrite_a=True, check_finite=False)
    np.maximum(d, 0.0, out=d)  # A is PSD; negative values are round-off
    mean, b = sums.centered_rhs()
    basis = t_mat @ v
    return RidgePath(basis, d, v.T @ (t_mat.T @ b), mean, int(keep.sum()))


def validation_errors(path: RidgePath, spec: KernelSpec, landmarks: np.ndarray,
                      x_v: np.ndarray, y_v: np.ndarray, ridges: np.ndarray) -> np.ndarray:
    """(R, v, t) residuals y − f(x) of validation rows for every ridge value."""
    k_vm = kernel_block(spec, np.ascontiguousarray(x_v), landmarks)
    pred = path.predict_path(k_vm, ridges) + path.intercept[None, None, :]
    return y_v[None] - pred


def fit_in_memory(spec: KernelSpec, landmarks: np.ndarray, x_s: np.ndarray, y: np.ndarray,
                  ridge: float) -> tuple[np.ndarray, np.ndarray]:
    """(β, ȳ) for rows held in memory: the same solve as the streamed fit (tests, tuning)."""
    path = ridge_path(spec, landmarks, accumulate(spec, landmarks, x_s, y))
    return path.dual(ridge), path.intercept
