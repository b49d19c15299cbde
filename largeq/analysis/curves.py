"""Analysis of one relaxation curve <A(t)> on a (uniform or non-uniform) time grid.

All averages are time-weighted (trapezoid rule), so a non-uniform grid is treated correctly.

Error bar of a window mean: standard error = std * sqrt(2 tau_int / T_window), with the integrated
autocorrelation time tau_int = dt (1/2 + sum_{k>=1} C(k)) of the curve resampled on a uniform grid, the
sum cut at the first k >= c * tau_int / dt with c = 5 (automatic windowing; A. D. Sokal, "Monte Carlo
methods in statistical mechanics: foundations and new algorithms", lecture notes 1996 - common
practice).  For a deterministic, quasi-periodic curve this treats the temporal fluctuations as noise
with the measured correlation time, which is the usual practical reading (common practice).

Relaxation time (physical units, independent of t_max): the 1/e time of the deviation from equilibrium,
t_relax = the first time after which |<A(t)> - A_ref| <= D_0 / e for the rest of the run, D_0 = |<A(t_0)> - A_ref|
the initial deviation and A_ref the diagonal-ensemble value when it is known, else the window mean (the
1/e rule is common practice).  For <A> = A_ref + B e^{-t/tau} it gives tau; for an oscillating transient
B e^{-t/tau} cos(omega t) the last crossing of the envelope, within half a period of tau.  It depends on the
run only through A_ref.  It is not defined (NaN, with a reason) when the fluctuation band
k sqrt(s^2 + err^2) is as wide as D_0 / e (the decay is not visible above the fluctuations), or when the
curve is still outside D_0 / e at the end of the run.

Band test (for the verdict only): raw points of a fluctuating curve leave a 2-sigma band about 5 % of the
time even after relaxation, so the test uses the centred rolling mean of d(t) = (<A(t)> - A_eq)^2 over a
short smoothing window w: ``band_entry`` = the first time after which sqrt(rolling mean of d) stays inside
k * sqrt(s^2 + err^2) (k = ``band``, default 2) to the end of the run, where s^2 = min(sigma_A^2,
(1.4826 MAD)^2) uses the robust median-absolute-deviation scale when it is smaller (a late excursion must
not widen the band meant to detect it; common practice).

Verdict against a known diagonal ensemble: with ``exact_equilibrium`` given, "settled" also needs
|window mean - exact| <= AGREE_Z * err; otherwise the status is "drifting" (the window halves still differ,
or the curve enters the band only inside the window) or "window too short", with the difference.
"""

from __future__ import annotations

from dataclasses import dataclass

import math

import numpy as np

__all__ = [
    "CurveAnalysis",
    "WindowMean",
    "running_average",
    "window_mean",
    "integrated_autocorrelation_time",
    "analyse_curve",
]

#: Sokal's automatic-window constant c (common practice: 4-10).
SOKAL_C = 5.0
#: Minimum number of independent samples T_window / (2 tau_int) for a trustworthy window (common practice).
MIN_INDEPENDENT = 10.0
#: Default rolling window for the relaxation-time test, in units of tau_int (common practice: 10 independent samples).
SMOOTH_TAUS = 20.0
#: Drift alarm threshold |m2 - m1| / sqrt(e1^2 + e2^2) (3 sigma, common practice).
DRIFT_Z = 3.0
#: Agreement with a known diagonal-ensemble value: |mean - exact| <= AGREE_Z err (3 sigma, common practice).
AGREE_Z = 3.0
#: The relaxation time is the time the deviation falls to 1/RELAX_FACTOR of its initial value (1/e).
RELAX_FACTOR = float(np.e)


def _check_curve(times, values):
    t = np.asarray(times, dtype=float).reshape(-1)
    v = np.asarray(values)
    if np.iscomplexobj(v):
        raise ValueError("values must be real (an expectation value of a Hermitian observable), got complex")
    v = v.astype(float).reshape(-1)
    if t.shape != v.shape:
        raise ValueError(f"times and values must have the same length, got {t.shape[0]} and {v.shape[0]}")
    if t.shape[0] < 8:
        raise ValueError(f"times must hold at least 8 points, got {t.shape[0]}")
    if not np.all(np.isfinite(t)) or not np.all(np.isfinite(v)):
        raise ValueError("times and values must be finite")
    if np.any(np.diff(t) <= 0):
        raise ValueError("times must be strictly increasing")
    return t, v


def _trapz_mean(t: np.ndarray, v: np.ndarray) -> float:
    return float(np.trapezoid(v, t) / (t[-1] - t[0]))


def running_average(times, values) -> np.ndarray:
    """Running time average (1/(t - t0)) int_{t0}^{t} <A(s)> ds by the trapezoid rule (units of A).

    The first entry is values[0].
    """
    t, v = _check_curve(times, values)
    inc = 0.5 * (v[1:] + v[:-1]) * np.diff(t)
    cum = np.concatenate([[0.0], np.cumsum(inc)])
    out = np.empty_like(v)
    out[0] = v[0]
    out[1:] = cum[1:] / (t[1:] - t[0])
    return out


def _uniform(t: np.ndarray, v: np.ndarray):
    dt = float(np.median(np.diff(t)))
    n = max(int(round((t[-1] - t[0]) / dt)) + 1, 2)
    tu = np.linspace(t[0], t[-1], n)
    return tu, np.interp(tu, t, v), (t[-1] - t[0]) / (n - 1)


def integrated_autocorrelation_time(times, values) -> float:
    """tau_int = dt (1/2 + sum_{k>=1} C(k)) with Sokal's automatic window (time units).

    The curve is linearly interpolated onto a uniform grid with the median spacing; the result is at
    least dt/2 (white noise) and is returned in the same units as ``times``.
    """
    t = np.asarray(times, dtype=float)
    v = np.asarray(values, dtype=float)
    _, u, dt = _uniform(t, v)
    x = u - u.mean()
    n = x.size
    var = float(np.dot(x, x) / n)
    if var <= 0:
        return 0.5 * dt
    f = np.fft.rfft(x, 2 * n)
    acf = np.fft.irfft(f * np.conj(f))[:n] / (n * var)  # C(k), biased estimator, C(0) = 1
    tau = 0.5
    for k in range(1, n):
        tau += acf[k]
        if k >= SOKAL_C * tau:
            break
    return max(float(tau), 0.5) * dt


@dataclass(frozen=True)
class WindowMean:
    """Time-weighted mean of a curve over a window, with its error bar.

    Attributes
    ----------
    mean, stderr : float
        Window average and standard error std * sqrt(2 tau_int / T_window) (units of the curve).
    std : float
        Time-weighted standard deviation in the window.
    tau_int : float
        Integrated autocorrelation time (time units).
    duration : float
        T_window (time units).
    n_independent : float
        T_window / (2 tau_int).
    """

    mean: float
    stderr: float
    std: float
    tau_int: float
    duration: float
    n_independent: float


def window_mean(times, values) -> WindowMean:
    """Mean over the whole given curve: (1/T) int A dt, stderr = std * sqrt(2 tau_int / T)."""
    t, v = _check_curve(times, values)
    mean = _trapz_mean(t, v)
    std = float(np.sqrt(max(_trapz_mean(t, (v - mean) ** 2), 0.0)))
    tau = integrated_autocorrelation_time(t, v)
    duration = float(t[-1] - t[0])
    stderr = std * float(np.sqrt(min(2.0 * tau / duration, 1.0)))
    return WindowMean(mean, stderr, std, tau, duration, duration / (2.0 * tau))


@dataclass(frozen=True)
class CurveAnalysis:
    """Relaxation analysis of one curve <A(t)> (units of A; time in inverse energy units).

    Attributes
    ----------
    times, values : ndarray
        The input curve.
    running_average : ndarray
        (1/(t - t0)) int_{t0}^{t} <A> ds.
    window_start, window_end : float
        The averaging window [window_start, window_end].
    window_rule : str
        How the window was chosen, in words.
    equilibrium, equilibrium_err : float
        Window mean and its standard error std * sqrt(2 tau_int / T_window).
    variance : float
        Temporal variance sigma_A^2 = time-average of (<A(t)> - equilibrium)^2 over the window.
    tau_int : float
        Integrated autocorrelation time in the window (time units).
    n_independent : float
        T_window / (2 tau_int).
    distance : ndarray
        d(t) = (<A(t)> - equilibrium)^2 on the whole grid.
    band : float
        k in the band equilibrium +- k sqrt(sigma_A^2 + err^2).
    band_halfwidth : float
        k sqrt(s^2 + err^2), s^2 = min(sigma_A^2, (1.4826 * median absolute deviation)^2) in the window.
    smoothing : float
        Width w of the rolling window used for the band test (time units).
    relaxation_time : float
        1/e time: first time after which |<A(t)> - A_ref| stays <= D_0 / e (see the module docstring); NaN
        when not defined (``relaxation_note`` says why).
    relaxation_threshold : float
        D_0 / e (units of A).
    relaxation_reference : str
        'diagonal ensemble' or 'window mean' (A_ref).
    relaxation_note : str
    band_entry : float
        First time after which sqrt(rolling mean of d) stays inside the band; NaN if never.
    drift_z : float
        |mean(second half) - mean(first half)| / combined error, within the window.
    exact_equilibrium : float or None
        The diagonal-ensemble value the window mean was checked against.
    exact_z : float or None
        |window mean - exact| / err.
    status : str
        'settled', 'drifting', 'window too short' (disagrees with the diagonal ensemble), 'undecided' (every
        check passes but the window holds fewer than MIN_INDEPENDENT correlation times) or 'not settled'.
    settled : bool
        True when none of the warnings below applies.
    reasons : tuple of str
        Plain sentences for every failed check (empty when settled).
    verdict : str
        One human-readable paragraph.
    """

    times: np.ndarray
    values: np.ndarray
    running_average: np.ndarray
    window_start: float
    window_end: float
    window_rule: str
    equilibrium: float
    equilibrium_err: float
    variance: float
    tau_int: float
    n_independent: float
    distance: np.ndarray
    band: float
    band_halfwidth: float
    smoothing: float
    relaxation_time: float
    drift_z: float
    settled: bool
    reasons: tuple
    verdict: str
    relaxation_threshold: float = float("nan")
    relaxation_reference: str = "window mean"
    relaxation_note: str = ""
    band_entry: float = float("nan")
    exact_equilibrium: float | None = None
    exact_z: float | None = None
    status: str = "settled"


def _rolling_mean(t: np.ndarray, v: np.ndarray, width: float) -> np.ndarray:
    """Centred, time-weighted rolling mean of v over [t - w/2, t + w/2] clipped to the grid."""
    inc = 0.5 * (v[1:] + v[:-1]) * np.diff(t)
    cum = np.concatenate([[0.0], np.cumsum(inc)])

    def integral(x):
        i = np.clip(np.searchsorted(t, x, side="right") - 1, 0, t.size - 2)
        frac = x - t[i]
        slope = (v[i + 1] - v[i]) / (t[i + 1] - t[i])
        return cum[i] + v[i] * frac + 0.5 * slope * frac**2

    lo = np.clip(t - width / 2, t[0], t[-1])
    hi = np.clip(t + width / 2, t[0], t[-1])
    span = hi - lo
    out = v.copy()
    ok = span > 0
    out[ok] = (integral(hi[ok]) - integral(lo[ok])) / span[ok]
    return out


def analyse_curve(
    times,
    values,
    *,
    window_start: float | None = None,
    band: float = 2.0,
    smoothing: float | None = None,
    exact_equilibrium: float | None = None,
) -> CurveAnalysis:
    """Equilibrium value, error bar, temporal variance and relaxation time of one curve <A(t)>.

    A_eq = (1/T_w) int_window <A> dt, err = std sqrt(2 tau_int / T_w), sigma_A^2 = (1/T_w) int_window d dt,
    d(t) = (<A(t)> - A_eq)^2; t_relax from sqrt(rolling mean d) <= band * sqrt(sigma_A^2 + err^2).

    Parameters
    ----------
    times : array_like
        Strictly increasing times (inverse energy units), uniform or not, at least 8 points.
    values : array_like
        Real <A(t)> (units of A).
    window_start : float, optional
        Start of the averaging window; default the middle of the run (the last half).
    band : float
        k of the band (default 2).
    smoothing : float, optional
        Rolling-window width w for the relaxation-time test (time units); default
        min(max(SMOOTH_TAUS tau_int, 2 % of the run, 3 median grid steps), 10 % of the run), SMOOTH_TAUS
        = 20, so the rolling mean of d averages ~10 independent samples and noise alone rarely crosses the
        band.  Used by the band test only, not by the relaxation time.
    exact_equilibrium : float, optional
        The diagonal-ensemble value when known (exact diagonalization): the relaxation time is measured
        from it, and "settled" requires the window mean to agree with it within AGREE_Z errors.

    Returns
    -------
    CurveAnalysis
        ``settled`` is False (with a sentence in ``reasons``) when the rolling deviation is outside the
        band at the end of the run, the curve settles only inside the window, the window holds fewer
        than ``MIN_INDEPENDENT`` correlation times, or the two window halves differ by more than
        ``DRIFT_Z`` combined errors.
    """
    t, v = _check_curve(times, values)
    if not (np.isfinite(band) and band > 0):
        raise ValueError(f"band must be a positive number (multiples of the fluctuation scale), got {band!r}")
    if window_start is None:
        w0 = 0.5 * (t[0] + t[-1])
        rule = "last half of the run (default)"
    else:
        w0 = float(window_start)
        if not (t[0] <= w0 < t[-1]):
            raise ValueError(f"window_start must lie in [{t[0]}, {t[-1]}), got {window_start!r}")
        rule = f"from t = {w0:g} to the end (user choice)"
    sel = t >= w0
    if np.count_nonzero(sel) < 8:
        raise ValueError(f"window_start = {w0:g} leaves {np.count_nonzero(sel)} points; at least 8 are needed")
    tw, vw = t[sel], v[sel]
    wm = window_mean(tw, vw)
    eq, err = wm.mean, wm.stderr
    variance = wm.std**2
    distance = (v - eq) ** 2
    # band scale: the smaller of the std and the robust 1.4826 * median |A - median| (common practice), so a
    # rare late excursion cannot widen the band that is meant to detect it
    robust = 1.4826 * float(np.median(np.abs(vw - np.median(vw))))
    scale2 = min(variance, robust**2)
    halfwidth = band * float(np.sqrt(scale2 + err**2))
    run = t[-1] - t[0]
    dt_med = float(np.median(np.diff(t)))
    if smoothing is None:
        smoothing = min(max(SMOOTH_TAUS * wm.tau_int, 0.02 * run, 3.0 * dt_med), 0.1 * run)
    elif not (smoothing > 0):
        raise ValueError(f"smoothing must be > 0 (time units), got {smoothing!r}")
    rms = np.sqrt(_rolling_mean(t, distance, float(smoothing)))
    inside = rms <= halfwidth
    reasons = []
    drifting = False
    if not inside[-1]:
        t_band = float("nan")
        drifting = True
        reasons.append(
            "The curve is outside the band equilibrium +- "
            f"{band:g} sqrt(sigma^2 + err^2) at the end of the run, so it has not settled (or leaves the band again)."
        )
    else:
        outside = np.flatnonzero(~inside)
        t_band = float(t[0]) if outside.size == 0 else float(t[outside[-1] + 1])
        if t_band > w0:
            drifting = True
            reasons.append(
                f"The curve enters the band for good only at t = {t_band:.4g}, after the window start "
                f"{w0:.4g}; the window still contains part of the transient - start it later or run longer."
            )
    # relaxation time: 1/e of the initial deviation from A_ref (physical units, independent of t_max)
    if exact_equilibrium is not None:
        exact_equilibrium = float(exact_equilibrium)
        if not np.isfinite(exact_equilibrium):
            raise ValueError(f"exact_equilibrium must be finite, got {exact_equilibrium!r}")
        a_ref, ref_name = exact_equilibrium, "diagonal ensemble"
    else:
        a_ref, ref_name = eq, "window mean"
    dev = np.abs(v - a_ref)
    d0 = float(dev[0])
    threshold = d0 / RELAX_FACTOR
    if not threshold > halfwidth:
        t_relax = float("nan")
        relax_note = (f"not defined: the initial deviation {d0:.3g} is within e x the fluctuation band "
                      f"{halfwidth:.3g}, so no decay is visible above the fluctuations")
    elif dev[-1] > threshold:
        t_relax = float("nan")
        relax_note = (f"not reached: the deviation from the {ref_name} is still above 1/e of its initial value "
                      f"({threshold:.3g}) at the end of the run")
    else:
        above = np.flatnonzero(dev > threshold)
        t_relax = float(t[above[-1] + 1]) if above.size else float(t[0])
        relax_note = (f"1/e time: |A(t) - A_ref| <= {threshold:.3g} = |A(0) - A_ref| / e from then on "
                      f"(A_ref = {ref_name} {a_ref:.6g})")
    if wm.n_independent < MIN_INDEPENDENT:
        reasons.append(
            f"The window holds only {math.floor(wm.n_independent * 100) / 100:g} correlation times (T_window / 2 tau_int, "
            f"tau_int = {wm.tau_int:.3g}); at least {MIN_INDEPENDENT:g} are needed for a reliable error bar."
        )
    # drift test: half means, errors from the fluctuations about a linear trend in the window
    mid = 0.5 * (tw[0] + tw[-1])
    first, second = tw <= mid, tw >= mid
    drift_z = 0.0
    if np.count_nonzero(first) >= 4 and np.count_nonzero(second) >= 4:
        m1 = _trapz_mean(tw[first], vw[first])
        m2 = _trapz_mean(tw[second], vw[second])
        coef = np.polyfit(tw - mid, vw, 1)
        resid = vw - np.polyval(coef, tw - mid)
        r_std = float(np.sqrt(_trapz_mean(tw, resid**2)))
        r_tau = integrated_autocorrelation_time(tw, resid)
        e1 = r_std * np.sqrt(min(2 * r_tau / (tw[first][-1] - tw[0]), 1.0))
        e2 = r_std * np.sqrt(min(2 * r_tau / (tw[-1] - tw[second][0]), 1.0))
        comb = float(np.hypot(e1, e2))
        drift_z = abs(m2 - m1) / comb if comb > 0 else (0.0 if m1 == m2 else float("inf"))
        if drift_z > DRIFT_Z:
            drifting = True
            reasons.append(
                f"The running average still drifts: the two halves of the window differ by {m2 - m1:.3g}, "
                f"{drift_z:.1f} times their combined error."
            )
    exact_z = None
    status = "settled"
    if exact_equilibrium is not None:
        diff = eq - exact_equilibrium
        exact_z = abs(diff) / err if err > 0 else (0.0 if diff == 0 else float("inf"))
        if exact_z > AGREE_Z:
            status = "drifting" if drifting else "window too short"
            reasons.append(
                f"The window mean {eq:.6g} +- {err:.2g} differs from the exact diagonal-ensemble value "
                f"{exact_equilibrium:.6g} by {diff:+.3g} ({exact_z:.1f} errors; "
                + ("the curve is still drifting" if drifting else
                   "the window is too short: the slow part of the relaxation is not averaged out")
                + "): run longer or start the window later."
            )
    settled = not reasons
    if not settled and status == "settled":
        # no drift, inside the band, agrees with the diagonal ensemble where known: only the error bar is not
        # yet trustworthy (too few correlation times in the window) -- undecided, not a failure to settle
        status = "drifting" if drifting else ("undecided" if wm.n_independent < MIN_INDEPENDENT else "not settled")
    head = (
        f"equilibrium {eq:.6g} +- {err:.2g} (window t in [{w0:.4g}, {t[-1]:.4g}], {rule}); "
        f"temporal variance sigma^2 = {variance:.3g}; tau_int = {wm.tau_int:.3g}"
    )
    if exact_equilibrium is not None:
        head += f"; diagonal ensemble {exact_equilibrium:.6g} ({exact_z:.1f} errors away)"
    if settled:
        verdict = f"Settled: {head}; relaxation time {t_relax:.4g} ({relax_note})."
    elif status == "undecided":
        verdict = ("Undecided: " + head + ". " + " ".join(reasons) + " Nothing else fails: run longer to decide."
                   + f" Relaxation time {t_relax:.4g} ({relax_note}).")
    else:
        verdict = (f"Not settled ({status}): " + head + ". " + " ".join(reasons)
                   + f" Relaxation time {t_relax:.4g} ({relax_note}).")
    return CurveAnalysis(
        times=t,
        values=v,
        running_average=running_average(t, v),
        window_start=float(w0),
        window_end=float(t[-1]),
        window_rule=rule,
        equilibrium=eq,
        equilibrium_err=err,
        variance=variance,
        tau_int=wm.tau_int,
        n_independent=wm.n_independent,
        distance=distance,
        band=float(band),
        band_halfwidth=halfwidth,
        smoothing=float(smoothing),
        relaxation_time=t_relax,
        drift_z=float(drift_z),
        settled=settled,
        reasons=tuple(reasons),
        verdict=verdict,
        relaxation_threshold=float(threshold),
        relaxation_reference=ref_name,
        relaxation_note=relax_note,
        band_entry=t_band,
        exact_equilibrium=exact_equilibrium,
        exact_z=None if exact_z is None else float(exact_z),
        status=status,
    )
