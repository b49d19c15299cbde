"""Equilibration bounds, level statistics and effective-dimension estimates.

* ``fluctuation_bound``: upper bounds on the infinite-time (or finite-time) variance sigma_A^2 of
  <A(t)> about its diagonal-ensemble value.
* ``level_spacing_ratio``: mean ratio of consecutive level spacings in one fully resolved sector.
* ``amplitude_eta`` and ``deff_from_densities``: sum_m |c_m|^4 from smooth densities (KPM or binned),
  a random-matrix estimate.
* ``survival_plateau``: late-time average of the survival probability as a rough sum p^2 estimate.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from largeq.analysis.curves import window_mean

__all__ = [
    "POISSON_R",
    "GOE_R",
    "GUE_R",
    "Bound",
    "FiniteTime",
    "fluctuation_bound",
    "SpacingRatio",
    "level_spacing_ratio",
    "amplitude_eta",
    "DeffEstimate",
    "deff_from_densities",
    "PlateauEstimate",
    "survival_plateau",
    "DEFF_ASSUMPTION",
]

#: <r> for Poisson level statistics, 2 ln 2 - 1 (V. Oganesyan & D. A. Huse, PRB 75, 155111 (2007)).
POISSON_R = 2.0 * np.log(2.0) - 1.0
#: <r> for the large-N GOE, 0.5307(1) (Y. Y. Atas, E. Bogomolny, O. Giraud & G. Roux, PRL 110, 084101 (2013)).
GOE_R = 0.5307
#: <r> for the large-N GUE, 0.5996(1) (Atas et al., PRL 110, 084101 (2013)).
GUE_R = 0.5996


# ---------------------------------------------------------------------------------------------------
# fluctuation bounds


@dataclass(frozen=True)
class FiniteTime:
    """Finite averaging time for the Short-Farrelly bound.

    Attributes
    ----------
    duration : float
        T, the length of the averaging interval [0, T] (inverse energy units).
    eps : float
        Energy resolution epsilon (energy units).
    max_gaps : int
        N(eps): largest number of level pairs with gaps in one interval of width eps.
    n_levels : int
        d_E, the number of distinct energies (occupied levels suffice).
    """

    duration: float
    eps: float
    max_gaps: int
    n_levels: int


@dataclass(frozen=True)
class Bound:
    """An upper bound on sigma_A^2 (units of A squared).

    Attributes
    ----------
    value : float
        The bound.
    variant : str
        'norm' (||A||^2 / d_eff), 'range' ((a_max - a_min)^2 / (4 d_eff)), with suffix '+gaps' when
        multiplied by D_G and '+finite-time' for the Short-Farrelly finite-T form.
    formula : str
        The formula evaluated, in words.
    spread2 : float
        ||A||^2 or (a_max - a_min)^2 / 4, whichever was used.
    d_eff : float
    gap_factor : float
        D_G, or N(eps) at finite time.
    time_factor : float
        1 + 8 log2(d_E) / (eps T), or 1.
    reference : str
    """

    value: float
    variant: str
    formula: str
    spread2: float
    d_eff: float
    gap_factor: float
    time_factor: float
    reference: str

    def holds(self, variance: float, rtol: float = 1e-10) -> bool:
        """True when variance <= value (1 + rtol)."""
        return bool(variance <= self.value * (1.0 + rtol))


def fluctuation_bound(
    norm: float,
    d_eff: float,
    *,
    a_min: float | None = None,
    a_max: float | None = None,
    gap_degeneracy: int = 1,
    finite_time: FiniteTime | None = None,
) -> Bound:
    """Upper bound on the temporal variance: sigma_A^2 <= D_G ||A||^2 / d_eff (units of A^2).

    ||A||^2 / d_eff: P. Reimann, PRL 101, 190403 (2008); A. J. Short, New J. Phys. 13, 053009 (2011).
    With a_min and a_max the tighter (a_max - a_min)^2 / (4 d_eff) (sigma_A^2 ignores A -> A - c).
    Degenerate gaps multiply by D_G; at finite time T the factor N(eps) (1 + 8 log2 d_E / (eps T))
    replaces D_G (A. J. Short & T. C. Farrelly, New J. Phys. 14, 013063 (2012)).

    Parameters
    ----------
    norm : float
        Operator norm ||A|| (>= 0), used when a_min/a_max are not both given.
    d_eff : float
        Effective dimension 1 / sum_E p_E^2 (>= 1).
    a_min, a_max : float, optional
        Extreme eigenvalues of A; both or neither.
    gap_degeneracy : int
        D_G >= 1, the largest number of level pairs sharing one nonzero gap.
    finite_time : FiniteTime, optional
        Use the finite-time form instead of D_G.

    Returns
    -------
    Bound
    """
    if not (np.isfinite(norm) and norm >= 0):
        raise ValueError(f"norm must be a finite number >= 0, got {norm!r}")
    if not (np.isfinite(d_eff) and d_eff >= 1.0 - 1e-12):
        raise ValueError(f"d_eff must be a finite number >= 1, got {d_eff!r}")
    if (a_min is None) != (a_max is None):
        raise ValueError(f"give both a_min and a_max or neither, got a_min={a_min!r}, a_max={a_max!r}")
    if int(gap_degeneracy) != gap_degeneracy or gap_degeneracy < 1:
        raise ValueError(f"gap_degeneracy must be an integer >= 1, got {gap_degeneracy!r}")
    if a_min is not None:
        if not (np.isfinite(a_min) and np.isfinite(a_max) and a_max >= a_min):
            raise ValueError(f"need finite a_min <= a_max, got a_min={a_min!r}, a_max={a_max!r}")
        spread2 = (a_max - a_min) ** 2 / 4.0
        variant, words = "range", "(a_max - a_min)^2 / (4 d_eff)"
    else:
        spread2 = float(norm) ** 2
        variant, words = "norm", "||A||^2 / d_eff"
    ref = "P. Reimann, PRL 101, 190403 (2008); A. J. Short, New J. Phys. 13, 053009 (2011)"
    gap_factor, time_factor = 1.0, 1.0
    if finite_time is not None:
        ft = finite_time
        if not (ft.duration > 0 and ft.eps > 0 and ft.n_levels >= 1 and ft.max_gaps >= 0):
            raise ValueError(f"finite_time needs duration > 0, eps > 0, n_levels >= 1, max_gaps >= 0, got {ft!r}")
        gap_factor = float(max(ft.max_gaps, 1))
        time_factor = 1.0 + 8.0 * np.log2(ft.n_levels) / (ft.eps * ft.duration)
        variant += "+finite-time"
        words = f"N(eps) (1 + 8 log2 d_E / (eps T)) {words}"
        ref += "; A. J. Short & T. C. Farrelly, New J. Phys. 14, 013063 (2012)"
    elif gap_degeneracy > 1:
        gap_factor = float(gap_degeneracy)
        variant += "+gaps"
        words = f"D_G {words}"
        ref += "; A. J. Short & T. C. Farrelly, New J. Phys. 14, 013063 (2012)"
    value = gap_factor * time_factor * spread2 / float(d_eff)
    return Bound(float(value), variant, words, float(spread2), float(d_eff), gap_factor, float(time_factor), ref)


# ---------------------------------------------------------------------------------------------------
# level statistics


class SpacingRatio(NamedTuple):
    """Mean spacing ratio <r>, its standard error and the number of ratios used."""

    mean_r: float
    stderr: float
    n: int


def level_spacing_ratio(energies, *, central_fraction: float = 0.5) -> SpacingRatio:
    """<r>, r_n = min(s_n, s_{n+1}) / max(s_n, s_{n+1}), s_n = E_{n+1} - E_n, in one resolved sector.

    V. Oganesyan & D. A. Huse, PRB 75, 155111 (2007); Y. Y. Atas et al., PRL 110, 084101 (2013).
    Reference values: ``POISSON_R`` = 2 ln 2 - 1 ~ 0.386, ``GOE_R`` ~ 0.5307, ``GUE_R`` ~ 0.5996.

    Parameters
    ----------
    energies : array_like
        Eigenvalues of ONE symmetry sector (mixing sectors drifts <r> towards Poisson); sorted here.
    central_fraction : float
        Keep only the levels in the middle fraction of the (sorted) spectrum, 0 < f <= 1 (default 0.5:
        the band edges have low density and are not random-matrix-like; common practice).

    Returns
    -------
    SpacingRatio
        (mean_r, stderr, n). Pairs with s_n = s_{n+1} = 0 (exact degeneracies) are dropped. Neighbouring
        ratios share a spacing, so stderr = std / sqrt(n) * sqrt(1 + 2 rho_1) with rho_1 (>= 0) the lag-1
        correlation of the r_n (common practice).
    """
    e = np.sort(np.asarray(energies, dtype=float).reshape(-1))
    if not (0 < central_fraction <= 1):
        raise ValueError(f"central_fraction must be in (0, 1], got {central_fraction!r}")
    n_all = e.size
    keep = int(round(central_fraction * n_all))
    lo = (n_all - keep) // 2
    e = e[lo : lo + keep]
    if e.size < 4:
        raise ValueError(f"need at least 4 levels in the central fraction, got {e.size} (of {n_all} energies)")
    s = np.diff(e)
    a, b = s[:-1], s[1:]
    big = np.maximum(a, b)
    ok = big > 0
    r = np.minimum(a, b)[ok] / big[ok]
    n = int(r.size)
    if n < 2:
        raise ValueError("fewer than 2 spacing ratios remain after dropping exact degeneracies")
    mean = float(r.mean())
    std = float(r.std(ddof=1))
    x = r - mean
    rho1 = float(np.dot(x[:-1], x[1:]) / np.dot(x, x)) if np.dot(x, x) > 0 else 0.0
    stderr = std / np.sqrt(n) * np.sqrt(1.0 + 2.0 * max(rho1, 0.0))
    return SpacingRatio(mean, float(stderr), n)


# ---------------------------------------------------------------------------------------------------
# effective dimension from densities

DEFF_ASSUMPTION = (
    "sum_m |c_m|^4 ~ eta * int rho_psi(E)^2 / rho(E) dE assumes the amplitudes c_m are independent random "
    "numbers (eta = E|z|^4: 3 real Porter-Thomas, 2 complex) whose variance follows the smooth local density "
    "of states (random-matrix reasoning, F. M. Izrailev, Phys. Rep. 196, 299 (1990)); valid for chaotic "
    "models and broad, smooth energy distributions; it can miss by factors 2-6 for narrow or structured "
    "distributions and for integrable chains."
)


def amplitude_eta(psi_or_weight, hamiltonian_is_real: bool) -> float:
    """eta = E|c|^4 / (E|c|^2)^2 of the eigenstate amplitudes: 3 - 4 w (1 - w) for real H, 2 otherwise.

    Parameters
    ----------
    psi_or_weight : ndarray or float
        The state in a real basis (in which H is real), or its real-part weight w in [0, 1]. For a vector
        the phase-invariant form eta = 2 + |sum_b psi_b^2|^2 / ||psi||^4 is used; it equals 3 - 4w(1-w) once
        the global phase makes Re psi and Im psi orthogonal (3 for a real state, 2 for prod |+y>).
    hamiltonian_is_real : bool
        False: eigenvectors are complex, eta = 2 whatever the state.

    Returns
    -------
    float
    """
    if not hamiltonian_is_real:
        return 2.0
    if np.ndim(psi_or_weight) == 0:
        w = float(psi_or_weight)
        if not (0.0 <= w <= 1.0):
            raise ValueError(f"real-part weight must lie in [0, 1], got {psi_or_weight!r}")
        return 3.0 - 4.0 * w * (1.0 - w)
    psi = np.asarray(psi_or_weight).reshape(-1)
    n2 = float(np.vdot(psi, psi).real)
    if not n2 > 0:
        raise ValueError("psi must be a nonzero vector")
    return float(2.0 + abs(np.sum(psi * psi)) ** 2 / n2**2)


@dataclass(frozen=True)
class DeffEstimate:
    """d_eff from densities: ipr = eta int rho_psi^2 / rho dE, d_eff = 1 / ipr (dimensionless).

    Attributes
    ----------
    d_eff, ipr : float
        Central estimate.
    d_eff_low, d_eff_high : float
        Range from the density error bars (equal to d_eff when no errors are given).
    eta : float
    ldos_norm : float
        int rho_psi dE before renormalisation (should be ~1).
    masked_weight : float
        Share of int rho_psi dE where rho < floor (excluded from the integral).
    ldos_mean, ldos_width : float
        Mean and standard deviation of rho_psi (energy units).
    resolution : float
        Energy resolution the width was compared with.
    narrow : bool
        True when ldos_width < 3 * resolution: the estimate is then unreliable.
    assumption : str
    """

    d_eff: float
    ipr: float
    d_eff_low: float
    d_eff_high: float
    eta: float
    ldos_norm: float
    masked_weight: float
    ldos_mean: float
    ldos_width: float
    resolution: float
    narrow: bool
    assumption: str


def deff_from_densities(
    energies,
    ldos,
    dos,
    *,
    eta: float,
    dos_err=None,
    ldos_err=None,
    resolution: float | None = None,
    dos_floor: float | None = None,
) -> DeffEstimate:
    """sum_m |c_m|^4 ~ eta * int rho_psi(E)^2 / rho(E) dE, d_eff = 1 / that (dimensionless).

    Parameters
    ----------
    energies : array_like, shape (K,)
        Increasing energy grid (energy units), uniform or not.
    ldos : array_like
        rho_psi(E) = sum_m |c_m|^2 delta(E - E_m), smoothed (1/energy); renormalised to unit integral.
    dos : array_like
        rho(E) = sum_m delta(E - E_m) of the sector(s) psi lives in, smoothed the same way (states/energy;
        its integral is the dimension).
    eta : float
        E|c|^4 statistics factor, see ``amplitude_eta`` (2 <= eta <= 3 typically; must be > 0).
    dos_err, ldos_err : array_like, optional
        One-sigma error bars of the densities; give d_eff_low / d_eff_high from rho -+ err, rho_psi +- err.
    resolution : float, optional
        Energy resolution of the densities (e.g. KPM ~ pi a / N); default twice the median grid step.
    dos_floor : float, optional
        Grid points with rho below this are masked (default 1e-6 * max rho).

    Returns
    -------
    DeffEstimate
    """
    e = np.asarray(energies, dtype=float).reshape(-1)
    lp = np.asarray(ldos, dtype=float).reshape(-1)
    rho = np.asarray(dos, dtype=float).reshape(-1)
    if not (e.shape == lp.shape == rho.shape) or e.size < 3:
        raise ValueError(f"energies, ldos and dos need one common length >= 3, got {e.size}, {lp.size}, {rho.size}")
    if np.any(np.diff(e) <= 0):
        raise ValueError("energies must be strictly increasing")
    if not (np.isfinite(eta) and eta > 0):
        raise ValueError(f"eta must be a positive number (3 real amplitudes, 2 complex), got {eta!r}")
    if np.any(~np.isfinite(lp)) or np.any(~np.isfinite(rho)):
        raise ValueError("ldos and dos must be finite")
    lp = np.clip(lp, 0.0, None)
    rho = np.clip(rho, 0.0, None)
    if rho.max() <= 0:
        raise ValueError("dos must be positive somewhere")
    floor = 1e-6 * rho.max() if dos_floor is None else float(dos_floor)
    if not floor > 0:
        raise ValueError(f"dos_floor must be > 0, got {dos_floor!r}")
    norm = float(np.trapezoid(lp, e))
    if not norm > 0:
        raise ValueError("ldos must have a positive integral")
    mask = rho >= floor
    masked = float(np.trapezoid(np.where(mask, 0.0, lp), e) / norm)

    def ipr_of(lp_, rho_):
        n_ = float(np.trapezoid(lp_, e))
        q = np.where(mask, (lp_ / n_) ** 2 / np.maximum(rho_, floor), 0.0)
        return float(eta * np.trapezoid(q, e))

    ipr = ipr_of(lp, rho)
    lo_ipr = hi_ipr = ipr
    if dos_err is not None or ldos_err is not None:
        de = np.zeros_like(rho) if dos_err is None else np.abs(np.asarray(dos_err, float).reshape(-1))
        le = np.zeros_like(lp) if ldos_err is None else np.abs(np.asarray(ldos_err, float).reshape(-1))
        if de.shape != rho.shape or le.shape != lp.shape:
            raise ValueError("dos_err and ldos_err must have the shape of dos and ldos")
        # largest ipr: sharper ldos over a smaller dos; smallest: the opposite
        hi_ipr = ipr_of(lp + le, np.maximum(rho - de, floor))
        lo_ipr = ipr_of(np.clip(lp - le, 0.0, None) + 1e-300, rho + de)
        lo_ipr, hi_ipr = min(lo_ipr, ipr), max(hi_ipr, ipr)
    p = lp / norm
    mean = float(np.trapezoid(p * e, e))
    width = float(np.sqrt(max(np.trapezoid(p * (e - mean) ** 2, e), 0.0)))
    res = 2.0 * float(np.median(np.diff(e))) if resolution is None else float(resolution)
    if not res > 0:
        raise ValueError(f"resolution must be > 0 (energy units), got {resolution!r}")
    return DeffEstimate(
        d_eff=1.0 / ipr,
        ipr=ipr,
        d_eff_low=1.0 / hi_ipr,
        d_eff_high=1.0 / lo_ipr,
        eta=float(eta),
        ldos_norm=norm,
        masked_weight=masked,
        ldos_mean=mean,
        ldos_width=width,
        resolution=res,
        narrow=bool(width < 3.0 * res),
        assumption=DEFF_ASSUMPTION,
    )


# ---------------------------------------------------------------------------------------------------
# survival probability


class PlateauEstimate(NamedTuple):
    """Late-time mean of the survival probability and its standard error (dimensionless)."""

    mean: float
    stderr: float


def survival_plateau(times, survival, *, window) -> PlateauEstimate:
    """Late-time average (1/T_w) int_window |<psi|psi(t)>|^2 dt, a rough estimate of sum_E p_E^2.

    The plateau is reached only near the Heisenberg time, so use it as a consistency check.

    Parameters
    ----------
    times, survival : array_like
        The survival probability on an increasing time grid (inverse energy units).
    window : (float, float)
        [t_start, t_end] of the averaging window (at least 8 grid points inside).

    Returns
    -------
    PlateauEstimate
        (mean, stderr) with stderr = std sqrt(2 tau_int / T_w) (see ``relaxation.window_mean``).
    """
    t = np.asarray(times, dtype=float).reshape(-1)
    s = np.asarray(survival, dtype=float).reshape(-1)
    if t.shape != s.shape:
        raise ValueError(f"times and survival must have the same length, got {t.size} and {s.size}")
    try:
        t0, t1 = (float(x) for x in window)
    except (TypeError, ValueError):
        raise ValueError(f"window must be a pair (t_start, t_end), got {window!r}") from None
    if not t1 > t0:
        raise ValueError(f"window must satisfy t_start < t_end, got {window!r}")
    sel = (t >= t0) & (t <= t1)
    if np.count_nonzero(sel) < 8:
        raise ValueError(f"window {window!r} holds {np.count_nonzero(sel)} grid points; at least 8 are needed")
    wm = window_mean(t[sel], s[sel])
    return PlateauEstimate(wm.mean, wm.stderr)
