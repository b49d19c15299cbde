"""Typical (random) states: stochastic traces, canonical and microcanonical predictions.

* Random states: complex (or real) Gaussian vectors, or random phases, from a passed
  ``numpy.random.Generator``.
* Stochastic trace: ``Tr X ~ (1/R) sum_r <r|X|r>`` with unnormalised complex Gaussian vectors
  (``E|r_i|^2 = 1``); its variance is ``Tr(X^2)/R`` for Hermitian X, i.e. ``Tr(X^2)/(R D^2)``
  for ``Tr X / D`` (DESIGN.md section 5).
* Canonical values from thermal pure quantum states ``|beta_r> = e^{-beta H/2}|r>``
  (S. Sugiura & A. Shimizu, PRL 108, 240401 (2012); PRL 111, 010401 (2013)):
  ``<A>_beta = sum_r <beta_r|A|beta_r> / sum_r <beta_r|beta_r>``, errors by jackknife over r.
  ``e^{-tau H}`` is applied as a Chebyshev series with modified Bessel coefficients,
  ``e^{-tau H} = e^{-tau b} sum_n (2 - delta_n0) I_n(-tau a) T_n(Ht)``, stepping along the beta
  grid (from 0 outwards, both signs) so that only 3 full-size vectors are held whatever the
  grid size.  Each sub-step is limited so that the series cannot shrink the state by more than
  e^5 (Jensen: ``||e^{-tau a (1 + Ht)} v|| >= e^{-tau a (1 + <Ht>)}`` for unit v), which keeps
  the truncation tolerance relative to the result and the round-off harmless.
* Microcanonical values: random vectors filtered by a Chebyshev expansion of the Gaussian
  window ``f(H) = exp(-(H - E)^2 / (4 sigma^2))``, so that eigenstates enter with weight
  ``|f(E_m)|^2 = exp(-(E_m - E)^2 / (2 sigma^2))`` (a Gaussian of standard deviation sigma).

Energies are in the units of the operator, beta in inverse energy units.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Mapping

import numpy as np
import scipy.fft
import scipy.interpolate
import scipy.optimize
import scipy.special

from largeq.operators.vectors import norm, vdot
from largeq.engines.chebyshev import apply_chebyshev_series, apply_scaled_series, chebyshev_scale
from largeq.engines.random_vectors import child_generators, random_state
from largeq.operators.linalg import apply_into, result_dtype

__all__ = [
    "random_state",
    "TraceEstimate",
    "trace_estimate",
    "bessel_coefficients",
    "boltzmann_apply",
    "CanonicalResult",
    "canonical_averages",
    "solve_beta",
    "gaussian_window_coefficients",
    "MicrocanonicalResult",
    "microcanonical_average",
]

_MAX_DAMPING = 5.0     # largest allowed shrink factor e^5 of one imaginary-time sub-step
_MAX_Z = 200.0         # largest |tau a| per sub-step (bounds the series length, ~120 terms)


# --------------------------------------------------------------------------- stochastic trace
@dataclass(frozen=True, eq=False)
class TraceEstimate:
    """Stochastic estimate of ``Tr X``.

    Attributes
    ----------
    value, error : float, estimate of Tr X and its standard error (std over vectors / sqrt(R)).
    per_dim, per_dim_error : float, the same divided by D (``Tr X / D``).
    samples : ndarray (R,), ``<r_i|X|r_i>`` (real part) for each vector.
    n_vectors, dimension : int; kind : str.
    """

    value: float
    error: float
    per_dim: float
    per_dim_error: float
    samples: np.ndarray
    n_vectors: int
    dimension: int
    kind: str


def trace_estimate(
    op_or_callable,
    n_vectors: int,
    rng: np.random.Generator,
    *,
    dim: int | None = None,
    kind: str = "gaussian",
    dtype=complex,
) -> TraceEstimate:
    """``Tr X ~ (1/R) sum_r <r|X|r>`` over R unnormalised random vectors (E|r_i|^2 = 1).

    For complex Gaussian vectors and Hermitian X the variance is ``Tr(X^2)/R``, i.e.
    ``Tr(X^2)/(R D^2)`` for ``Tr X / D``; random phases remove the diagonal part of it.
    Holds 2 full-size vectors (plus whatever ``X @ r`` allocates).

    Parameters
    ----------
    op_or_callable : operator with ``@`` / a ``shape``, or a callable ``r -> X r``
    n_vectors : int >= 1; rng : numpy.random.Generator
    dim : int, required when a plain callable is given
    kind : 'gaussian' or 'phase'; dtype : complex or float
    """
    if int(n_vectors) != n_vectors or n_vectors < 1:
        raise ValueError(f"n_vectors must be an integer >= 1, got {n_vectors!r}")
    shape = getattr(op_or_callable, "shape", None)
    if shape is not None:
        if dim is not None and dim != shape[0]:
            raise ValueError(f"dim={dim} disagrees with the operator shape {shape}")
        dim = int(shape[0])
        apply = lambda r: op_or_callable @ r  # noqa: E731
    elif callable(op_or_callable):
        if dim is None:
            raise ValueError("dim must be given when op_or_callable is a plain callable")
        apply = op_or_callable
    else:
        raise ValueError(f"op_or_callable must be an operator or a callable, got {type(op_or_callable).__name__}")
    samples = np.empty(int(n_vectors))
    r = None
    for i in range(int(n_vectors)):
        r = random_state(dim, rng, kind=kind, dtype=dtype, normalize=False, out=r)
        samples[i] = vdot(r, apply(r)).real
    R = samples.size
    value = float(samples.mean())
    error = float(samples.std(ddof=1) / np.sqrt(R)) if R > 1 else float("nan")
    return TraceEstimate(value, error, value / dim, error / dim, samples, R, int(dim), kind)


# --------------------------------------------------------------------------- imaginary time
def bessel_coefficients(z: float, tol: float) -> np.ndarray:
    """Chebyshev coefficients of ``e^{z x - |z|}`` on [-1, 1]: ``c_n = (2 - delta_n0) I_n(z) e^{-|z|}``.

    Truncated at the first N with ``sum_{n >= N} |c_n| < tol`` (this sum bounds the error of the
    truncated series on [-1, 1]).
    """
    if not tol > 0:
        raise ValueError(f"tol must be > 0, got {tol}")
    az = abs(float(z))
    n_try = int(2 * az + 40)
    while True:
        n = np.arange(n_try)
        c = scipy.special.ive(n, float(z))
        c[1:] *= 2.0
        tail = np.cumsum(np.abs(c[::-1]))[::-1]  # tail[k] = sum_{n >= k} |c_n|
        if tail[-1] < tol * 1e-3 or n_try > 100000:
            break
        n_try *= 2
    keep = int(np.argmax(tail < tol)) if np.any(tail < tol) else n_try
    return c[: max(keep, 1)]


def _advance(op, bufs, tau, a, b, x_now, tol):
    """Apply e^{-tau H} to the unit state bufs[0] in sub-steps; keep it normalised.

    bufs = [state, work, spare]; on return bufs[0] is the new unit state and bufs[1] holds
    H @ state.  Returns (log of the norm factor, rescaled mean energy, <H>, <H^2>, products).
    """
    log_norm = 0.0
    remaining = float(tau)
    matvecs = 0
    energy = energy2 = None
    while remaining != 0.0:
        sign = 1.0 if remaining > 0 else -1.0
        spread = max((1.0 + x_now) if sign > 0 else (1.0 - x_now), 1e-12)
        z_allowed = min(_MAX_Z, _MAX_DAMPING / spread)
        step = sign * min(abs(remaining), z_allowed / a)
        if abs(remaining - step) < 1e-14 * max(1.0, abs(tau)):
            step = remaining
        z = -step * a
        coeffs = bessel_coefficients(z, tol * np.exp(-_MAX_DAMPING))
        state, work, spare = bufs
        new = apply_scaled_series(op, state, coeffs, a, b, overwrite=True, work=work, out=spare)
        matvecs += coeffs.size - 1
        nrm = norm(new)
        if not (nrm > 0 and np.isfinite(nrm)):
            raise FloatingPointError(f"imaginary-time step lost the state (norm {nrm}); check the bounds")
        new /= nrm
        log_norm += -step * b + abs(z) + np.log(nrm)
        bufs[0], bufs[2] = new, state
        apply_into(op, bufs[0], bufs[1])
        matvecs += 1
        energy = vdot(bufs[0], bufs[1]).real
        energy2 = vdot(bufs[1], bufs[1]).real
        x_now = (energy - b) / a
        remaining -= step
    return log_norm, x_now, energy, energy2, matvecs


def boltzmann_apply(op, v: np.ndarray, tau: float, bounds, *, tol: float = 1e-10, eps: float = 0.01):
    """``e^{-tau H} v = e^{log_norm} w`` with ``w`` of unit norm; returns ``(w, log_norm)``.

    Chebyshev series with modified Bessel coefficients, sub-stepped so that no step shrinks
    the state by more than e^5; relative truncation error per step below ``tol``.  ``tau`` may be
    negative.  Holds 3 full-size vectors besides ``v`` (``v`` is not modified).
    """
    a, b = chebyshev_scale(bounds, eps)
    v = np.asarray(v)
    dtype = result_dtype(op, v)
    nv = norm(v)
    if not nv > 0:
        raise ValueError("v must be a nonzero vector")
    state = np.array(v, dtype=dtype, copy=True) / nv
    bufs = [state, np.empty_like(state), np.empty_like(state)]
    apply_into(op, bufs[0], bufs[1])
    x_now = (vdot(bufs[0], bufs[1]).real - b) / a
    log_norm, *_ = _advance(op, bufs, tau, a, b, x_now, tol)
    return bufs[0], float(log_norm + np.log(nv))


# --------------------------------------------------------------------------- estimators
def _weighted_jackknife(log_w: np.ndarray, columns: list[np.ndarray], func: Callable):
    """Ratio estimators with jackknife errors.

    log_w: (R, K) log weights; columns: list of (R, K) per-vector values.  With weights
    w_r = exp(log_w_r - max), the means m_j = sum_r w_r c_jr / sum_r w_r are fed to
    ``func(*means) -> array``; the jackknife repeats this leaving out one r.
    Returns (estimate, error); error is NaN for R = 1.
    """
    R = log_w.shape[0]
    shift = log_w.max(axis=0, keepdims=True)
    w = np.exp(log_w - shift)
    sw = w.sum(axis=0)
    sums = [(w * c).sum(axis=0) for c in columns]
    est = np.asarray(func(*[s / sw for s in sums]))
    if R < 2:
        return est, np.full_like(est, np.nan, dtype=float)
    loo = []
    for r in range(R):
        swr = sw - w[r]
        loo.append(func(*[(s - w[r] * c[r]) / swr for s, c in zip(sums, columns)]))
    loo = np.asarray(loo)
    err = np.sqrt((R - 1) / R * ((loo - loo.mean(axis=0)) ** 2).sum(axis=0))
    return est, err


def _expect(A, x: np.ndarray, buf: np.ndarray) -> float:
    """Re <x|A|x>, using ``buf`` as the product's output when its dtype fits (else A @ x)."""
    if result_dtype(A, x) == buf.dtype:
        apply_into(A, x, buf)
        return float(vdot(x, buf).real)
    return float(vdot(x, A @ x).real)


def _check_observables(observables, dim):
    if observables is None:
        return {}
    if not isinstance(observables, Mapping):
        raise ValueError(f"observables must be a dict name -> operator, got {type(observables).__name__}")
    for name, A in observables.items():
        shape = getattr(A, "shape", None)
        if shape is None or tuple(shape) != (dim, dim):
            raise ValueError(f"observable {name!r} must have shape ({dim}, {dim}), got {shape}")
    return dict(observables)


def _check_common(op, n_vectors, rng):
    shape = getattr(op, "shape", None)
    if shape is None or len(shape) != 2 or shape[0] != shape[1]:
        raise ValueError(f"op must be a square operator with a shape, got shape {shape}")
    if int(n_vectors) != n_vectors or n_vectors < 1:
        raise ValueError(f"n_vectors must be an integer >= 1, got {n_vectors!r}")
    if not isinstance(rng, np.random.Generator):
        raise ValueError(f"rng must be a numpy.random.Generator, got {type(rng).__name__}")
    return int(shape[0]), int(n_vectors)


# --------------------------------------------------------------------------- canonical
@dataclass(frozen=True, eq=False)
class CanonicalResult:
    """Canonical averages from thermal pure quantum states on a beta grid.

    Attributes
    ----------
    betas : ndarray (K,), ascending, inverse energy units (may be negative).
    energy, energy_err : ndarray (K,), ``<H>_beta`` and its jackknife error (energy units).
    energy_variance, energy_variance_err : ndarray, ``<H^2>_beta - <H>_beta^2`` (energy^2;
        equals ``-d<H>/dbeta``; heat capacity is ``beta^2`` times it).
    values, errors : dict name -> ndarray (K,), ``<A>_beta`` and jackknife errors.
    log_z, log_z_err : ndarray, ``ln(Tr e^{-beta H} / D)`` and its jackknife error.
    n_vectors, dimension, n_matvecs : int; tol : float; scale, shift : float (a, b).
    vector_kind : str; seconds : float (wall time).
    """

    betas: np.ndarray
    energy: np.ndarray
    energy_err: np.ndarray
    energy_variance: np.ndarray
    energy_variance_err: np.ndarray
    values: dict
    errors: dict
    log_z: np.ndarray
    log_z_err: np.ndarray
    n_vectors: int
    dimension: int
    n_matvecs: int
    tol: float
    scale: float
    shift: float
    vector_kind: str
    seconds: float


def canonical_averages(
    op,
    observables: Mapping | None,
    betas,
    n_vectors: int,
    rng: np.random.Generator,
    bounds,
    tol: float = 1e-10,
    *,
    dtype=complex,
    vector_kind: str = "gaussian",
    eps: float = 0.01,
) -> CanonicalResult:
    """Canonical ``<A>_beta = Tr(A e^{-beta H}) / Tr e^{-beta H}`` from R thermal pure quantum states.

    ``|beta_r> = e^{-beta H/2}|r>`` for unit random |r>; ``<A>_beta = sum_r <beta_r|A|beta_r> /
    sum_r <beta_r|beta_r>`` (Sugiura & Shimizu, PRL 108, 240401 (2012); PRL 111, 010401 (2013)),
    errors by jackknife over r.  The states are stepped from beta = 0 outwards along the grid
    (positive and negative betas separately; vector r is regenerated from its own spawned
    generator for the negative side).  Holds 3 full-size vectors whatever the grid size
    (observable products go into one of them when the operator supports ``apply_into``).

    Parameters
    ----------
    op : Hermitian operator (D, D); observables : dict name -> operator (D, D) or None
    betas : 1-d array of distinct finite inverse temperatures (any sign, any order)
    n_vectors : int >= 1 (>= 2 for error bars); rng : numpy.random.Generator
    bounds : (e_min, e_max) enclosing the spectrum (energy units)
    tol : relative truncation tolerance of each Chebyshev sub-step
    dtype : complex or float (real vectors for a real Hamiltonian)
    vector_kind : 'gaussian' (default) or 'phase'
    """
    import time

    t0 = time.perf_counter()
    dim, R = _check_common(op, n_vectors, rng)
    obs = _check_observables(observables, dim)
    betas = np.asarray(betas, dtype=float).reshape(-1)
    if betas.size == 0 or not np.all(np.isfinite(betas)):
        raise ValueError(f"betas must be a non-empty array of finite numbers, got {betas}")
    order = np.argsort(betas)
    betas = betas[order]
    if np.any(np.diff(betas) == 0):
        raise ValueError("betas must be distinct")
    if not tol > 0:
        raise ValueError(f"tol must be > 0, got {tol}")
    a, b = chebyshev_scale(bounds, eps)
    K = betas.size
    log_w = np.empty((R, K))
    e1 = np.empty((R, K))
    e2 = np.empty((R, K))
    vals = {name: np.empty((R, K)) for name in obs}
    children = child_generators(rng, R)
    vdtype = np.dtype(dtype)
    work_dtype = np.result_type(vdtype, getattr(op, "dtype", np.float64))
    bufs = [np.empty(dim, dtype=work_dtype) for _ in range(3)]
    matvecs = 0
    pos = [k for k in range(K) if betas[k] >= 0]
    neg = [k for k in range(K) if betas[k] < 0][::-1]
    for r in range(R):
        saved = children[r].bit_generator.state
        for side in (pos, neg):
            if not side:
                continue
            children[r].bit_generator.state = saved
            if vdtype == work_dtype:
                random_state(dim, children[r], kind=vector_kind, dtype=vdtype, out=bufs[0])
            else:
                bufs[0][...] = random_state(dim, children[r], kind=vector_kind, dtype=vdtype)
            apply_into(op, bufs[0], bufs[1])
            matvecs += 1
            cur_e = vdot(bufs[0], bufs[1]).real
            cur_e2 = vdot(bufs[1], bufs[1]).real
            x_now = (cur_e - b) / a
            cur_beta, cur_log = 0.0, 0.0
            for k in side:
                tau = 0.5 * (betas[k] - cur_beta)
                if tau != 0.0:
                    dlog, x_now, cur_e, cur_e2, mv = _advance(op, bufs, tau, a, b, x_now, tol)
                    cur_log += dlog
                    matvecs += mv
                    cur_beta = betas[k]
                log_w[r, k] = 2.0 * cur_log
                e1[r, k] = cur_e
                e2[r, k] = cur_e2
                for name, A in obs.items():
                    vals[name][r, k] = _expect(A, bufs[0], bufs[2])
    energy, energy_err = _weighted_jackknife(log_w, [e1], lambda m: m)
    var, var_err = _weighted_jackknife(log_w, [e1, e2], lambda m1, m2: m2 - m1 * m1)
    values, errors = {}, {}
    for name in obs:
        values[name], errors[name] = _weighted_jackknife(log_w, [vals[name]], lambda m: m)
    # ln mean_r w_r with jackknife
    shift = log_w.max(axis=0)
    w = np.exp(log_w - shift)
    log_z = np.log(w.mean(axis=0)) + shift
    if R > 1:
        loo = np.log((w.sum(axis=0) - w) / (R - 1)) + shift
        log_z_err = np.sqrt((R - 1) / R * ((loo - loo.mean(axis=0)) ** 2).sum(axis=0))
    else:
        log_z_err = np.full(K, np.nan)
    return CanonicalResult(
        betas=betas, energy=energy, energy_err=energy_err, energy_variance=var,
        energy_variance_err=var_err, values=values, errors=errors, log_z=log_z,
        log_z_err=log_z_err, n_vectors=R, dimension=dim, n_matvecs=matvecs, tol=float(tol),
        scale=a, shift=b, vector_kind=vector_kind, seconds=time.perf_counter() - t0,
    )


def solve_beta(result: CanonicalResult, target_energy: float) -> tuple[float, float]:
    """Inverse temperature with ``<H>_beta = target_energy``, and its error.

    Cubic Hermite interpolation of ``<H>_beta`` on the grid using the exact slope
    ``d<H>/dbeta = -(<H^2> - <H>^2)`` (also estimated by the TPQ states), solved by Brent's
    method in the grid interval that brackets the target.  Error: the interpolated energy error
    divided by the slope, ``beta_err = <H>_err / Var_beta``.  Betas below the infinite-temperature
    energy ``Tr H / D`` come out negative.  Raises ValueError if the target is outside the energies
    covered by the grid (extend the grid).
    """
    e = np.asarray(result.energy)
    betas = np.asarray(result.betas)
    target = float(target_energy)
    if not np.isfinite(target):
        raise ValueError(f"target_energy must be finite, got {target_energy}")
    lo, hi = float(e.min()), float(e.max())
    if not lo <= target <= hi:
        raise ValueError(
            f"target_energy {target} is outside the grid's energy range [{lo}, {hi}]; extend betas"
        )
    if betas.size < 2:
        raise ValueError("result must hold at least two betas")
    spline = scipy.interpolate.CubicHermiteSpline(betas, e, -np.asarray(result.energy_variance))
    diff = e - target
    idx = np.nonzero(diff == 0)[0]
    if idx.size:
        k = int(idx[0])
        beta = float(betas[k])
    else:
        k = int(np.nonzero(np.sign(diff[:-1]) != np.sign(diff[1:]))[0][0])
        beta = float(scipy.optimize.brentq(lambda x: spline(x) - target, betas[k], betas[k + 1]))
    slope = abs(float(spline.derivative()(beta)))
    e_err = float(np.interp(beta, betas, result.energy_err))
    beta_err = e_err / slope if slope > 0 else float("inf")
    return beta, beta_err


# --------------------------------------------------------------------------- microcanonical
def gaussian_window_coefficients(
    energy: float, width: float, bounds, *, eps: float = 0.01, tol: float = 1e-10,
    n_moments: int | None = None,
) -> tuple[np.ndarray, float]:
    """Chebyshev coefficients of ``f(E) = exp(-(E - energy)^2 / (4 width^2))`` in ``Ht``.

    Chebyshev interpolation on enough nodes (type-II DCT), then truncation: to the first N
    with tail ``sum_{n >= N} |c_n| < tol`` if ``n_moments`` is None, else to ``n_moments`` terms.
    Returns ``(coeffs, tail)`` where ``tail`` bounds the truncation error on the spectrum.
    """
    if not width > 0:
        raise ValueError(f"width must be > 0, got {width}")
    a, b = chebyshev_scale(bounds, eps)
    n_nodes = 1 << int(np.ceil(np.log2(max(256.0, 4.0 * (8.0 * a / width + 32.0)))))
    while True:
        theta = np.pi * (np.arange(n_nodes) + 0.5) / n_nodes
        f = np.exp(-((a * np.cos(theta) + b - energy) ** 2) / (4.0 * width**2))
        c = scipy.fft.dct(f, type=2) / n_nodes
        c[0] *= 0.5
        tail = np.cumsum(np.abs(c[::-1]))[::-1]
        if tail[n_nodes // 2] < 1e-3 * tol or n_nodes >= 1 << 22:
            break
        n_nodes *= 2
    if n_moments is None:
        keep = int(np.argmax(tail < tol))
    else:
        if int(n_moments) != n_moments or n_moments < 1:
            raise ValueError(f"n_moments must be a positive integer, got {n_moments!r}")
        keep = min(int(n_moments), n_nodes)
    tail_sum = float(tail[keep]) if keep < n_nodes else 0.0
    return c[:keep].copy(), tail_sum


@dataclass(frozen=True, eq=False)
class MicrocanonicalResult:
    """Microcanonical averages from Gaussian-filtered random states.

    Attributes
    ----------
    energy, width : float, window centre and standard deviation sigma of the eigenstate weights
        ``w(E_m) = exp(-(E_m - energy)^2 / (2 sigma^2))`` (energy units).
    values, errors : dict name -> float, ``<A>_E`` and jackknife errors.
    mean_energy, mean_energy_err : float, ``sum_r <f_r|H|f_r> / sum_r <f_r|f_r>``.
    energy_spread, energy_spread_err : float, sqrt of the filtered states' energy variance.
    window_weight, window_weight_err : float, ``Tr w(H) / D`` estimate (fraction of states in
        the window; times D is the number of states it holds).
    n_moments : int, terms of the Chebyshev filter; truncation : float, its error bound.
    n_vectors, dimension, n_matvecs : int; seconds : float.
    """

    energy: float
    width: float
    values: dict
    errors: dict
    mean_energy: float
    mean_energy_err: float
    energy_spread: float
    energy_spread_err: float
    window_weight: float
    window_weight_err: float
    n_moments: int
    truncation: float
    n_vectors: int
    dimension: int
    n_matvecs: int
    seconds: float


def microcanonical_average(
    op,
    observables: Mapping | None,
    energy: float,
    width: float | None,
    n_vectors: int,
    rng: np.random.Generator,
    bounds,
    n_moments: int | None = None,
    *,
    dtype=complex,
    vector_kind: str = "gaussian",
    tol: float = 1e-10,
    eps: float = 0.01,
) -> MicrocanonicalResult:
    """Microcanonical ``<A>_E = sum_m w(E_m) A_mm / sum_m w(E_m)`` from filtered random states.

    ``|f_r> = exp(-(H - E)^2 / (4 sigma^2)) |r>``, ``<A>_E ~ sum_r <f_r|A|f_r> / sum_r <f_r|f_r>``
    with jackknife errors; ``w(E) = exp(-(E - E_0)^2 / (2 sigma^2))``.  ``width`` (sigma) defaults
    to 2% of ``e_max - e_min``.  The filter is a converged Chebyshev expansion (truncation below
    ``tol``, no kernel) unless ``n_moments`` fixes its length.  Holds 3 full-size vectors.

    Parameters
    ----------
    op : Hermitian operator (D, D); observables : dict name -> operator (D, D) or None
    energy : window centre; width : sigma or None (energy units)
    n_vectors : int >= 1 (>= 2 for errors); rng : numpy.random.Generator
    bounds : (e_min, e_max) enclosing the spectrum; n_moments : filter length or None
    """
    import time

    t0 = time.perf_counter()
    dim, R = _check_common(op, n_vectors, rng)
    obs = _check_observables(observables, dim)
    a, b = chebyshev_scale(bounds, eps)
    if width is None:
        width = 0.02 * a * (2.0 - eps)
    if not np.isfinite(energy):
        raise ValueError(f"energy must be finite, got {energy}")
    coeffs, trunc = gaussian_window_coefficients(energy, width, bounds, eps=eps, tol=tol, n_moments=n_moments)
    vdtype = np.dtype(dtype)
    work_dtype = np.result_type(vdtype, getattr(op, "dtype", np.float64))
    bufs = [np.empty(dim, dtype=work_dtype) for _ in range(3)]
    children = child_generators(rng, R)
    norm2 = np.empty((R, 1))
    e1 = np.empty((R, 1))
    e2 = np.empty((R, 1))
    vals = {name: np.empty((R, 1)) for name in obs}
    matvecs = 0
    for r in range(R):
        if vdtype == work_dtype:
            random_state(dim, children[r], kind=vector_kind, dtype=vdtype, out=bufs[0])
        else:
            bufs[0][...] = random_state(dim, children[r], kind=vector_kind, dtype=vdtype)
        f = apply_chebyshev_series(op, bufs[0], coeffs, bounds, eps=eps, overwrite=True,
                                   work=bufs[1], out=bufs[2])
        matvecs += coeffs.size + len(obs)  # series (size - 1), H f, observables
        n2 = vdot(f, f).real
        if not n2 > 0:
            raise FloatingPointError("filtered state vanished; is the energy inside the spectrum?")
        norm2[r, 0] = n2
        f /= np.sqrt(n2)
        apply_into(op, f, bufs[0])
        e1[r, 0] = vdot(f, bufs[0]).real
        e2[r, 0] = vdot(bufs[0], bufs[0]).real
        for name, A in obs.items():
            vals[name][r, 0] = _expect(A, f, bufs[0])
    log_w = np.log(norm2)
    me, me_err = _weighted_jackknife(log_w, [e1], lambda m: m)
    sp, sp_err = _weighted_jackknife(log_w, [e1, e2], lambda m1, m2: np.sqrt(np.maximum(m2 - m1 * m1, 0)))
    values, errors = {}, {}
    for name in obs:
        v, ve = _weighted_jackknife(log_w, [vals[name]], lambda m: m)
        values[name], errors[name] = float(v[0]), float(ve[0])
    ww = float(norm2.mean())
    ww_err = float(norm2.std(ddof=1) / np.sqrt(R)) if R > 1 else float("nan")
    return MicrocanonicalResult(
        energy=float(energy), width=float(width), values=values, errors=errors,
        mean_energy=float(me[0]), mean_energy_err=float(me_err[0]),
        energy_spread=float(sp[0]), energy_spread_err=float(sp_err[0]),
        window_weight=ww, window_weight_err=ww_err, n_moments=int(coeffs.size),
        truncation=trunc, n_vectors=R, dimension=dim, n_matvecs=matvecs,
        seconds=time.perf_counter() - t0,
    )
