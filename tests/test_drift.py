"""The drift check's numbers against outside references, and its calibration.

References: scipy's energy distance (Sejdinovic, Sriperumbudur, Gretton & Fukumizu, Ann.
Statist. 41 (2013): the distance-induced kernel's MMD is half the energy distance),
scikit-learn's rbf kernel in a direct pairwise sum (the U-statistic, Gretton et al., JMLR 13
(2012), eq. 3), scipy's pdist for the median heuristic, and hyppo's k-sample MMD test.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy
from scipy.spatial.distance import pdist
from scipy.stats import energy_distance
from sklearn.metrics.pairwise import rbf_kernel

from service.drift import (
    drift_kernel,
    median_gamma,
    mmd2_biased,
    mmd2_unbiased,
    mmd_test,
    permutation_test,
)
from service.kernels import KernelSpec, kernel_matrix


def _blocks(k: np.ndarray, n: int):
    return k[:n, :n], k[n:, n:], k[:n, n:]


def test_biased_mmd_of_distance_kernel_is_half_energy_distance():
    # Sejdinovic et al. 2013: k(a, b) = ½(|a| + |b| − |a − b|) gives MMD²_b = E / 2 with
    # E = 2E|X−Y| − E|X−X'| − E|Y−Y'|; scipy.stats.energy_distance returns √E (1-D samples)
    rng = np.random.default_rng(3)
    x, y = rng.normal(size=37), rng.gamma(2.0, size=29)
    z = np.concatenate([x, y])
    k = 0.5 * (np.abs(z)[:, None] + np.abs(z)[None, :] - np.abs(z[:, None] - z[None, :]))
    energy = energy_distance(x, y) ** 2  # scipy, version below
    assert mmd2_biased(*_blocks(k, 37)) == pytest.approx(energy / 2, rel=1e-12), scipy.__version__


def test_permutation_statistic_is_the_u_statistic_for_any_kernel():
    rng = np.random.default_rng(4)
    z = rng.normal(size=(45, 2))
    k = kernel_matrix(KernelSpec("laplacian", gamma=0.7), z)
    observed, _p = permutation_test(k, 20, 5, rng)
    assert observed == pytest.approx(mmd2_unbiased(*_blocks(k, 20)), rel=1e-12, abs=1e-15)


def test_rbf_u_statistic_matches_a_direct_pairwise_sum_with_sklearn():
    # the unbiased estimator of Gretton et al. 2012, eq. 3, written out pair by pair with
    # scikit-learn's rbf_kernel (sklearn.metrics.pairwise) as the kernel
    rng = np.random.default_rng(5)
    x, y, gamma = rng.normal(size=(30, 3)), rng.normal(0.4, 1.2, size=(24, 3)), 0.25
    kxx, kyy, kxy = rbf_kernel(x, x, gamma=gamma), rbf_kernel(y, y, gamma=gamma), \
        rbf_kernel(x, y, gamma=gamma)
    n, m = len(x), len(y)
    sxx = sum(kxx[i, j] for i in range(n) for j in range(n) if i != j)
    syy = sum(kyy[i, j] for i in range(m) for j in range(m) if i != j)
    sxy = sum(kxy[i, j] for i in range(n) for j in range(m))
    direct = sxx / (n * (n - 1)) + syy / (m * (m - 1)) - 2 * sxy / (n * m)
    _spec, statistic, _p = mmd_test(KernelSpec("rbf", gamma=gamma), x, y, 3,
                                    np.random.default_rng(0))
    assert statistic == pytest.approx(direct, rel=1e-10)


def test_median_heuristic_is_half_inverse_squared_median_distance():
    # the median heuristic (Gretton et al. 2012, section 8); distances from scipy's pdist
    rows = np.random.default_rng(6).normal(size=(60, 4))
    assert median_gamma(rows) == pytest.approx(1 / (2 * np.median(pdist(rows)) ** 2), rel=1e-9)


@pytest.mark.parametrize("name", ["linear", "polynomial", "sigmoid"])
def test_kernels_without_characteristic_form_give_way_to_rbf(name):
    spec = KernelSpec(name, **{k: 0.5 for k in ("gamma", "coef0") if name != "linear"},
                      **({"degree": 2.0} if name == "polynomial" else {}))
    rows = np.random.default_rng(7).normal(size=(50, 2))
    used = drift_kernel(spec, rows, np.random.default_rng(0))
    assert used.name == "rbf" and used.gamma == pytest.approx(median_gamma(rows))


@pytest.mark.parametrize("name", ["rbf", "laplacian", "matern32", "matern52"])
def test_characteristic_kernels_are_kept(name):
    spec = KernelSpec(name, gamma=0.3)
    assert drift_kernel(spec, np.zeros((5, 2)), np.random.default_rng(0)) is spec


def test_statistic_agrees_with_hyppo():
    # hyppo (PyPI hyppo 0.5.2) computes MMD through its HSIC/Dcorr equivalence, a statistic
    # proportional to MMD²_u over the splits of one pooled sample: the ratio must be constant
    hyppo = pytest.importorskip("hyppo.ksample")
    rng = np.random.default_rng(8)
    z, n, gamma = rng.normal(size=(60, 2)), 35, 0.3
    z[n:] += 0.4
    k = kernel_matrix(KernelSpec("rbf", gamma=gamma), z)
    ratios = []
    for _ in range(6):
        p = rng.permutation(len(z))
        ours = mmd2_unbiased(*_blocks(k[np.ix_(p, p)], n))
        theirs = hyppo.MMD(compute_kernel="rbf", gamma=gamma).statistic(z[p][:n], z[p][n:])
        ratios.append(theirs / ours)
    assert np.ptp(ratios) <= 1e-9 * abs(np.mean(ratios))


def test_p_value_agrees_with_hyppo_within_monte_carlo_error():
    hyppo = pytest.importorskip("hyppo.ksample")
    rng = np.random.default_rng(9)
    x, y, gamma = rng.normal(size=(40, 2)), rng.normal(size=(40, 2)), 0.3
    y[:, 0] += 0.45
    _s, _stat, ours = mmd_test(KernelSpec("rbf", gamma=gamma), x, y, 2000, rng)
    _t, theirs = hyppo.MMD(compute_kernel="rbf", gamma=gamma).test(x, y, reps=2000, auto=False,
                                                                  random_state=1)
    # two independent Monte Carlo estimates of one p-value: 4 standard errors of the difference
    band = 4 * np.sqrt(2 * max(ours, 0.01) * (1 - ours) / 2000)
    assert abs(ours - theirs) <= band, (ours, theirs)


def test_p_value_is_one_plus_count_over_one_plus_permutations():
    rng = np.random.default_rng(10)
    x, y = rng.normal(size=(30, 2)), rng.normal(size=(30, 2)) + 3.0
    _spec, _stat, p = mmd_test(KernelSpec("rbf", gamma=0.5), x, y, 99, rng)
    assert p == pytest.approx(1 / 100)  # nothing permuted reaches a 3-sd shift
    _spec, _stat, p = mmd_test(KernelSpec("rbf", gamma=0.5), x, x.copy(), 99, rng)
    assert p * 100 == pytest.approx(round(p * 100)) and p > 0.5


def test_false_alarm_rate_at_level_005_under_no_drift():
    # 200 seeded draws of 50 + 50 rows from one distribution, 199 permutations each: the
    # alarm (p < 0.05) count is Binomial(200, ≤ 0.05); 0.01–0.10 is about ±3 sd around 0.05
    rng = np.random.default_rng(11)
    spec = KernelSpec("linear")  # exercises the median-heuristic rbf too
    alarms = sum(mmd_test(spec, rng.normal(size=(50, 3)), rng.normal(size=(50, 3)), 199,
                          rng)[2] < 0.05 for _ in range(200))
    assert 0.01 <= alarms / 200 <= 0.10, alarms


def test_power_against_half_sd_mean_shift_at_200_rows():
    # README, "Drift": 200 training and 200 new rows of 3 standard normal features, one
    # feature shifted by 0.5 sd; 100 seeded draws, 199 permutations, alarm at p < 0.05
    rng = np.random.default_rng(12)
    hits = 0
    for _ in range(100):
        x, y = rng.normal(size=(200, 3)), rng.normal(size=(200, 3))
        y[:, 0] += 0.5
        hits += mmd_test(KernelSpec("rbf", gamma=1 / 3), x, y, 199, rng)[2] < 0.05
    assert hits / 100 >= 0.8, hits
