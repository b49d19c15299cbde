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


# ------------------------------------------------------------------------------------ weighted fits and intervals
def _noisy_line(seed, sig):
    rng = np.random.default_rng(seed)
    return 0.7 - 0.04 * SIZES + sig * rng.standard_normal(SIZES.size)


def test_weighted_fit_matches_curve_fit_and_polyfit():
    # reference: scipy.optimize.curve_fit(sigma=..., absolute_sigma=True) (covariance (J^T W J)^-1) and
    # numpy.polyfit with weights 1/sigma (same minimiser)
    from scipy.optimize import curve_fit

    sig = np.array([0.006, 0.009, 0.007, 0.008, 0.006, 0.009])
    y = _noisy_line(1, sig)
    f = linear_fit(SIZES, y, sig, absolute=True)
    p, cov = curve_fit(lambda x, a, b: a + b * x, SIZES, y, sigma=sig, absolute_sigma=True)
    np.testing.assert_allclose([f.intercept, f.slope], p, rtol=1e-9)
    np.testing.assert_allclose(f.covariance, cov, rtol=1e-7)
    np.testing.assert_allclose(np.polyfit(SIZES, y, 1, w=1 / sig)[::-1], p, rtol=1e-9)
    # errors from the scatter: curve_fit's absolute_sigma=False covariance (scaled by chi2/dof)
    _, cov_rel = curve_fit(lambda x, a, b: a + b * x, SIZES, y, sigma=sig, absolute_sigma=False)
    np.testing.assert_allclose(linear_fit(SIZES, y, sig, absolute=False).covariance, cov_rel, rtol=1e-7)
    # "inflate": the larger of the two, never below the points' own errors
    fi = linear_fit(SIZES, y, sig, absolute="inflate")
    expect = cov_rel if f.chi2 / f.dof > 1 else cov
    np.testing.assert_allclose(fi.covariance, expect, rtol=1e-7)
    assert np.all(np.diag(fi.covariance) >= np.diag(cov) * (1 - 1e-12))


def test_inflated_errors_grow_with_scatter_and_not_below_point_errors():
    # points scattered 5x more than their stated errors: the inflated parameter error grows by ~sqrt(chi2/dof)
    sig = np.full(SIZES.size, 0.002)
    y = _noisy_line(2, 5 * sig)
    f_abs = linear_fit(SIZES, y, sig, absolute=True)
    f_inf = linear_fit(SIZES, y, sig, absolute="inflate")
    assert f_inf.scale == pytest.approx(f_abs.chi2 / f_abs.dof) and f_inf.scale > 4
    assert f_inf.intercept_err == pytest.approx(f_abs.intercept_err * np.sqrt(f_inf.scale))
    # the extrapolation error of a fit to points with errors 0.006-0.009 is not far below those errors
    sig = np.array([0.006, 0.009, 0.007, 0.008, 0.006, 0.009])
    t = fit_inverse_size(SIZES, _noisy_line(3, sig), sig, absolute="inflate")
    e = extrapolate(t, np.inf)
    assert e.err > 0.5 * sig.min()


def test_constant_fit_is_the_weighted_mean():
    from largeq.analysis.fits import constant_fit

    y = np.array([1.0, 1.2, 0.9])
    s = np.array([0.1, 0.2, 0.1])
    c = constant_fit(y, s, absolute=True)
    w = 1 / s**2
    assert c.intercept == pytest.approx(np.average(y, weights=w))
    assert c.intercept_err == pytest.approx(np.sqrt(1 / w.sum()))
    assert c.predict(123.0)[0] == pytest.approx(c.intercept)


def test_prediction_interval_coverage_with_known_errors():
    # new point y* = a + b x* + e*, e* ~ N(0, s*): the 90 % prediction interval (variance s*^2 + g^T C g,
    # normal quantile) covers it 90 % of the time (binomial tolerance, 4 sigma)
    from largeq.analysis.fits import prediction_interval

    rng = np.random.default_rng(99)
    a, b, s, s_new = 1.0, 0.5, 0.05, 0.08
    M, hits = 1500, 0
    for _ in range(M):
        y = a + b * SIZES + s * rng.standard_normal(SIZES.size)
        f = linear_fit(SIZES, y, np.full(SIZES.size, s), absolute=True)
        y_new = a + b * 30.0 + s_new * rng.standard_normal()
        p = prediction_interval(f, 30.0, s_new, level=0.9)
        hits += p.low <= y_new <= p.high
    assert abs(hits / M - 0.9) < 4 * np.sqrt(0.9 * 0.1 / M)
