"""Control limits (pcapipe.limits) against scipy.stats computations of the published formulas,
textbook identities and simulation under the assumptions the limits are derived for."""

import numpy as np
import pytest
from scipy import stats

from pcapipe.limits import (control_limits, estimate_theta2, spe_limit_box, spe_limit_jackson_mudholkar,
                            t2_limit_new, t2_limit_training, thetas_from_eigenvalues, thetas_from_matrix)

CASES = [  # (k, n, confidence): small n where the F and beta corrections matter, and large n
    (1, 10, 0.99),
    (3, 25, 0.95),
    (5, 120000, 0.99),
    (10, 200, 0.999),
]


@pytest.mark.parametrize("k,n,c", CASES)
def test_t2_new_row_limit_is_the_published_f_formula(k, n, c):
    # Tracy, Young & Mason (1992), J. Quality Technology 24(2), eq. 5 (future observation):
    # T2 ~ p (n+1)(n-1) / (n (n-p)) F(p, n-p)
    expected = k * (n + 1) * (n - 1) / (n * (n - k)) * stats.f(k, n - k).ppf(c)
    assert t2_limit_new(k, n, c) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("k,n,c", CASES)
def test_t2_training_limit_is_the_published_beta_formula(k, n, c):
    # Tracy, Young & Mason (1992), eq. 7 (observations used in the estimates):
    # T2 ~ (n-1)^2 / n Beta(p/2, (n-p-1)/2)
    expected = (n - 1) ** 2 / n * stats.beta(k / 2, (n - k - 1) / 2).ppf(c)
    assert t2_limit_training(k, n, c) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("n", [5, 30, 1000])
def test_t2_new_row_limit_with_one_component_is_the_student_prediction_interval(n):
    # One variable: a new x lies within xbar +- t_{n-1} s sqrt(1 + 1/n) (the textbook prediction
    # interval of a normal sample, e.g. Hahn & Meeker 1991, Statistical Intervals, sec. 4.6), so
    # T2 = (x - xbar)^2 / s^2 has the limit (1 + 1/n) t_{n-1}^2 at two-sided level c.
    c = 0.99
    expected = (1 + 1 / n) * stats.t(n - 1).ppf(1 - (1 - c) / 2) ** 2
    assert t2_limit_new(1, n, c) == pytest.approx(expected, rel=1e-10)


def _binomial_bound(p, trials, sigmas=4.0):
    """sigmas standard deviations of a binomial share (normal approximation)."""
    return sigmas * np.sqrt(p * (1 - p) / trials)


def test_t2_limits_hold_their_level_in_simulated_normal_samples():
    # Simulation under the limits' assumptions: many small normal samples (n = 20, k = 3 variables);
    # T2 of each training row against the beta limit and of one new row against the F limit.
    rng = np.random.default_rng(7)
    n, k, reps, c = 20, 3, 20000, 0.99
    x = rng.standard_normal((reps, n + 1, k))
    train, new = x[:, :n], x[:, n]
    mean = train.mean(axis=1, keepdims=True)
    dev = train - mean
    cov = np.einsum("rni,rnj->rij", dev, dev) / (n - 1)
    inv = np.linalg.inv(cov)
    t2_train = np.einsum("rni,rij,rnj->rn", dev, inv, dev)
    d_new = new - mean[:, 0]
    t2_new = np.einsum("ri,rij,rj->r", d_new, inv, d_new)
    share_new = np.mean(t2_new > t2_limit_new(k, n, c))
    # rows of one sample share its mean and covariance: use the spread of per-sample shares
    per_sample = np.mean(t2_train > t2_limit_training(k, n, c), axis=1)
    share_train = per_sample.mean()
    assert abs(share_new - (1 - c)) < _binomial_bound(1 - c, reps)
    assert abs(share_train - (1 - c)) < 4 * per_sample.std(ddof=1) / np.sqrt(reps)


SPECTRA = [  # discarded eigenvalues
    np.linspace(1.0, 0.3, 19),          # a flat tail (the demo's kind)
    0.5 ** np.arange(10),                # a geometric tail
    np.array([2.0, 0.1, 0.1, 0.05]),     # one dominant discarded eigenvalue
]


@pytest.mark.parametrize("tail", SPECTRA)
def test_spe_limits_are_the_published_formulas(tail):
    t1, t2, t3 = (np.sum(tail**i) for i in (1, 2, 3))
    c = 0.99
    # Box (1954), thm. 3.1, with Nomikos & MacGregor (1995) eq. 16: g chi2_h, g = v/(2m), h = 2m^2/v,
    # where m = theta1 and v = 2 theta2 are the mean and variance of SPE
    m, v = t1, 2 * t2
    assert spe_limit_box(t1, t2, c) == pytest.approx(v / (2 * m) * stats.chi2(2 * m**2 / v).ppf(c), rel=1e-12)
    # Jackson & Mudholkar (1979), Technometrics 21(3), eq. 3.4
    h0 = 1 - 2 * t1 * t3 / (3 * t2**2)
    ca = stats.norm.ppf(c)
    jm = t1 * (ca * np.sqrt(2 * t2 * h0**2) / t1 + 1 + t2 * h0 * (h0 - 1) / t1**2) ** (1 / h0)
    assert spe_limit_jackson_mudholkar(t1, t2, t3, c) == pytest.approx(jm, rel=1e-12)


@pytest.mark.parametrize("tail,jm_high", [
    (SPECTRA[0], 0.05),
    # few effective degrees of freedom (h0 = 0.14): Jackson-Mudholkar's normal approximation is
    # measured 7.6% above the quantile here (conservative); one reason the alarms use Box's limit
    (SPECTRA[1], 0.10),
    (SPECTRA[2], 0.05),
])
def test_spe_limits_approximate_the_exact_weighted_chi_square_quantile(tail, jm_high):
    # Under the model, SPE = sum_j lambda_j z_j^2 (z standard normal): simulate its 99% quantile
    # (400 000 draws: the quantile's sampling error is ~0.5%).  5% is the accuracy asserted for
    # Box's two-moment approximation (common practice, no source).
    rng = np.random.default_rng(3)
    spe = (rng.standard_normal((400000, tail.size)) ** 2) @ tail
    q = np.quantile(spe, 0.99)
    t1, t2, t3 = (np.sum(tail**i) for i in (1, 2, 3))
    assert spe_limit_box(t1, t2, 0.99) == pytest.approx(q, rel=0.05)
    jm = spe_limit_jackson_mudholkar(t1, t2, t3, 0.99)
    assert -0.05 < jm / q - 1 < jm_high


def test_thetas_from_the_matrix_match_the_discarded_eigenvalues(rng):
    d, k = 12, 3
    q, _ = np.linalg.qr(rng.standard_normal((d, d)))
    lam = np.r_[50.0, 20.0, 10.0, np.geomspace(1.0, 1e-7, d - k)]
    c = (q * lam) @ q.T
    w, v = np.linalg.eigh(c)
    w, v = w[::-1], v[:, ::-1]
    t1, t2 = thetas_from_matrix(c, v[:, :k], w[:k])
    ref = thetas_from_eigenvalues(lam, k)
    assert t1 == pytest.approx(ref[0], rel=1e-10)
    # the squared tail is ~1e0 next to ||C||_F^2 ~ 3e3: no digits lost to cancellation
    assert t2 == pytest.approx(ref[1], rel=1e-10)


def test_theta2_estimate_is_unbiased_with_the_stated_variance():
    # The variance formula of the orthonormal-probe estimator is derived in pcapipe.limits;
    # here it is checked against the empirical variance over many random first blocks.
    rng = np.random.default_rng(11)
    d, k, b = 40, 3, 11
    lam = np.r_[30.0, 15.0, 8.0, rng.uniform(0.2, 1.5, d - k)]
    q0, _ = np.linalg.qr(rng.standard_normal((d, d)))
    c = (q0 * lam) @ q0.T
    vec, val = q0[:, :k], lam[:k]
    rest = lam[k:]
    theta1, theta2, theta4 = rest.sum(), np.sum(rest**2), np.sum(rest**4)
    estimates, errors, bounds, inside = [], [], [], []
    for _ in range(4000):
        q, _ = np.linalg.qr(rng.standard_normal((d, b)))
        e = estimate_theta2(q, c @ q, vec, val, theta1)
        estimates.append(e.value)
        errors.append(e.std_error)
        bounds.append(e.std_bound)
        inside.append(e.low <= theta2 <= e.high)
    estimates = np.array(estimates)
    var_formula = 2 * d * (d - b) / (b * (d - 1) * (d + 2)) * (theta4 - theta2**2 / d)
    assert abs(estimates.mean() - theta2) < 4 * np.sqrt(var_formula / estimates.size)
    # 4000 draws: the variance's sampling error is ~2-5% (the terms are skewed)
    assert estimates.var() == pytest.approx(var_formula, rel=0.15)
    # the per-run standard error estimates the variance without bias ...
    assert np.mean(np.square(errors)) == pytest.approx(var_formula, rel=0.15)
    # ... the bound is a bound ...
    assert np.min(bounds) >= np.sqrt(var_formula)
    # ... and the stated 99% interval holds theta2 about that often (approximate: Student t on
    # skewed terms; 97% is the floor asserted, common practice, no source)
    assert np.mean(inside) > 0.97


def test_control_limits_record_marks_an_estimate_and_its_range():
    from pcapipe.limits import Theta2Estimate

    est = Theta2Estimate(2.0, 0.1, 0.2, 1.7, 2.3, 13)
    rec = control_limits(5, 1000, 24, 0.99, 5.5, 2.0, theta2_estimate=est)
    assert rec["estimated"] is True
    assert rec["precision"]["spe_low"] < rec["spe"] < rec["precision"]["spe_high"]
    assert rec["precision"]["spe_low"] == pytest.approx(spe_limit_box(5.5, 1.7, 0.99))
    exact = control_limits(5, 1000, 24, 0.99, 5.5, 2.0, theta3=0.9)
    assert exact["estimated"] is False and "precision" not in exact
    assert exact["spe_jackson_mudholkar"] == pytest.approx(spe_limit_jackson_mudholkar(5.5, 2.0, 0.9, 0.99))
