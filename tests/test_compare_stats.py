"""The numbers behind ``kridge compare``: error figures, the Newey–West variance and the
Diebold–Mariano test, each against a computation outside trainer/compare_stats.py."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from sklearn.metrics import mean_absolute_error, mean_squared_error

from trainer.compare_stats import (
    diebold_mariano,
    error_figures,
    newey_west_lag,
    newey_west_variance,
)


def test_error_figures_match_scikit_learn():
    # reference: scikit-learn's mean_squared_error / mean_absolute_error (sklearn.metrics)
    rng = np.random.default_rng(1)
    actual = rng.normal(size=200)
    predicted = actual + rng.normal(0.3, 1.0, 200)
    f = error_figures(actual, predicted)
    assert f["rmse"] == pytest.approx(math.sqrt(mean_squared_error(actual, predicted)), rel=1e-12)
    assert f["mae"] == pytest.approx(mean_absolute_error(actual, predicted), rel=1e-12)
    # bias = mean(actual − predicted): predictions 0.3 too high on average give about −0.3
    assert f["bias"] == pytest.approx(np.mean(actual - predicted), rel=1e-12)
    assert -0.45 < f["bias"] < -0.15
    assert error_figures([], [])["rows"] == 0


def test_newey_west_variance_by_hand():
    # Newey & West (1987): γ̂₀ + 2 Σ_{k≤L} (1 − k/(L+1)) γ̂_k, divisor n, here n = 5, L = 2,
    # d = (1, 3, 2, 5, 4): mean 3, deviations e = (−2, 0, −1, 2, 1)
    # γ̂₀ = (4 + 0 + 1 + 4 + 1)/5 = 2
    # γ̂₁ = (e2e1 + e3e2 + e4e3 + e5e4)/5 = (0 + 0 − 2 + 2)/5 = 0
    # γ̂₂ = (e3e1 + e4e2 + e5e3)/5 = (2 + 0 − 1)/5 = 0.2
    # V = 2 + 2·(2/3)·0 + 2·(1/3)·0.2 = 2.1333…
    d = np.array([1.0, 3.0, 2.0, 5.0, 4.0])
    assert newey_west_variance(d, 2) == pytest.approx(2.0 + 2.0 * (1.0 / 3.0) * 0.2, rel=1e-12)
    assert newey_west_variance(d, 0) == pytest.approx(np.var(d), rel=1e-12)


def test_lag_rule():
    # ⌊4 (n/100)^(2/9)⌋ (Newey & West 1994): 4 at n = 100, 5 at n = 300 (4·3^(2/9) = 5.11)
    assert newey_west_lag(100) == 4
    assert newey_west_lag(300) == 5
    assert newey_west_lag(2) == 1  # never more than n − 1


def _autocorrelated(n, rng):
    e = np.zeros(n)
    for i in range(1, n):
        e[i] = 0.7 * e[i - 1] + rng.normal()
    return e


def test_dm_with_hac_against_the_published_formula():
    # Diebold & Mariano (1995): DM = d̄ / √(2π f̂_d(0) / n) with the long-run variance
    # 2π f̂_d(0) estimated here by the Bartlett-weighted sum written out directly;
    # p = 2 (1 − Φ(|DM|)) with scipy.stats.norm
    rng = np.random.default_rng(7)
    n = 250
    truth = _autocorrelated(n, rng)
    live = truth + rng.normal(0, 1.0, n)     # residuals of the live version
    other = 0.8 * truth + rng.normal(0, 0.8, n)
    d = live**2 - other**2
    lag = int(4 * (n / 100) ** (2 / 9))
    e = d - d.mean()
    gam = [np.sum(e[k:] * e[: n - k]) / n for k in range(lag + 1)]
    var = gam[0] + 2 * sum((1 - k / (lag + 1)) * gam[k] for k in range(1, lag + 1))
    dm = d.mean() / math.sqrt(var / n)
    p = 2 * stats.norm.sf(abs(dm))
    got = diebold_mariano(live, other, ordered=True)
    assert got["lag"] == lag
    assert got["statistic"] == pytest.approx(dm, rel=1e-10)
    assert got["p_value"] == pytest.approx(p, rel=1e-8)
    assert (got["mean_difference"] > 0) == (dm > 0)


def test_dm_without_order_is_the_paired_t_statistic():
    # scipy.stats.ttest_rel on the squared errors gives t = d̄ / (s_d / √n), s_d with ddof 1:
    # our statistic equals it; our p-value is its large-sample normal form 2 (1 − Φ(|t|)),
    # close to ttest_rel's Student-t p-value at this n but not equal to it
    rng = np.random.default_rng(3)
    live = rng.normal(0, 1.2, 400)
    other = rng.normal(0, 1.0, 400)
    ref = stats.ttest_rel(live**2, other**2)
    got = diebold_mariano(live, other, ordered=False)
    assert got["statistic"] == pytest.approx(ref.statistic, rel=1e-10)
    assert got["p_value"] == pytest.approx(2 * stats.norm.sf(abs(ref.statistic)), rel=1e-8)
    assert abs(got["p_value"] - ref.pvalue) < 1e-3


def test_dm_degenerate_cases():
    same = np.array([1.0, -2.0, 0.5])
    assert diebold_mariano(same, same, ordered=False)["p_value"] is None  # d ≡ 0: no test
    assert diebold_mariano(same[:1], same[:1] * 2, ordered=True)["statistic"] is None


def test_dm_rejects_at_about_the_level_under_no_difference():
    # own scenario: two versions with equally good, independent errors; at level 0.05 the
    # plain DM test should reject in about 5 % of 400 seeded draws (binomial SD 1.1 %)
    rng = np.random.default_rng(11)
    rejections = sum(diebold_mariano(rng.normal(size=200), rng.normal(size=200),
                                     ordered=False)["p_value"] < 0.05 for _ in range(400))
    assert 0.02 <= rejections / 400 <= 0.09
