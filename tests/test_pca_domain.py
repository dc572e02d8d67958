"""The PCA check of the envelope (T² and Q) against outside references, and its behaviour.

- scores, T² and Q against scikit-learn's PCA on scikit-learn's bundled diabetes data;
- the number of components against scikit-learn's own "explained variance ≥ 0.95" choice;
- both control limits against the published formulas computed here with scipy.stats;
- on invented spectra-like rows (bench/spectra_data.py): fresh rows drawn like the training
  rows are flagged at about the stated 1 % rate (binomial tolerance), a reversed and a ramped
  row are flagged even when held inside every per-feature range.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy
import sklearn
from scipy import stats
from sklearn.datasets import load_diabetes
from sklearn.decomposition import PCA

from bench.spectra_data import FEATURES, TARGETS, ramp_row, reversed_row, spectra, write_csv
from service import load_model
from service.pca_domain import PcaDomain
from trainer.pca_limits import LEVEL, VARIANCE_SHARE, fit_pca_domain, q_limit, t2_limit

SK = f"scikit-learn {sklearn.__version__}"
SP = f"scipy {scipy.__version__}"


@pytest.fixture(scope="module")
def diabetes():
    x = load_diabetes().data  # 442 × 10, bundled with scikit-learn
    mean, scale = x.mean(axis=0), x.std(axis=0)
    return x, mean, scale, (x - mean) / scale


def _domain(part, arrays, mean, scale) -> PcaDomain:
    return PcaDomain(arrays["pca_loadings"], arrays["pca_center"],
                     np.asarray(part["variances"]), part["t2_limit"], part["q_limit"], mean,
                     scale)


def test_scores_t2_and_q_match_scikit_learn_pca(diabetes):
    x, mean, scale, x_s = diabetes
    part, arrays = fit_pca_domain(x_s, "all")
    k = part["components"]
    # scikit-learn's own rule for a float n_components: the fewest components explaining
    # more than that share of the variance
    assert k == PCA(n_components=VARIANCE_SHARE, svd_solver="full").fit(x_s).n_components_, SK
    ref = PCA(n_components=k, svd_solver="full").fit(x_s)
    np.testing.assert_allclose(part["variances"], ref.explained_variance_, rtol=1e-10,
                               err_msg=SK)
    rng = np.random.default_rng(3)
    new = np.vstack([x[:50], x[:50] + rng.normal(0, 0.5, (50, 10)) * scale])  # near and off
    scores = ref.transform((new - mean) / scale)
    t2_ref = (scores**2 / ref.explained_variance_).sum(axis=1)
    q_ref = (((new - mean) / scale - ref.inverse_transform(scores)) ** 2).sum(axis=1)
    t2, q = _domain(part, arrays, mean, scale).statistics(new)
    np.testing.assert_allclose(t2, t2_ref, rtol=1e-9, err_msg=SK)
    np.testing.assert_allclose(q, q_ref, rtol=1e-8, atol=1e-12, err_msg=SK)
    # loadings span the same directions (signs may differ): |P_oursᵀ P_sklearn| = I
    np.testing.assert_allclose(np.abs(arrays["pca_loadings"].T @ ref.components_.T),
                               np.eye(k), atol=1e-8, err_msg=SK)


def test_t2_limit_is_the_tracy_young_mason_formula():
    # T²_new ~ k(n−1)(n+1)/(n(n−k)) F(k, n−k) (Tracy, Young & Mason, J. Quality Technology
    # 1992; Jackson 1991), F quantile from scipy.stats
    for k, n in ((3, 442), (1, 20), (8, 5000)):
        want = k * (n - 1) * (n + 1) / (n * (n - k)) * stats.f.ppf(0.99, k, n - k)
        assert math.isclose(t2_limit(k, n, 0.99), want, rel_tol=1e-12), SP
    assert LEVEL == 0.99


def _jackson_mudholkar(lam, level):
    """Q_α = θ₁[c√(2θ₂h₀²)/θ₁ + 1 + θ₂h₀(h₀−1)/θ₁²]^(1/h₀) (Jackson & Mudholkar,
    Technometrics 1979), written out independently of the module."""
    th = [sum(v**i for v in lam) for i in (1, 2, 3)]
    h0 = 1 - 2 * th[0] * th[2] / (3 * th[1] ** 2)
    c = stats.norm.ppf(level)
    return th[0] * (c * math.sqrt(2 * th[1] * h0**2) / th[0] + 1
                    + th[1] * h0 * (h0 - 1) / th[0] ** 2) ** (1 / h0)


def test_q_limit_is_the_jackson_mudholkar_formula(diabetes):
    lam = [0.31, 0.2, 0.12, 0.05, 0.01]
    got, how = q_limit(np.array(lam), 0.99)
    assert how.startswith("Jackson & Mudholkar")
    assert math.isclose(got, _jackson_mudholkar(lam, 0.99), rel_tol=1e-12), SP
    # the fitted diabetes model: its stored limit is the formula on its discarded eigenvalues
    x_s = diabetes[3]
    part, _ = fit_pca_domain(x_s, "all")
    eig = np.sort(np.linalg.eigvalsh(np.cov(x_s, rowvar=False)))[::-1]  # numpy's own ddof=1
    want = _jackson_mudholkar(eig[part["components"]:], 0.99)
    assert math.isclose(part["q_limit"], want, rel_tol=1e-9), SP


def test_q_limit_falls_back_to_the_chi2_moment_match_when_h0_is_not_positive():
    lam = np.array([1.0] + [0.01] * 1000)  # θ₁θ₃ > 1.5θ₂²: h₀ < 0
    got, how = q_limit(lam, 0.99)
    th1, th2 = lam.sum(), (lam**2).sum()
    # g·χ²_h with g = θ₂/θ₁, h = θ₁²/θ₂ (Box, Ann. Math. Statist. 1954), scipy.stats.chi2
    assert math.isclose(got, th2 / th1 * stats.chi2.ppf(0.99, th1**2 / th2), rel_tol=1e-12)
    assert "Box" in how


def test_too_few_rows_or_one_feature_give_no_check():
    rng = np.random.default_rng(0)
    assert fit_pca_domain(rng.standard_normal((9, 5)), "x") == (None, {})
    assert fit_pca_domain(rng.standard_normal((100, 1)), "x") == (None, {})
    part, _ = fit_pca_domain(rng.standard_normal((30, 50)), "x")
    assert part["components"] <= 3  # at most ⌊n/10⌋ so that n − k stays large


# -- the spectra-like scenario ------------------------------------------------------------
TRAIN_ROWS, FRESH_ROWS = 600, 4000


@pytest.fixture(scope="module")
def spectra_model(tmp_path_factory):
    from trainer.cli import main

    root = tmp_path_factory.mktemp("spectra")
    x, y = spectra(TRAIN_ROWS, seed=1)
    write_csv(root / "train.csv", x, y)
    store = root / "store"
    assert main(["train", str(root / "train.csv"), "--target", ",".join(TARGETS), "--name",
                 "nir", "--kernel", "rbf", "--gamma", "1e-5", "--ridge", "1e-3",
                 "--target-range", "0:100,0:100", "--release", "--no-report", "--quiet",
                 "--store", str(store)]) == 0
    return load_model(str(store), "nir"), x


def test_fresh_rows_are_flagged_at_about_the_stated_rate(spectra_model):
    model, _ = spectra_model
    fresh, _ = spectra(FRESH_ROWS, seed=2)
    _, env = model.score(fresh)
    # each check's limit is its 0.99 quantile: 1 % false alarms, give or take a binomial
    # 4-sigma band around the stated rate
    tol = 4 * math.sqrt(0.01 * 0.99 / FRESH_ROWS)
    for check in ("t2", "q"):
        rate = np.mean([check in e["flagged_by"] for e in env])
        assert abs(rate - (1 - LEVEL)) <= tol, (check, rate, tol)
        assert np.mean([e[check] > 1 for e in env]) == rate


def test_reversed_and_ramped_rows_are_flagged_inside_every_range(spectra_model):
    model, x = spectra_model
    for row in (reversed_row(x, 0), reversed_row(x, 7), ramp_row(x)):
        held = np.clip(row, model.lo, model.hi)  # no per-feature range can see it now
        _, env = model.score(held[None, :])
        e = env[0]
        assert e["out_of_range"] == {} and "range" not in e["flagged_by"]
        assert not e["inside"]
        assert {"t2", "q"} & set(e["flagged_by"]), e
    _, env = model.score(x[:50])
    assert np.mean([e["inside"] for e in env]) > 0.8  # training rows mostly inside


def test_manifest_states_the_rule_and_features_match(spectra_model):
    model, _ = spectra_model
    pca = model.manifest["envelope"]["pca"]
    assert pca["rows"] == TRAIN_ROWS and pca["level"] == 0.99
    assert 1 <= pca["components"] <= 10 and pca["explained_variance"] >= 0.95
    assert model.features == FEATURES
    assert model.manifest["arrays"]["pca_loadings"]["sha256"]


def test_nystrom_fits_the_check_on_its_sample_and_serves_it(tmp_path):
    from trainer.cli import main

    x, y = spectra(1500, seed=6)
    write_csv(tmp_path / "t.csv", x, y)
    assert main(["train", str(tmp_path / "t.csv"), "--target", ",".join(TARGETS), "--name",
                 "nys", "--method", "nystrom", "--landmarks", "100", "--gamma", "1e-5",
                 "--ridge", "1e-3", "--release", "--no-report", "--quiet",
                 "--store", str(tmp_path / "s")]) == 0
    model = load_model(str(tmp_path / "s"), "nys")
    env = model.manifest["envelope"]
    assert "uniform sample" in env["pca"]["rows_from"] and env["pca"]["rows"] < 1500
    assert "uniform sample" in env["target_ranges_from"]
    _, scored = model.score(np.clip(reversed_row(x, 0), model.lo, model.hi)[None, :])
    assert "q" in scored[0]["flagged_by"]
