"""Kernel functions: the one definition shared by training and serving.

All kernels act on standardized rows ``a`` and ``b``:

==========  ==========================================  ==========================
name        k(a, b)                                     parameters
==========  ==========================================  ==========================
linear      aᵀb                                         –
polynomial  (γ aᵀb + c₀)^d                              gamma, coef0, degree
rbf         exp(-γ ‖a − b‖²)                            gamma
laplacian   exp(-γ ‖a − b‖₁)                            gamma
sigmoid     tanh(γ aᵀb + c₀)                            gamma, coef0
matern32    (1 + √3 r/ℓ) exp(-√3 r/ℓ)                   gamma, with ℓ = 1/√(2γ)
matern52    (1 + √5 r/ℓ + 5r²/(3ℓ²)) exp(-√5 r/ℓ)       gamma, with ℓ = 1/√(2γ)
==========  ==========================================  ==========================

The first five follow scikit-learn's ``sklearn.metrics.pairwise`` definitions; the Matérn
kernels are those of Rasmussen & Williams, *Gaussian Processes for Machine Learning* (2006),
eq. 4.17, with the length scale tied to γ so that γ means the same as for rbf
(exp(-γ r²) = exp(-r²/(2ℓ²))).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from service.errors import UserError
from service.l1_distance import scaled_l1

KERNEL_NAMES = ("linear", "polynomial", "rbf", "laplacian", "sigmoid", "matern32", "matern52")

#: Which parameters each kernel reads. Anything else given for it is refused.
KERNEL_PARAMS: dict[str, tuple[str, ...]] = {
    "linear": (),
    "polynomial": ("gamma", "degree", "coef0"),
    "rbf": ("gamma",),
    "laplacian": ("gamma",),
    "sigmoid": ("gamma", "coef0"),
    "matern32": ("gamma",),
    "matern52": ("gamma",),
}

_DOT_KERNELS = ("linear", "polynomial", "sigmoid")
_SQDIST_KERNELS = ("rbf", "matern32", "matern52")


@dataclass(frozen=True)
class KernelSpec:
    """A kernel and its parameters, fully resolved (no defaults left open)."""

    name: str
    gamma: float | None = None
    degree: float | None = None
    coef0: float | None = None

    def __post_init__(self) -> None:
        if self.name not in KERNEL_PARAMS:
            raise UserError(
                f"unknown kernel {self.name!r}; choose one of {', '.join(KERNEL_NAMES)}"
            )
        for key in ("gamma", "degree", "coef0"):
            value = getattr(self, key)
            if key in KERNEL_PARAMS[self.name]:
                if value is None or not math.isfinite(value):
                    raise UserError(f"kernel {self.name} needs a finite {key}")
            elif value is not None:
                raise UserError(f"kernel {self.name} takes no {key}")
        if self.gamma is not None and self.name != "sigmoid" and self.gamma <= 0:
            raise UserError(f"gamma must be positive for the {self.name} kernel")
        if self.degree is not None and self.degree < 1:
            raise UserError("degree must be at least 1")

    @property
    def uses(self) -> str:
        """``"dot"``, ``"sqdist"`` or ``"l1"``: the pairwise quantity the kernel is built on."""
        if self.name in _DOT_KERNELS:
            return "dot"
        return "sqdist" if self.name in _SQDIST_KERNELS else "l1"

    def params(self) -> dict[str, float]:
        """The kernel's parameters as a plain dict (manifest form)."""
        return {key: getattr(self, key) for key in KERNEL_PARAMS[self.name]}

    @classmethod
    def from_params(cls, name: str, params: dict[str, float]) -> KernelSpec:
        """Rebuild a spec from its manifest form."""
        allowed = KERNEL_PARAMS.get(name, ())
        return cls(name, **{k: float(v) for k, v in params.items() if k in allowed})

    def describe(self) -> str:
        """Short human form, e.g. ``rbf(gamma=0.05)``."""
        inner = ", ".join(f"{k}={v:.6g}" for k, v in self.params().items())
        return f"{self.name}({inner})"


def default_spec(name: str, n_features: int, gamma=None, degree=None, coef0=None) -> KernelSpec:
    """Fill omitted parameters with scikit-learn's defaults: γ = 1/n_features, d = 3, c₀ = 1."""
    wanted = KERNEL_PARAMS.get(name)
    if wanted is None:
        KernelSpec(name)  # raises the unknown-kernel error
    values = {"gamma": gamma, "degree": degree, "coef0": coef0}
    fallback = {"gamma": 1.0 / max(n_features, 1), "degree": 3.0, "coef0": 1.0}
    return KernelSpec(
        name,
        **{k: (fallback[k] if values[k] is None else float(values[k])) for k in wanted},
    )


def row_sq_norms(a: np.ndarray) -> np.ndarray:
    """Squared Euclidean norm of each row, ``‖a_i‖² = Σ_k a_ik²``."""
    return np.einsum("ij,ij->i", a, a)


def sqdist_scale(spec: KernelSpec) -> float:
    """The factor c with which a distance kernel reads c·‖a − b‖².

    rbf reads γ r²; Matérn reads t² = 2ν · 2γ · r² (t = √(2ν) r / ℓ, ℓ = 1/√(2γ)).
    """
    if spec.name == "rbf":
        return spec.gamma
    return 2.0 * (3.0 if spec.name == "matern32" else 5.0) * spec.gamma


def prepare_columns(
    spec: KernelSpec, x: np.ndarray, x_sq: np.ndarray | None = None
) -> np.ndarray | None:
    """Training-side term of :func:`kernel_tile`, computed once per model.

    Returns c·‖x_j‖² for distance kernels (c from :func:`sqdist_scale`), None for the others.
    Length n; never a copy of ``x`` itself, so a memory-mapped training matrix stays shared
    between processes.
    """
    if spec.uses == "sqdist":
        return sqdist_scale(spec) * (row_sq_norms(x) if x_sq is None else x_sq)
    return None


def prepare_rows(
    spec: KernelSpec, q: np.ndarray, q_sq: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray | None]:
    """Query-side operands of :func:`kernel_tile`: ``(q_scaled, row_term)``.

    ========================  =================  =================
    kernel                    q_scaled           row_term
    ========================  =================  =================
    linear                    q                  None
    polynomial, sigmoid       γ q                None
    rbf, Matérn               2c q               c‖q_i‖²
    laplacian                 q                  None
    ========================  =================  =================

    Folding the scale into the small (m, d) query side saves a pass over every (m, n) tile.
    """
    if spec.uses == "sqdist":
        c = sqdist_scale(spec)
        qs = q * (2.0 * c)
        row = c * row_sq_norms(q) if q_sq is None else c * q_sq
        return qs, row
    if spec.name in ("linear", "laplacian"):
        return q, None
    return q * spec.gamma, None


def augmented_columns(spec: KernelSpec, x: np.ndarray) -> np.ndarray | None:
    """Training side X̃ of the kernel's affine part u = Q̃·X̃ (a new array; a view for linear).

    ==========================  ===================  ======================
    kernel                      X̃ (rows × n)         Q̃ (m × :func:`augmented_width`)
    ==========================  ===================  ======================
    rbf, Matérn                 [xᵀ; 1; −c‖x‖²]      [2c q, −c‖q‖², 1]
    polynomial, sigmoid         [xᵀ; c₀]             [γ q, 1]
    linear                      xᵀ (a view)          q
    laplacian                   None (no affine form)
    ==========================  ===================  ======================

    One matrix product then gives u = −c‖q − x‖² for distance kernels and γ qᵀx + c₀ for
    the dot kernels, so a tile needs no passes for the row and column terms; only
    :func:`finish_tile` remains.
    """
    if spec.uses == "l1":
        return None
    if spec.name == "linear":
        return x.T
    d, n = x.shape[1], x.shape[0]
    extra = 2 if spec.uses == "sqdist" else 1
    out = np.empty((d + extra, n))
    out[:d] = x.T
    if spec.uses == "sqdist":
        out[d] = 1.0
        out[d + 1] = -prepare_columns(spec, x)
    else:
        out[d] = spec.coef0
    return out


def augmented_width(spec: KernelSpec, d: int) -> int:
    """Columns of Q̃ (:func:`augmented_columns`) for ``d`` features."""
    return d + {"sqdist": 2, "dot": 0 if spec.name == "linear" else 1}.get(spec.uses, 0)


def query_factor(spec: KernelSpec) -> float:
    """The factor on q in Q̃ (:func:`augmented_columns`): 2c, γ, or 1 for linear."""
    if spec.uses == "sqdist":
        return 2.0 * sqdist_scale(spec)
    return 1.0 if spec.name == "linear" else spec.gamma


def augmented_rows(spec: KernelSpec, q: np.ndarray) -> np.ndarray:
    """Q̃ of :func:`augmented_columns` for the rows ``q`` (a new array; not for laplacian).

    The serving engine writes Q̃ into buffers it keeps; this allocating form serves callers
    that build Q̃ once per block (the Nyström accumulation).
    """
    m, d = q.shape
    out = np.empty((m, augmented_width(spec, d)))
    np.multiply(q, query_factor(spec), out=out[:, :d])
    if spec.uses == "sqdist":
        out[:, d] = -sqdist_scale(spec) * row_sq_norms(q)
        out[:, d + 1] = 1.0
    elif out.shape[1] > d:
        out[:, d] = 1.0
    return out


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


def kernel_tile(
    spec: KernelSpec,
    qs: np.ndarray,
    row: np.ndarray | None,
    xt: np.ndarray,
    col: np.ndarray | None,
    out: np.ndarray,
    scratch: np.ndarray | None = None,
) -> np.ndarray:
    """Kernel values for one tile from prepared operands, in place in ``out``.

    Parameters
    ----------
    spec : the kernel.
    qs, row : from :func:`prepare_rows` for the tile's m query rows.
    xt : (d, w) the tile's training rows transposed (a view such as ``x[j0:j1].T``).
    col : the tile's slice of :func:`prepare_columns` (None for dot kernels).
    out : (m, w) float buffer, overwritten.
    scratch : optional (m, w) buffer (Matérn, polynomial of degree 3).

    Returns
    -------
    ``out`` holding k(q_i, x_j).

    Notes
    -----
    Distance kernels: u = 2c qᵀx − c‖q‖² − c‖x‖² = −c‖q − x‖² (the expansion scikit-learn's
    ``euclidean_distances`` uses), clipped at 0 from above against rounding; then
    :func:`finish_tile`. The serving engine gets u in one product from the augmented
    operands instead (:func:`augmented_columns`). Laplacian: −γ‖q − x‖₁ from the compiled
    loop of :mod:`service.l1_distance`.
    """
    name = spec.name
    if spec.uses == "l1":
        if not xt.flags.c_contiguous:
            # the compiled loop reads each feature's values as one contiguous run; a copy
            # (d × w values, read once) beats strided reads in every feature pass
            xt = np.ascontiguousarray(xt)
        scaled_l1(qs, xt, 0, -spec.gamma, out)
        return np.exp(out, out=out)

    np.matmul(qs, xt, out=out)
    if spec.uses == "dot":
        if name != "linear":
            out += spec.coef0
    else:  # distance kernels: u = −c r² ≤ 0, clipped against rounding
        out -= row[:, None]
        out -= col
        np.minimum(out, 0.0, out=out)
    return finish_tile(spec, out, scratch)


def finish_tile(spec: KernelSpec, out: np.ndarray, scratch: np.ndarray | None = None) -> np.ndarray:
    """The kernel's elementwise step, in place: k from its affine part u (see
    :func:`augmented_columns`).

    u is γ qᵀx + c₀ for the dot kernels and −c‖q − x‖² for distance kernels (for rbf a u a
    hair above 0 from rounding maps to 1 + O(1e-15), for Matérn to 1 − O(1e-16)).
    ``scratch`` (same shape) serves Matérn and the cubic polynomial.
    """
    name = spec.name
    if name == "linear":
        return out
    if name == "polynomial":
        return _integer_power(out, spec.degree, scratch)
    if name == "sigmoid":
        return np.tanh(out, out=out)
    if name == "rbf":
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


def kernel_block(
    spec: KernelSpec,
    q: np.ndarray,
    x: np.ndarray,
    x_sq: np.ndarray | None = None,
    q_sq: np.ndarray | None = None,
    out: np.ndarray | None = None,
    scratch: np.ndarray | None = None,
) -> np.ndarray:
    """Evaluate k(q_i, x_j) for one block, in place in ``out``.

    Parameters
    ----------
    spec : the kernel.
    q, x : (m, d) and (n, d) standardized rows.
    x_sq, q_sq : optional precomputed ``row_sq_norms`` of x and q (distance kernels).
    out : optional (m, n) float buffer to write into.
    scratch : optional (m, n) buffer used by the Matérn and cubic kernels.

    Returns
    -------
    (m, n) array of kernel values (``out`` when given).

    Notes
    -----
    Squared distances use ‖a − b‖² = ‖a‖² − 2aᵀb + ‖b‖², clipped at 0, as scikit-learn's
    ``euclidean_distances`` does, so one matrix product does most of the work. This is
    :func:`kernel_tile` on freshly prepared operands: serving and training share one code path.
    """
    m, n = q.shape[0], x.shape[0]
    if out is None:
        out = np.empty((m, n), dtype=np.result_type(q.dtype, x.dtype))
    qs, row = prepare_rows(spec, q, q_sq)
    return kernel_tile(spec, qs, row, x.T, prepare_columns(spec, x, x_sq), out, scratch)


def kernel_matrix(spec: KernelSpec, a: np.ndarray, b: np.ndarray | None = None) -> np.ndarray:
    """Full kernel matrix K[i, j] = k(a_i, b_j) (``b`` defaults to ``a``).

    Used for training, where the whole matrix is needed anyway; serving goes through
    :mod:`service.engine`, which applies the same :func:`kernel_tile` tile by tile.
    """
    b = a if b is None else b
    out = kernel_block(spec, a, b)
    if b is a and spec.uses in ("sqdist", "l1"):
        # k(a, a) = 1 exactly; the expanded distance forms leave rounding noise there
        np.fill_diagonal(out, 1.0)
    return out
