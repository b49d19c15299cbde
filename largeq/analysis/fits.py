"""Finite-size fits: weighted least squares with parameter covariances, and extrapolation.

Three trends of a quench observed over chain lengths L (all straight lines after a transform):

* ``ln d_eff = a + s L``                       (:func:`fit_log_deff`; growth rate s per site)
* ``ln sigma_A = b - kappa L``                 (:func:`fit_log_sigma`; decay rate kappa per site)
* ``<A>_inf(L) = c_inf + c_1 / L``             (:func:`fit_inverse_size`; c_inf is the L -> infinity value)

A straight-line fit y = p0 + p1 x minimises chi^2 = sum_i ((y_i - p0 - p1 x_i) / sigma_i)^2; the parameter
covariance is C = (X^T W X)^{-1} with W = diag(1 / sigma_i^2).  With known errors (``absolute=True``) C is used
as it is; without errors (or ``absolute=False``) C is scaled by chi^2 / (n - 2), the usual estimate from the
scatter (then the 1-sigma interval covers the truth with the Student-t probability of n - 2 degrees of
freedom, e.g. 63 % for n = 6, not 68 %).  A prediction at x* has variance g^T C g with g = (1, x*); for the
log fits the band is exp(mu -+ err), asymmetric in the original units.

Given errors and the scatter.  With ``absolute="inflate"`` the given errors are used, but C is multiplied by
the Birge ratio max(1, chi^2 / (n - 2)) when the points scatter more than their errors allow (R. T. Birge,
Phys. Rev. 40, 207 (1932); common practice): the error can grow with the scatter, never shrink below what
the points' own errors give.  :func:`prediction_interval` adds a new point's own error (times the same ratio)
to g^T C g and uses the Student-t quantile of n - 2 degrees of freedom when the scatter entered (the usual
least-squares prediction interval, e.g. N. R. Draper & H. Smith, "Applied Regression Analysis", 3rd ed.,
Wiley 1998, section 3.1).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["LinearFit", "Extrapolation", "linear_fit", "fit_log_deff", "fit_log_sigma", "fit_inverse_size",
           "SizeTrend", "extrapolate", "constant_fit", "Prediction", "prediction_interval"]


@dataclass(frozen=True, eq=False)
class LinearFit:
    """y = intercept + slope * x with the 2x2 parameter covariance.

    Attributes
    ----------
    intercept, slope : float
    covariance : ndarray (2, 2)
        Covariance of (intercept, slope).
    intercept_err, slope_err : float
        Square roots of the diagonal.
    chi2 : float
        Weighted sum of squared residuals (with unit weights when no errors were given).
    dof : int
        n - 2.
    absolute : bool
        True: covariance from the given errors (times ``scale``); False: scaled by chi2 / dof.
    x, y, sigma : ndarray
        The data used (sigma all ones when none were given).
    """

    intercept: float
    slope: float
    covariance: np.ndarray
    chi2: float
    dof: int
    absolute: bool
    x: np.ndarray
    y: np.ndarray
    sigma: np.ndarray
    scale: float = 1.0
    n_params: int = 2

    @property
    def intercept_err(self) -> float:
        return float(np.sqrt(self.covariance[0, 0]))

    @property
    def slope_err(self) -> float:
        return float(np.sqrt(self.covariance[1, 1]))

    def predict(self, x) -> tuple[np.ndarray, np.ndarray]:
        """(value, 1-sigma error) of the line at ``x`` (covariance propagated: g^T C g, g = (1, x))."""
        x = np.asarray(x, dtype=float)
        value = self.intercept + self.slope * x
        var = self.covariance[0, 0] + 2 * x * self.covariance[0, 1] + x * x * self.covariance[1, 1]
        return value, np.sqrt(np.maximum(var, 0.0))

    def as_dict(self) -> dict:
        if not self.absolute:
            how = "from scatter (chi2/dof)"
        elif self.scale > 1.0:
            how = f"given, inflated by the scatter (chi2/dof = {self.scale:.3g})"
        else:
            how = "given"
        return {"intercept": self.intercept, "intercept_err": self.intercept_err, "slope": self.slope,
                "slope_err": self.slope_err, "covariance": self.covariance.tolist(), "chi2": self.chi2,
                "dof": self.dof, "errors": how}


def linear_fit(x, y, sigma=None, *, absolute: bool | None = None) -> LinearFit:
    """Weighted least-squares straight line y = p0 + p1 x with the parameter covariance.

    Parameters
    ----------
    x, y : array_like
        At least 2 points (3 when the covariance must come from the scatter).
    sigma : array_like, optional
        1-sigma errors of y (all > 0).  None: equal weights.
    absolute : bool or "inflate", optional
        Whether sigma are true errors (covariance (X^T W X)^-1, as ``scipy.optimize.curve_fit`` with
        ``absolute_sigma=True``) or relative weights (covariance scaled by chi2 / dof).  "inflate": true
        errors, covariance scaled by max(1, chi2 / dof) (needs n >= 3).  Default: True when sigma is given,
        False otherwise.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if x.ndim != 1 or x.shape != y.shape:
        raise ValueError(f"x and y must be 1-d of equal length, got shapes {x.shape} and {y.shape}")
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        raise ValueError("x and y must be finite")
    if sigma is None:
        s = np.ones_like(y)
        absolute = False if absolute is None else absolute
    else:
        s = np.broadcast_to(np.asarray(sigma, dtype=float), y.shape).copy()
        if not np.all(np.isfinite(s) & (s > 0)):
            raise ValueError("sigma must be finite and > 0 for every point")
        absolute = True if absolute is None else absolute
    n = x.size
    if n < 2 or np.ptp(x) == 0:
        raise ValueError(f"a straight-line fit needs at least 2 distinct x values, got {n} point(s)")
    inflate = isinstance(absolute, str)
    if inflate and absolute != "inflate":
        raise ValueError(f"absolute must be True, False or 'inflate', got {absolute!r}")
    if (not absolute or inflate) and n < 3:
        raise ValueError("errors from the scatter need at least 3 points")
    w = 1.0 / s**2
    X = np.column_stack([np.ones(n), x])
    A = X.T @ (w[:, None] * X)
    cov = np.linalg.inv(A)
    p = cov @ (X.T @ (w * y))
    r = (y - X @ p) / s
    chi2 = float(r @ r)
    dof = n - 2
    scale = 1.0
    if inflate:
        scale = max(1.0, chi2 / dof)
        cov = cov * scale
    elif not absolute:
        scale = chi2 / dof
        cov = cov * scale
    return LinearFit(float(p[0]), float(p[1]), cov, chi2, dof, bool(absolute), x, y, s, float(scale))


def constant_fit(y, sigma, *, absolute: bool | str = "inflate") -> LinearFit:
    """Weighted mean y = c (slope fixed to 0) as a :class:`LinearFit` with ``n_params = 1``.

    c = sum w y / sum w, var c = 1 / sum w (times max(1, chi2 / (n - 1)) with "inflate", needs n >= 2).
    """
    y = np.asarray(y, dtype=float).reshape(-1)
    s = np.broadcast_to(np.asarray(sigma, dtype=float), y.shape).copy()
    if y.size < 1 or not np.all(np.isfinite(y)) or not np.all(np.isfinite(s) & (s > 0)):
        raise ValueError("constant_fit needs finite y and finite errors > 0")
    w = 1.0 / s**2
    c = float(np.sum(w * y) / np.sum(w))
    var = 1.0 / float(np.sum(w))
    chi2 = float(np.sum(w * (y - c) ** 2))
    dof = y.size - 1
    scale = 1.0
    if absolute == "inflate" or not absolute:
        if dof < 1:
            raise ValueError("errors from the scatter need at least 2 points for a constant")
        scale = max(1.0, chi2 / dof) if absolute == "inflate" else chi2 / dof
    cov = np.array([[var * scale, 0.0], [0.0, 0.0]])
    return LinearFit(c, 0.0, cov, chi2, dof, bool(absolute), np.zeros_like(y), y, s, float(scale), 1)


@dataclass(frozen=True)
class Prediction:
    """A new observation predicted from a fit: value, two-sided interval at ``level``, and its parts.

    err is the 1-sigma prediction error sqrt(scale sigma_new^2 + g^T C g); (low, high) = value -+ q err with
    q the Student-t quantile of ``dof`` degrees of freedom (normal quantile when the errors were taken as
    given and the scatter did not inflate them).
    """

    x: float
    value: float
    err: float
    low: float
    high: float
    level: float
    quantile: float
    dof: int


def prediction_interval(fit: LinearFit, x: float, sigma_new: float = 0.0, *, level: float = 0.9) -> Prediction:
    """Prediction interval of a new point at ``x`` with its own 1-sigma error ``sigma_new`` (fit units).

    var = scale sigma_new^2 + g^T C g, g = (1, x) (C already holds the scatter scale); the quantile is
    Student-t with ``fit.dof`` degrees of freedom when the covariance came from or was inflated by the
    scatter, else normal.
    """
    from scipy import stats

    if not (0.0 < level < 1.0):
        raise ValueError(f"level must lie in (0, 1), got {level!r}")
    v, e = fit.predict(float(x))
    var = float(e) ** 2 + fit.scale * float(sigma_new) ** 2
    err = float(np.sqrt(max(var, 0.0)))
    from_scatter = (not fit.absolute) or fit.scale > 1.0
    p = 0.5 * (1.0 + level)
    q = float(stats.t.ppf(p, fit.dof)) if (from_scatter and fit.dof >= 1) else float(stats.norm.ppf(p))
    return Prediction(float(x), float(v), err, float(v) - q * err, float(v) + q * err, float(level), q, int(fit.dof))


@dataclass(frozen=True)
class Extrapolation:
    """A fitted trend evaluated at one chain length.

    value is the central prediction; (low, high) the 1-sigma band in the quantity's own units (for the
    log fits exp(mu -+ err), so asymmetric); err the symmetric error of the fitted (transformed) line.
    """

    quantity: str
    sites: float
    value: float
    low: float
    high: float
    err: float

    def as_dict(self) -> dict:
        return {"quantity": self.quantity, "sites": self.sites, "value": self.value, "low": self.low,
                "high": self.high, "transformed_err": self.err}


@dataclass(frozen=True, eq=False)
class SizeTrend:
    """One finite-size trend: the line in transformed variables and how to map it back.

    kind: 'log-linear' (ln q = a + s L), 'log-decay' (ln q = b - kappa L) or 'inverse-size' (q = c + d / L).
    """

    quantity: str
    kind: str
    fit: LinearFit

    @property
    def rate(self) -> tuple[float, float]:
        """(s, err) for 'log-linear', (kappa, err) for 'log-decay', (c_inf, err) for 'inverse-size'."""
        if self.kind == "log-linear":
            return self.fit.slope, self.fit.slope_err
        if self.kind == "log-decay":
            return -self.fit.slope, self.fit.slope_err
        return self.fit.intercept, self.fit.intercept_err

    def at(self, sites) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(value, low, high) at chain length(s) ``sites`` (1-sigma band)."""
        L = np.asarray(sites, dtype=float)
        if self.kind == "inverse-size":
            v, e = self.fit.predict(1.0 / L)
            return v, v - e, v + e
        v, e = self.fit.predict(L)
        return np.exp(v), np.exp(v - e), np.exp(v + e)

    def as_dict(self) -> dict:
        rate, rate_err = self.rate
        name = {"log-linear": "s (growth of ln per site)", "log-decay": "kappa (decay of ln per site)",
                "inverse-size": "value at L -> infinity"}[self.kind]
        form = {"log-linear": "ln q = a + s L", "log-decay": "ln q = b - kappa L",
                "inverse-size": "q = c_inf + c_1 / L"}[self.kind]
        return {"quantity": self.quantity, "form": form, "rate_name": name, "rate": rate, "rate_err": rate_err,
                "fit": self.fit.as_dict()}


def _log_errors(values, errs):
    v = np.asarray(values, dtype=float)
    if np.any(~(v > 0)):
        raise ValueError(f"a logarithmic fit needs positive values, got {v}")
    if errs is None:
        return np.log(v), None
    e = np.asarray(errs, dtype=float)
    return np.log(v), e / v  # d ln q = dq / q


def fit_log_deff(sizes, d_eff, d_eff_err=None, *, absolute: bool | None = None) -> SizeTrend:
    """ln d_eff = a + s L (weights from d_eff_err / d_eff when errors are given)."""
    y, s = _log_errors(d_eff, d_eff_err)
    return SizeTrend("d_eff", "log-linear", linear_fit(sizes, y, s, absolute=absolute))


def fit_log_sigma(sizes, sigma_a, sigma_err=None, *, quantity: str = "sigma_A",
                  absolute: bool | None = None) -> SizeTrend:
    """ln sigma_A = b - kappa L (sigma_A = sqrt of the temporal variance)."""
    y, s = _log_errors(sigma_a, sigma_err)
    return SizeTrend(quantity, "log-decay", linear_fit(sizes, y, s, absolute=absolute))


def fit_inverse_size(sizes, values, errs=None, *, quantity: str = "equilibrium",
                     absolute: bool | None = None) -> SizeTrend:
    """value = c_inf + c_1 / L (linear in 1/L); c_inf is the extrapolation to L -> infinity."""
    L = np.asarray(sizes, dtype=float)
    return SizeTrend(quantity, "inverse-size", linear_fit(1.0 / L, values, errs, absolute=absolute))


def extrapolate(trend: SizeTrend, sites: float) -> Extrapolation:
    """The trend at chain length ``sites`` with its 1-sigma band (covariance propagated)."""
    v, lo, hi = trend.at(sites)
    x = 1.0 / float(sites) if trend.kind == "inverse-size" else float(sites)
    _, e = trend.fit.predict(x)
    return Extrapolation(trend.quantity, float(sites), float(v), float(lo), float(hi), float(e))
