"""Kernel names and parameters: what each kernel is, shared by training and serving.

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

The computation of kernel values is :mod:`service.kernels`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from service.errors import UserError

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


def sqdist_scale(spec: KernelSpec) -> float:
    """The factor c with which a distance kernel reads c·‖a − b‖².

    rbf reads γ r²; Matérn reads t² = 2ν · 2γ · r² (t = √(2ν) r / ℓ, ℓ = 1/√(2γ)).
    """
    if spec.name == "rbf":
        return spec.gamma
    return 2.0 * (3.0 if spec.name == "matern32" else 5.0) * spec.gamma


