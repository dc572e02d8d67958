"""Kernel blocks: the one computation of kernel values and of distances between rows.

Every kernel value kridge computes (the exact fit's matrix, Nyström's landmark blocks, the
serving engine's tiles) and every Euclidean or L1 distance between rows (the width search,
k-means++ seeding, the novelty neighbours) comes from :class:`KernelBlocks`, in three steps:

1. affine operands: the fixed side X (training rows, landmarks, novelty reference) is
   prepared once as X̃, each block of query rows as Q̃;
2. one product u = Q̃·X̃ (the laplacian's and the L1 distance's u = −s‖q − x‖₁ come from the
   compiled loop of :mod:`service.l1_distance` instead, as matrix products cannot form it);
3. the kernel's elementwise finish k = φ(u) in place (:func:`finish_tile`); distances skip it.

==========================  ===================  ======================  ===================
form                        X̃ (rows × n)         Q̃ (m × width)           u
==========================  ===================  ======================  ===================
rbf, Matérn                 [xᵀ; 1; −c‖x‖²]      [2c q, −c‖q‖², 1]       −c‖q − x‖²
``"sqeuclidean"``           the same with c = 1                          −‖q − x‖²
polynomial, sigmoid         [xᵀ; c₀]             [γ q, 1]                γ qᵀx + c₀
linear                      xᵀ (a view)          q                       qᵀx
laplacian                   xᵀ (feature-major)   q                       −γ‖q − x‖₁
``"cityblock"``             xᵀ (feature-major)   q                       −‖q − x‖₁
==========================  ===================  ======================  ===================

c is :func:`service.kernel_spec.sqdist_scale`. The names and parameters of the kernels are
defined in :mod:`service.kernel_spec` (re-exported here).
"""

from __future__ import annotations

import numpy as np

from service.kernel_spec import (
    KERNEL_NAMES,
    KERNEL_PARAMS,
    KernelSpec,
    default_spec,
    sqdist_scale,
)
from service.l1_distance import scaled_l1

__all__ = [
    "DISTANCES", "KERNEL_NAMES", "KERNEL_PARAMS", "KernelBlocks", "KernelSpec", "default_spec",
    "finish_tile", "kernel_block", "kernel_matrix", "l1_distances", "squared_distances",
]

#: The distances a :class:`KernelBlocks` gives instead of a kernel: ‖q − x‖² and ‖q − x‖₁.
DISTANCES = ("sqeuclidean", "cityblock")


def row_sq_norms(a: np.ndarray) -> np.ndarray:
    """Squared Euclidean norm of each row, ``‖a_i‖² = Σ_k a_ik²``."""
    return np.einsum("ij,ij->i", a, a)


class KernelBlocks:
    """k(q_i, x_j), or a distance, for blocks of query rows against rows x prepared once.

    Parameters
    ----------
    form : a :class:`KernelSpec`, or ``"sqeuclidean"`` / ``"cityblock"`` for distances.
    x : (n, d) rows of the fixed side, read as they are (X̃ is a new array but for linear
        and a feature-major x with an L1 form, where it is a view).
    dtype : precision of X̃ and of the blocks (float64, or float32 for the engine's option).
    shift, scale : optional standardization s(q) = (q − shift) / scale that
        :meth:`rows` folds into Q̃ when asked (``raw=True``).

    Notes
    -----
    See the module table. :meth:`rows`, :meth:`exponent` and :func:`finish_tile` are the three
    steps on buffers the caller keeps (the engine); :meth:`block` runs them on new arrays.
    """

    def __init__(self, form: KernelSpec | str, x: np.ndarray, dtype=np.float64,
                 shift: np.ndarray | None = None, scale: np.ndarray | None = None):
        kernel = isinstance(form, KernelSpec)
        if not kernel and form not in DISTANCES:
            raise ValueError(f"unknown distance {form!r}; choose one of {', '.join(DISTANCES)}")
        self.spec = form if kernel else None
        self.dtype = np.dtype(dtype)
        self.uses = form.uses if kernel else ("sqdist" if form == "sqeuclidean" else "l1")
        self.n, self.d = x.shape
        #: c of u = −c‖q − x‖² (sqdist forms; 0 otherwise)
        self.c = (sqdist_scale(form) if kernel else 1.0) if self.uses == "sqdist" else 0.0
        linear = kernel and form.name == "linear"
        if self.uses == "sqdist":
            self.factor = 2.0 * self.c
        else:
            self.factor = form.gamma if kernel and self.uses == "dot" and not linear else 1.0
        self.width = self.d + (2 if self.uses == "sqdist" else
                               int(self.uses == "dot" and not linear))
        if self.uses == "l1":
            self.l1_scale = -(form.gamma if kernel else 1.0)
            # (d, n): the compiled loop reads each feature's values as one contiguous run; a
            # column-major x gives that for free, a row-major one gets a copy
            xt = x.T
            if xt.dtype != self.dtype or not xt.flags.c_contiguous:
                xt = np.ascontiguousarray(xt, dtype=self.dtype)
            self.columns = xt
        else:
            cols = self._augmented_columns(form, x, linear)
            self.columns = cols if cols.dtype == self.dtype else cols.astype(self.dtype)
        self.shift = None if shift is None else np.asarray(shift, dtype=np.float64)
        scale = None if scale is None else np.asarray(scale, dtype=np.float64)
        self.scale = scale
        # Q̃'s leading block is f·s(q) = (q − shift)·(f/scale); −c‖s(q)‖² = −‖f·s(q)‖²/(4c)
        self._lead = self.factor if scale is None else self.factor / scale
        self._sq = -1.0 / (2.0 * self.factor) if self.uses == "sqdist" else 0.0

    def _augmented_columns(self, form, x: np.ndarray, linear: bool) -> np.ndarray:
        """X̃ of the module table for the affine forms (a view of x for linear)."""
        if linear:
            return x.T
        d, n = self.d, self.n
        out = np.empty((self.width, n))
        out[:d] = x.T
        if self.uses == "sqdist":
            out[d] = 1.0
            out[d + 1] = -self.c * row_sq_norms(x)
        else:
            out[d] = form.coef0
        return out

    # -- step 1: the query operand ---------------------------------------------------------
    def rows_buffer(self, m: int) -> np.ndarray:
        """A float64 (m, width) buffer for Q̃ with its constant column (of ones) already set."""
        out = np.empty((m, self.width))
        if self.uses == "sqdist":
            out[:, self.d + 1] = 1.0
        elif self.width > self.d:
            out[:, self.d] = 1.0
        return out

    def rows(self, q: np.ndarray, out: np.ndarray | None = None, raw: bool = False,
             head: np.ndarray | None = None) -> np.ndarray:
        """Q̃ for the rows ``q`` (m, d), in the blocks' dtype.

        ``out``: a buffer from :meth:`rows_buffer` to write into (a new one when None), with
        ``head`` its view ``out[:, :d]`` if the caller keeps one. ``raw``: the rows are in raw
        units and the standardization given at construction is folded in, one pass fewer
        than s(q) followed by f·s(q). L1 forms: the (standardized) rows themselves,
        C-ordered, ``out`` unused. A float32 form returns a float32 copy of Q̃.
        """
        if self.uses == "l1":
            qs = (q - self.shift) / self.scale if raw else q
            return qs.astype(self.dtype, order="C", copy=False)
        if out is None:
            out = self.rows_buffer(q.shape[0])
        if head is None:
            head = out[:, : self.d]
        if raw:
            np.subtract(q, self.shift, out=head)
            np.multiply(head, self._lead, out=head)
        else:
            np.multiply(q, self.factor, out=head)
        if self._sq:
            if q.shape[0] == 1:  # a dot product is several times cheaper than einsum's set-up
                v = head.reshape(-1)
                out[0, self.d] = self._sq * np.dot(v, v)
            else:
                np.multiply(row_sq_norms(head), self._sq, out=out[:, self.d])
        return out if self.dtype == np.float64 else out.astype(self.dtype)

    # -- step 2: u, one product (or the L1 loop) -------------------------------------------
    def exponent(self, qa: np.ndarray, out: np.ndarray, start: int = 0) -> np.ndarray:
        """u for the operand ``qa`` (from :meth:`rows`) against the fixed rows
        [start, start + w), w = out.shape[1], into ``out``: one product Q̃·X̃, or for the L1
        forms the compiled loop (``out`` C-ordered)."""
        if self.uses == "l1":
            return scaled_l1(qa, self.columns, start, self.l1_scale, out)
        w = out.shape[1]
        cols = self.columns if w == self.n else self.columns[:, start : start + w]
        return np.matmul(qa, cols, out=out)

    # -- all three steps on new arrays -----------------------------------------------------
    def block(self, q: np.ndarray, out: np.ndarray | None = None,
              scratch: np.ndarray | None = None) -> np.ndarray:
        """(m, n) values for the standardized rows ``q``: k(q_i, x_j), or the distance.

        ``out`` and ``scratch`` (Matérn, cubic polynomial): optional buffers of at least m
        rows; the result is ``out[:m]``. u of the squared distance is clipped at 0 from above
        against rounding, as scikit-learn's ``euclidean_distances`` clips the distance.
        """
        m = q.shape[0]
        out = np.empty((m, self.n), dtype=self.dtype) if out is None else out[:m]
        u = self.exponent(self.rows(q), out)
        if self.uses == "sqdist":
            np.minimum(u, 0.0, out=u)
        if self.spec is None:
            return np.negative(u, out=u)
        return finish_tile(self.spec, u, None if scratch is None else scratch[:m])


def _integer_power(out: np.ndarray, degree: float, scratch: np.ndarray | None) -> np.ndarray:
    """``out **= degree`` in place; small integer degrees by multiplication (pow is ~10× slower)."""
    if degree == 1.0:
        return out
    if degree == 2.0:
        return np.square(out, out=out)
    if degree == 3.0:
        if scratch is None:
            scratch = np.empty_like(out)
        np.square(out, out=scratch)
        return np.multiply(out, scratch, out=out)
    if degree == 4.0:
        np.square(out, out=out)
        return np.square(out, out=out)
    return np.power(out, degree, out=out)


def finish_tile(spec: KernelSpec, out: np.ndarray, scratch: np.ndarray | None = None) -> np.ndarray:
    """The kernel's elementwise step, in place: k = φ(u) from u of :class:`KernelBlocks`.

    u is γ qᵀx + c₀ for the dot kernels, −γ‖q − x‖₁ for the laplacian and −c‖q − x‖² for the
    other distance kernels (for rbf a u a hair above 0 from rounding maps to 1 + O(1e-15),
    for Matérn to 1 − O(1e-16)). ``scratch`` (same shape) serves Matérn and the cubic
    polynomial.
    """
    name = spec.name
    if name == "linear":
        return out
    if name == "polynomial":
        return _integer_power(out, spec.degree, scratch)
    if name == "sigmoid":
        return np.tanh(out, out=out)
    if name in ("rbf", "laplacian"):
        return np.exp(out, out=out)
    # Matérn: t = √(c r²) = √|u| (|u| rather than −u clipped at 0: one pass for two; a u a
    # hair above 0 from rounding then gives k = 1 − O(1e-16) instead of 1); the polynomial
    # factor goes to scratch, exp(−t) to out
    np.abs(out, out=out)
    if scratch is None:
        scratch = np.empty_like(out)
    if name == "matern52":
        np.multiply(out, 1.0 / 3.0, out=scratch)  # t²/3: one pass, before the root
    np.sqrt(out, out=out)
    if name == "matern32":
        np.add(out, 1.0, out=scratch)  # 1 + t
    else:
        scratch += out  # 1 + t + t²/3
        scratch += 1.0
    np.negative(out, out=out)
    np.exp(out, out=out)
    out *= scratch
    return out


def kernel_block(spec: KernelSpec, q: np.ndarray, x: np.ndarray, out: np.ndarray | None = None,
                 scratch: np.ndarray | None = None) -> np.ndarray:
    """k(q_i, x_j) for standardized rows q (m, d) and x (n, d): :meth:`KernelBlocks.block`."""
    return KernelBlocks(spec, x).block(q, out, scratch)


def kernel_matrix(spec: KernelSpec, a: np.ndarray, b: np.ndarray | None = None) -> np.ndarray:
    """Full kernel matrix K[i, j] = k(a_i, b_j) (``b`` defaults to ``a``), for training."""
    b = a if b is None else b
    out = kernel_block(spec, a, b)
    if b is a and spec.uses in ("sqdist", "l1"):
        # k(a, a) = 1 exactly; the expanded distance forms leave rounding noise there
        np.fill_diagonal(out, 1.0)
    return out


def squared_distances(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """(m, n) squared Euclidean distances ‖a_i − b_j‖² ≥ 0 (``"sqeuclidean"`` blocks)."""
    return KernelBlocks("sqeuclidean", b).block(a)


def l1_distances(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """(m, n) L1 (cityblock) distances ‖a_i − b_j‖₁ (``"cityblock"`` blocks)."""
    return KernelBlocks("cityblock", b).block(a)
