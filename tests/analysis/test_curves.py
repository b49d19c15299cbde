"""Tests of largeq.analysis.curves on synthetic curves and one exact quench."""

import numpy as np
import pytest
import scipy.signal

from largeq.analysis.curves import (analyse_curve, integrated_autocorrelation_time, running_average,
                                    window_mean)
from largeq.engines.exact import diagonalize, quench_exact

from .._exact_models import mixed_field_ising, site_op

A0, B, TAU, OMEGA, SIGMA, TAU_C = 0.3, 1.0, 5.0, 2.0, 0.02, 0.5


def _ar1(rng, n, dt, sigma, tau_c):
    """Stationary Gaussian AR(1) noise with std sigma and correlation time tau_c (tau_int = tau_c)."""
    phi = np.exp(-dt / tau_c)
    e = rng.normal(size=n) * sigma * np.sqrt(1 - phi**2)
    e[0] = rng.normal() * sigma
    return scipy.signal.lfilter([1.0], [1.0, -phi], e)


def _damped(seed, T=200.0, dt=0.05):
    rng = np.random.default_rng(seed)
    t = np.arange(0.0, T + dt / 2, dt)
    return t, A0 + B * np.exp(-t / TAU) * np.cos(OMEGA * t) + _ar1(rng, t.size, dt, SIGMA, TAU_C)


def test_equilibrium_error_bar_coverage():
    # 100 seeded damped oscillations with correlated noise: a correct standard error covers the true value
    # ~68 % of the time at 1 sigma and ~95 % at 2 sigma. Binomial(100, 0.68) has std 0.047: the 1-sigma
    # band [0.50, 0.85] is ~ -4/+3.6 std wide (fails for errors off by ~30 %); 2-sigma coverage >= 0.85.
    z = []
    for seed in range(100):
        t, v = _damped(seed)
        r = analyse_curve(t, v)
        z.append(abs(r.equilibrium - A0) / r.equilibrium_err)
    z = np.array(z)
    assert 0.50 <= np.mean(z <= 1) <= 0.85
    assert np.mean(z <= 2) >= 0.85


def test_tau_int_of_ar1_noise():
    # AR(1) with phi = exp(-dt/tau_c): tau_int = dt (1/2 + phi/(1 - phi)) ~ tau_c (from memory, standard
    # result); Sokal windowing biases it low by a few %, 20 % tolerance covers that plus the sampling error
    rng = np.random.default_rng(1)
    dt = 0.05
    x = _ar1(rng, 40000, dt, 1.0, TAU_C)
    t = np.arange(x.size) * dt
    assert integrated_autocorrelation_time(t, x) == pytest.approx(TAU_C, rel=0.2)
    white = rng.normal(size=4000)
    assert integrated_autocorrelation_time(t[:4000], white) == pytest.approx(dt / 2, rel=0.3)


def test_band_entry_near_analytic():
    # rolling mean of d: B^2 e^{-2t/tau}/2 + s^2 = k^2 s^2 (k = 2, err << s) -> t* = (tau/2) ln(B^2 / (6 s^2))
    # (derived). The centred rolling window w reaches w/2 back into the transient, delaying the crossing
    # by at most ~w/2; single runs also scatter by ~1 time unit (measured over 100 seeds: 15.0-18.1).
    t_star = TAU / 2 * np.log(B**2 / (6 * SIGMA**2))
    rts, widths = [], []
    for seed in range(20):
        t, v = _damped(seed)
        r = analyse_curve(t, v)
        assert r.settled, r.verdict
        rts.append(r.band_entry)
        widths.append(r.smoothing)
    w = np.mean(widths)
    assert t_star - 1.0 <= np.median(rts) <= t_star + w / 2
    assert np.all((np.array(rts) > t_star - 3.0) & (np.array(rts) < t_star + w / 2 + 2.0))
    r = analyse_curve(*_damped(0))
    assert r.variance == pytest.approx(SIGMA**2, rel=0.3)  # noise variance; 30 %: ~100 independent samples
    assert "Settled" in r.verdict and "last half" in r.window_rule


def test_relaxation_time_is_the_one_over_e_time():
    # A0 + B e^{-t/tau} cos(omega t): the deviation stays below B/e after the last time the envelope-times-
    # cosine exceeds it (derived; noise of 0.02 moves the crossing by < 0.1 on the 0.05 grid)
    tt = np.arange(0.0, 50.0, 1e-4)
    exact = tt[np.flatnonzero(np.exp(-tt / TAU) * np.abs(np.cos(OMEGA * tt)) > np.exp(-1.0))[-1]]
    assert TAU - np.pi / OMEGA <= exact <= TAU  # within half a period of tau
    for seed in range(5):
        t, v = _damped(seed)
        r = analyse_curve(t, v, exact_equilibrium=A0)
        assert abs(r.relaxation_time - exact) < 0.15, (r.relaxation_time, exact)
        assert r.relaxation_reference == "diagonal ensemble"


@pytest.mark.parametrize("t_max", [20.0, 200.0, 2000.0])
def test_relaxation_time_independent_of_t_max_exponential(t_max):
    # A = 0.2 + 0.8 exp(-t / 3): the 1/e time is exactly tau = 3 (definition), whatever the run length
    t = np.linspace(0.0, t_max, int(t_max / 0.01) + 1)
    r = analyse_curve(t, 0.2 + 0.8 * np.exp(-t / 3.0), exact_equilibrium=0.2)
    assert r.relaxation_time == pytest.approx(3.0, abs=0.011)
    # with the window mean as reference (no exact value): the same to the window's bias e^{-t_max/2tau}
    r2 = analyse_curve(t, 0.2 + 0.8 * np.exp(-t / 3.0))
    assert r2.relaxation_time == pytest.approx(3.0, abs=0.05)


def test_relaxation_time_of_bessel_curve_independent_of_t_max():
    # XX chain from the Neel state: <sigma^z_0(t)> = J0(2t) in the infinite chain (Flesch et al., PRA 78,
    # 033608 (2008)); equilibrium 0. The deviation |J0(2t)| falls below 1/e for good after the last local
    # maximum of |J0| above 1/e; located with scipy (brentq on |J0(2t)| - 1/e), the same for every t_max.
    from scipy.optimize import brentq
    from scipy.special import j0

    f = lambda x: abs(j0(2 * x)) - np.exp(-1.0)
    # |J0(2t)| local maxima sit near the zeros of J1(2t); the last one above 1/e is the second (t ~ 1.75)
    xs = np.linspace(0.01, 20, 200001)
    above = np.flatnonzero(np.abs(j0(2 * xs)) > np.exp(-1.0))
    k = above[-1]
    t_ref = brentq(f, xs[k], xs[k + 1])
    got = []
    for t_max in (10.0, 40.0, 160.0):
        t = np.arange(0.0, t_max + 1e-9, 0.005)
        r = analyse_curve(t, j0(2 * t), exact_equilibrium=0.0)
        got.append(r.relaxation_time)
        assert r.relaxation_time == pytest.approx(t_ref, abs=0.006)
    assert max(got) - min(got) < 1e-9


def test_linear_drift_is_not_settled():
    rng = np.random.default_rng(2)
    t = np.linspace(0.0, 200.0, 4001)
    v = 0.3 + 1e-3 * t + SIGMA * rng.normal(size=t.size)
    r = analyse_curve(t, v)
    assert not r.settled
    assert r.drift_z > 3
    assert any("drift" in s for s in r.reasons) and r.verdict.startswith("Not settled")


def test_leaves_band_near_end():
    rng = np.random.default_rng(3)
    t = np.linspace(0.0, 200.0, 4001)
    v = 0.3 + SIGMA * rng.normal(size=t.size) + np.where(t > 190, 0.5, 0.0)
    r = analyse_curve(t, v)
    assert not r.settled and np.isnan(r.relaxation_time)
    assert any("end of the run" in s for s in r.reasons)


def test_window_too_short_for_correlation_time():
    # a slow oscillation (period 150) seen over a window of 100: too few correlation times
    t = np.linspace(0.0, 200.0, 2001)
    v = 0.3 + 0.1 * np.sin(2 * np.pi * t / 150.0)
    r = analyse_curve(t, v)
    assert not r.settled
    assert any("correlation times" in s for s in r.reasons)


def test_transient_inside_window_flagged():
    rng = np.random.default_rng(4)
    t = np.linspace(0.0, 200.0, 4001)
    v = A0 + np.exp(-t / 60.0) * np.cos(2 * t) + SIGMA * rng.normal(size=t.size)
    r = analyse_curve(t, v, window_start=20.0)
    assert not r.settled and r.relaxation_time > 20.0
    assert "user choice" in r.window_rule and r.window_start == 20.0


def test_running_average_nonuniform_grid():
    rng = np.random.default_rng(5)
    t = np.sort(np.concatenate([[0.0, 10.0], rng.uniform(0, 10, 300)]))
    # linear curve: the trapezoid rule is exact, running average of v = t is t/2
    ra = running_average(t, t)
    np.testing.assert_allclose(ra[1:], t[1:] / 2, rtol=1e-12)
    # cos t: running average sin(t)/t; trapezoid error <= max dt^2/12 (dt <= 0.2 here) -> 5e-3
    ra = running_average(t, np.cos(t))
    np.testing.assert_allclose(ra[1:], np.sin(t[1:]) / t[1:], atol=5e-3)
    wm = window_mean(t, np.cos(t))
    assert wm.mean == pytest.approx(np.sin(10.0) / 10.0, abs=5e-3)


def test_exact_quench_curve_analysis():
    # exact <sigma^x_3(t)> after a quench of the mixed-field Ising chain (L = 8, full space, a random real
    # state): the window estimates must agree with the exact diagonal-ensemble value within 4 error bars,
    # and the window variance with the exact sigma^2 within 30 % (~100 correlation times in the window give
    # a ~15 % sampling error on a variance of a quasi-random signal).
    L = 8
    rng = np.random.default_rng(6)
    psi = rng.normal(size=2**L)
    psi /= np.linalg.norm(psi)
    q = quench_exact(diagonalize(mixed_field_ising(L).toarray()), psi, {"x3": site_op(L, 3, "X").toarray().real})
    t = np.linspace(0.0, 600.0, 12001)
    r = analyse_curve(t, q.curve(t, "x3"))
    o = q.observables["x3"]
    assert abs(r.equilibrium - o.equilibrium) < 4 * r.equilibrium_err
    assert r.variance == pytest.approx(o.variance, rel=0.3)
    assert r.n_independent > 50


@pytest.mark.parametrize(
    "args, kwargs, match",
    [
        ((np.arange(5.0), np.arange(5.0)), {}, "at least 8"),
        ((np.arange(10.0), np.arange(9.0)), {}, "same length"),
        ((np.arange(10.0)[::-1], np.arange(10.0)), {}, "increasing"),
        ((np.arange(20.0), np.arange(20.0)), {"band": -1.0}, "band"),
        ((np.arange(20.0), np.arange(20.0)), {"window_start": 50.0}, "window_start"),
        ((np.arange(20.0), np.arange(20.0) * 1j), {}, "real"),
    ],
)
def test_argument_errors(args, kwargs, match):
    with pytest.raises(ValueError, match=match):
        analyse_curve(*args, **kwargs)
