"""service.kernels against two independent references.

References:
- scikit-learn 1.9 ``sklearn.metrics.pairwise`` (linear_kernel, polynomial_kernel, rbf_kernel,
  laplacian_kernel, sigmoid_kernel) and ``sklearn.gaussian_process.kernels.Matern``;
- the textbook formulas written out directly on distances from ``scipy.spatial.distance.cdist``
  (Matérn: Rasmussen & Williams, "Gaussian Processes for Machine Learning", 2006, eq. 4.17).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.distance import cdist
from sklearn.gaussian_process.kernels import Matern
from sklearn.metrics import pairwise

from service.engine import Engine
from service.kernels import KernelSpec, default_spec, kernel_matrix

RNG = np.random.default_rng(7)
A = RNG.standard_normal((23, 4))
B = RNG.standard_normal((17, 4))

# (spec, scikit-learn reference callable)
CASES = [
    (KernelSpec("linear"), lambda a, b: pairwise.linear_kernel(a, b)),
    (
        KernelSpec("polynomial", gamma=0.3, degree=3.0, coef0=1.5),
        lambda a, b: pairwise.polynomial_kernel(a, b, degree=3, gamma=0.3, coef0=1.5),
    ),
    (KernelSpec("rbf", gamma=0.4), lambda a, b: pairwise.rbf_kernel(a, b, gamma=0.4)),
    (
        KernelSpec("laplacian", gamma=0.2),
        lambda a, b: pairwise.laplacian_kernel(a, b, gamma=0.2),
    ),
    (
        KernelSpec("sigmoid", gamma=0.1, coef0=-0.3),
        lambda a, b: pairwise.sigmoid_kernel(a, b, gamma=0.1, coef0=-0.3),
    ),
    (
        KernelSpec("matern32", gamma=0.4),
        lambda a, b: Matern(length_scale=1 / np.sqrt(0.8), nu=1.5)(a, b),
    ),
    (
        KernelSpec("matern52", gamma=0.4),
        lambda a, b: Matern(length_scale=1 / np.sqrt(0.8), nu=2.5)(a, b),
    ),
]
IDS = [spec.name for spec, _ in CASES]


def by_formula(spec: KernelSpec, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """The kernel written out from its definition, on exact cdist distances."""
    g = spec.gamma
    if spec.name == "linear":
        return a @ b.T
    if spec.name == "polynomial":
        return (g * (a @ b.T) + spec.coef0) ** spec.degree
    if spec.name == "sigmoid":
        return np.tanh(g * (a @ b.T) + spec.coef0)
    if spec.name == "laplacian":
        return np.exp(-g * cdist(a, b, "cityblock"))
    r = cdist(a, b, "euclidean")
    if spec.name == "rbf":
        return np.exp(-g * r**2)
    ell = 1.0 / np.sqrt(2.0 * g)
    if spec.name == "matern32":
        t = np.sqrt(3.0) * r / ell
        return (1.0 + t) * np.exp(-t)
    t = np.sqrt(5.0) * r / ell
    return (1.0 + t + t**2 / 3.0) * np.exp(-t)


@pytest.mark.parametrize(("spec", "reference"), CASES, ids=IDS)
def test_cross_matrix_matches_sklearn_and_formula(spec, reference):
    ours = kernel_matrix(spec, A, B)
    assert ours.shape == (23, 17)
    np.testing.assert_allclose(ours, reference(A, B), rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(ours, by_formula(spec, A, B), rtol=1e-12, atol=1e-13)


@pytest.mark.parametrize(("spec", "reference"), CASES, ids=IDS)
def test_square_matrix_matches_sklearn_and_is_symmetric(spec, reference):
    ours = kernel_matrix(spec, A)
    np.testing.assert_allclose(ours, reference(A, A), rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(ours, by_formula(spec, A, A), rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(ours, ours.T, rtol=0, atol=1e-14)


@pytest.mark.parametrize("name", ["rbf", "matern32", "matern52"])
def test_distance_kernels_are_exactly_one_on_the_diagonal(name):
    # Rows far from the origin make ‖a‖² − 2aᵀa + ‖a‖² lose digits; k(a, a) must still be 1.
    far = A * 1e3 + 5e4
    k = kernel_matrix(KernelSpec(name, gamma=1e-9), far)
    assert np.all(np.diag(k) == 1.0)


@pytest.mark.parametrize(("spec", "reference"), CASES, ids=IDS)
def test_tiled_engine_matches_whole_matrix(spec, reference, monkeypatch):
    # The serving engine cuts the training rows into column tiles; force several tiles
    # (each tile covers at least 64 columns, so use 200 training rows).
    import service.engine as engine_mod

    monkeypatch.setattr(engine_mod, "TILE_ELEMENTS", 64)
    x = RNG.standard_normal((200, 4))
    dual = RNG.standard_normal((200, 2))
    engine = Engine(spec, x, dual, threads=1)
    expected = reference(B, x) @ dual
    np.testing.assert_allclose(engine.predict(B), expected, rtol=1e-10, atol=1e-10)


def test_default_parameters_follow_sklearn_defaults():
    # reference: scikit-learn 1.9 pairwise kernels default gamma = 1/n_features, degree 3, coef0 1
    spec = default_spec("polynomial", n_features=4)
    np.testing.assert_allclose(
        kernel_matrix(spec, A, B), pairwise.polynomial_kernel(A, B), rtol=1e-12
    )
    assert default_spec("rbf", 8, gamma=0.5).gamma == 0.5


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"name": "cosine"}, "unknown kernel"),
        ({"name": "rbf"}, "needs a finite gamma"),
        ({"name": "rbf", "gamma": float("nan")}, "needs a finite gamma"),
        ({"name": "rbf", "gamma": -1.0}, "gamma must be positive"),
        ({"name": "linear", "gamma": 1.0}, "takes no gamma"),
        ({"name": "polynomial", "gamma": 1.0, "coef0": 0.0, "degree": 0.5}, "degree"),
    ],
)
def test_bad_specs_are_refused(kwargs, message):
    with pytest.raises(ValueError, match=message):
        KernelSpec(**kwargs)


def test_manifest_form_round_trips():
    spec = KernelSpec("polynomial", gamma=0.3, degree=2.0, coef0=0.5)
    assert KernelSpec.from_params(spec.name, spec.params()) == spec
