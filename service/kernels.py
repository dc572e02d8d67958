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
            raise ValueError(
                f"unknown kernel {self.name!r}; choose one of {', '.join(KERNEL_NAMES)}"
            )
        for key in ("gamma", "degree", "coef0"):
            value = getattr(self, key)
            if key in KERNEL_PARAMS[self.name]:
                if value is None or not math.isfinite(value):
                    raise ValueError(f"kernel {self.name} needs a finite {key}")
            elif value is not None:
                raise ValueError(f"kernel {self.name} takes no {key}")
        if self.gamma is not None and self.name != "sigmoid" and self.gamma <= 0:
            raise ValueError(f"gamma must be positive for the {self.name} kernel")
        if self.degree is not None and self.degree < 1:
            raise ValueError("degree must be at least 1")

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
    """Squared Euclidean norm of each row, ``‖a_i‖²``."""
    return np.einsum("ij,ij->i", a, a)


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
    scratch : optional (m, n) buffer used by the laplacian kernel.

    Returns
    -------
    (m, n) array of kernel values (``out`` when given).

    Notes
    -----
    Squared distances use ‖a − b‖² = ‖a‖² − 2aᵀb + ‖b‖², clipped at 0, as scikit-learn's
    ``euclidean_distances`` does, so one matrix product does most of the work.
    """
    m, n = q.shape[0], x.shape[0]
    if out is None:
        out = np.empty((m, n), dtype=np.result_type(q.dtype, x.dtype))
    name = spec.name
    if spec.uses == "l1":
        if scratch is None:
            scratch = np.empty_like(out)
        out.fill(0.0)
        for j in range(q.shape[1]):
            np.subtract(q[:, j, None], x[None, :, j], out=scratch)
            np.abs(scratch, out=scratch)
            out += scratch
        out *= -spec.gamma
        return np.exp(out, out=out)

    np.matmul(q, x.T, out=out)
    if name == "linear":
        return out
    if name in ("polynomial", "sigmoid"):
        out *= spec.gamma
        out += spec.coef0
        if name == "sigmoid":
            return np.tanh(out, out=out)
        return np.power(out, spec.degree, out=out)

    # distance kernels
    if x_sq is None:
        x_sq = row_sq_norms(x)
    if q_sq is None:
        q_sq = row_sq_norms(q)
    out *= -2.0
    out += q_sq[:, None]
    out += x_sq[None, :]
    np.maximum(out, 0.0, out=out)
    if name == "rbf":
        out *= -spec.gamma
        return np.exp(out, out=out)
    # Matérn: t = √(2ν) r / ℓ with ℓ = 1/√(2γ), i.e. t = √(2ν·2γ·r²)
    nu2 = 3.0 if name == "matern32" else 5.0
    out *= 2.0 * nu2 * spec.gamma
    np.sqrt(out, out=out)  # out = t
    if scratch is None:
        scratch = np.empty_like(out)
    np.negative(out, out=scratch)
    np.exp(scratch, out=scratch)  # scratch = exp(-t)
    if name == "matern32":
        out += 1.0
    else:
        tt = out * out  # 1 + t + t²/3
        tt /= 3.0
        out += 1.0
        out += tt
    out *= scratch
    return out


def kernel_matrix(spec: KernelSpec, a: np.ndarray, b: np.ndarray | None = None) -> np.ndarray:
    """Full kernel matrix K[i, j] = k(a_i, b_j) (``b`` defaults to ``a``).

    Used for training, where the whole matrix is needed anyway; serving goes through
    :mod:`service.engine`, which tiles the same :func:`kernel_block`.
    """
    b = a if b is None else b
    out = kernel_block(spec, a, b)
    if b is a and spec.uses == "sqdist":
        # k(a, a) = 1 exactly; the expanded distance form leaves rounding noise there
        np.fill_diagonal(out, 1.0)
    return out
