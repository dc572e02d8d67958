"""Exact fit and the published bundle against scikit-learn's KernelRidge.

Reference: scikit-learn 1.9 ``StandardScaler`` + ``KernelRidge(alpha=ridge, kernel=...)``
fitted on the centered target (y − mean, mean added back to predictions); the Matérn kernels
go through ``sklearn.gaussian_process.kernels.Matern(length_scale=1/sqrt(2γ), nu=1.5/2.5)``
as a precomputed kernel. Data: scikit-learn's bundled diabetes set (Efron, Hastie, Johnstone
& Tibshirani 2004, "Least Angle Regression", Annals of Statistics; from memory) and its
bundled linnerud set (three exercise features, three physiological targets: several targets
at once).
"""

from __future__ import annotations

import csv

import numpy as np
import pytest
from sklearn.datasets import load_diabetes, load_linnerud
from sklearn.gaussian_process.kernels import Matern
from sklearn.kernel_ridge import KernelRidge
from sklearn.preprocessing import StandardScaler

from service import load_model
from service.kernels import KernelSpec
from trainer.errors import UserError
from trainer.exact.fit import fit_exact
from trainer.job import TrainOptions, train

RTOL = 1e-9


def _diabetes():
    d = load_diabetes(scaled=False)
    names = [n.replace(" ", "_") for n in d.feature_names]
    return d.data, d.target[:, None], names, ["progression"]


def _linnerud():
    d = load_linnerud()
    return d.data, d.target, list(d.feature_names), [t.lower() for t in d.target_names]


DATASETS = {"diabetes": _diabetes, "linnerud": _linnerud}

# kernel name -> (parameters, ridge) chosen so that K + λI is well conditioned on both sets;
# the sigmoid kernel is indefinite in general, a small gamma and a ridge of 1 keep it positive.
KERNELS = {
    "linear": ({}, 1.0),
    "polynomial": ({"gamma": 0.05, "degree": 2.0, "coef0": 1.0}, 1.0),
    "rbf": ({"gamma": 0.1}, 0.5),
    "laplacian": ({"gamma": 0.05}, 0.5),
    "sigmoid": ({"gamma": 0.01, "coef0": 0.5}, 1.0),
    "matern32": ({"gamma": 0.1}, 0.5),
    "matern52": ({"gamma": 0.1}, 0.5),
}


def sklearn_predict(kernel, params, ridge, x, y, q):
    """Reference predictions for raw query rows ``q`` (n_query, n_targets)."""
    scaler = StandardScaler().fit(x)
    xs, qs = scaler.transform(x), scaler.transform(q)
    mean = y.mean(axis=0)
    if kernel.startswith("matern"):
        k = Matern(length_scale=1.0 / np.sqrt(2.0 * params["gamma"]),
                   nu=1.5 if kernel == "matern32" else 2.5)
        model = KernelRidge(alpha=ridge, kernel="precomputed").fit(k(xs), y - mean)
        pred = model.predict(k(qs, xs))
    else:
        model = KernelRidge(alpha=ridge, kernel=kernel, **params).fit(xs, y - mean)
        pred = model.predict(qs)
    return pred.reshape(len(q), -1) + mean


def query_rows(x):
    # training rows themselves plus unseen rows between pairs of training rows
    rng = np.random.default_rng(3)
    i, j = rng.integers(0, len(x), 12), rng.integers(0, len(x), 12)
    w = rng.uniform(0.2, 0.8, (12, 1))
    return np.vstack([x[:15], w * x[i] + (1 - w) * x[j]])


def write_csv(path, x, y, features, targets):
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(features + targets)
        for row in np.hstack([x, y]):
            w.writerow([repr(float(v)) for v in row])


@pytest.mark.parametrize("dataset", DATASETS)
@pytest.mark.parametrize("kernel", KERNELS)
def test_fit_exact_matches_sklearn(dataset, kernel):
    x, y, _, _ = DATASETS[dataset]()
    params, ridge = KERNELS[kernel]
    fit = fit_exact(x, y, KernelSpec(kernel, **params), ridge)
    q = query_rows(x)
    expected = sklearn_predict(kernel, params, ridge, x, y, q)
    np.testing.assert_allclose(fit.predict(q), expected, rtol=RTOL)
    # the intercept is the training mean of each target (README, "Concepts": numerics)
    np.testing.assert_allclose(fit.intercept, y.mean(axis=0), rtol=1e-15)


@pytest.mark.parametrize("dataset", DATASETS)
@pytest.mark.parametrize("kernel", KERNELS)
def test_published_bundle_matches_sklearn(dataset, kernel, tmp_path, store_dir):
    x, y, features, targets = DATASETS[dataset]()
    params, ridge = KERNELS[kernel]
    data = tmp_path / f"{dataset}.csv"
    write_csv(data, x, y, features, targets)
    opts = TrainOptions(data=str(data), targets=targets, name=dataset, kernel=kernel,
                        ridge=ridge, store=str(store_dir), quiet=True, report=False, **params)
    summary = train(opts, log=lambda *a, **k: None)
    model = load_model(store_dir, dataset, summary["version"])
    q = query_rows(x)
    expected = sklearn_predict(kernel, params, ridge, x, y, q)
    got = model.predict(q)
    assert got.shape == ((len(q),) if len(targets) == 1 else (len(q), len(targets)))
    np.testing.assert_allclose(got.reshape(len(q), -1), expected, rtol=RTOL)
    assert model.features == features and model.targets == targets


def test_indefinite_sigmoid_system_is_a_clear_error():
    # A steep sigmoid kernel with no ridge has negative eigenvalues: Cholesky must refuse it
    # with the user-facing message, not return nonsense.
    x, y, _, _ = _diabetes()
    with pytest.raises(UserError, match="raise --ridge"):
        fit_exact(x, y, KernelSpec("sigmoid", gamma=1.0, coef0=-1.0), 0.0)


def test_loo_residuals_match_refitting_without_each_row():
    # Allen's PRESS identity r_i = α_i / [(K + λI)⁻¹]_ii with standardization and intercept
    # held fixed; checked against literally dropping the row (linnerud, 20 rows).
    x, y, _, _ = _linnerud()
    spec, ridge = KernelSpec("rbf", gamma=0.2), 0.3
    fit = fit_exact(x, y, spec, ridge, want_loo=True)
    from service.kernels import kernel_matrix

    k = kernel_matrix(spec, fit.x_s)
    yc = y - fit.intercept
    for i in (0, 7, 19):
        keep = np.arange(len(x)) != i
        a = np.linalg.solve(k[np.ix_(keep, keep)] + ridge * np.eye(keep.sum()), yc[keep])
        pred_i = k[i, keep] @ a
        np.testing.assert_allclose(fit.loo_residuals[i], yc[i] - pred_i, rtol=1e-8)
