"""Finite-size fits (largeq.analysis.fits): slopes recovered from synthetic data, error bars that cover the truth.

Coverage tolerances: over M independent data sets the fraction f of 1-sigma intervals that contain the truth
is binomial with mean p and standard deviation sqrt(p(1 - p)/M); we accept |f - p| < 4 of those standard
deviations (false alarm ~ 6e-5). With known errors p = erf(1/sqrt(2)) = 0.6827; with errors from the
scatter p is the Student-t probability P(|T| < 1) for n - 2 degrees of freedom.
"""

import numpy as np
import pytest
from scipy import stats

from largeq.analysis.fits import extrapolate, fit_inverse_size, fit_log_deff, fit_log_sigma, linear_fit

SIZES = np.array([10, 12, 14, 16, 18, 20], dtype=float)


def test_exact_line_recovered():
    f = linear_fit([1, 2, 3, 4], [3, 5, 7, 9], absolute=False)
    assert f.slope == pytest.approx(2.0, abs=1e-12) and f.intercept == pytest.approx(1.0, abs=1e-12)
    assert f.slope_err < 1e-10


def test_log_deff_slope_from_noisy_data():
    rng = np.random.default_rng(7)
    a, s = 0.3, 0.55
    rel = 0.03
    d = np.exp(a + s * SIZES) * (1 + rel * rng.standard_normal(SIZES.size))
    t = fit_log_deff(SIZES, d, rel * d)
    rate, err = t.rate
    assert err == pytest.approx(rel / np.sqrt(np.sum((SIZES - SIZES.mean()) ** 2)), rel=0.05)
    assert abs(rate - s) < 4 * err


def test_log_sigma_decay_and_extrapolation_band():
    rng = np.random.default_rng(11)
    b, kappa = -0.5, 0.3
    sig = np.exp(b - kappa * SIZES) * np.exp(0.02 * rng.standard_normal(SIZES.size))
    t = fit_log_sigma(SIZES, sig, 0.02 * sig)
    k, kerr = t.rate
    assert abs(k - kappa) < 4 * kerr
    e = extrapolate(t, 32)
    truth = np.exp(b - kappa * 32)
    assert e.low < e.value < e.high
    # band in log space is symmetric: ln(high) - ln(value) = ln(value) - ln(low) = err
    assert np.log(e.high / e.value) == pytest.approx(np.log(e.value / e.low))
    assert abs(np.log(e.value / truth)) < 4 * e.err


def test_inverse_size_intercept():
    c_inf, c1 = 0.12, -1.7
    rng = np.random.default_rng(3)
    err = 0.002
    v = c_inf + c1 / SIZES + err * rng.standard_normal(SIZES.size)
    t = fit_inverse_size(SIZES, v, np.full(SIZES.size, err))
    c, ce = t.rate
    assert abs(c - c_inf) < 4 * ce
    assert extrapolate(t, np.inf).value == pytest.approx(c)


def _coverage(absolute: bool, M: int = 1500):
    rng = np.random.default_rng(12345)
    a, s, sigma = 1.0, 0.5, 0.05
    hits_slope = hits_pred = 0
    for _ in range(M):
        y = a + s * SIZES + sigma * rng.standard_normal(SIZES.size)
        f = linear_fit(SIZES, y, np.full(SIZES.size, sigma) if absolute else None, absolute=absolute)
        hits_slope += abs(f.slope - s) <= f.slope_err
        v, e = f.predict(32.0)
        hits_pred += abs(v - (a + s * 32.0)) <= e
    return hits_slope / M, hits_pred / M


def test_coverage_known_errors():
    p = stats.norm.cdf(1) - stats.norm.cdf(-1)
    tol = 4 * np.sqrt(p * (1 - p) / 1500)
    fs, fp = _coverage(True)
    assert abs(fs - p) < tol and abs(fp - p) < tol


def test_coverage_errors_from_scatter_follow_student_t():
    dof = SIZES.size - 2
    p = stats.t.cdf(1, dof) - stats.t.cdf(-1, dof)  # 0.626 for 4 degrees of freedom
    tol = 4 * np.sqrt(p * (1 - p) / 1500)
    fs, fp = _coverage(False)
    assert abs(fs - p) < tol and abs(fp - p) < tol


def test_bad_input_refused():
    with pytest.raises(ValueError):
        fit_log_deff([10, 12, 14], [1.0, -2.0, 3.0])
    with pytest.raises(ValueError):
        linear_fit([1, 1, 1], [1, 2, 3])
    with pytest.raises(ValueError):
        linear_fit([1, 2], [1, 2])  # scatter errors need 3 points
