"""Time evolution psi(t) = exp(-i H t) psi(0) for Hermitian matrix-free operators.

Two propagators and one driver:

* Chebyshev (H. Tal-Ezer & R. Kosloff, J. Chem. Phys. 81, 3967 (1984)):
  ``exp(-iH dt) = exp(-i b dt) sum_n (2 - delta_n0) (-i)^n J_n(a dt) T_n((H - b)/a)``,
  order chosen from ``a dt`` and the tolerance; needs spectral bounds ``[b - a, b + a]``.
  Holds 3 full-size vectors (state + two recursion vectors) plus one result per output time
  sharing the expansion (``block``).
* Lanczos / Krylov (T. J. Park & J. C. Light, J. Chem. Phys. 85, 5870 (1986)):
  ``exp(-iH dt) psi ~ |psi| V_m exp(-i T_m dt) e_1`` with adaptive Krylov dimension ``m``
  controlled by the a posteriori estimate ``beta_m |e_m^T exp(-i T_m dt) e_1|``, and substeps
  when ``max_krylov`` vectors do not reach the tolerance.  Holds up to ``max_krylov + 1``
  basis vectors plus the state and the result.
* :func:`evolve`: advances a state through an increasing time grid, calling ``on_output`` at
  every output index.  Every step depends only on the state and the absolute output indices,
  so a run resumed from a saved state gives the same numbers as an uninterrupted run.

Tolerances are relative to the state norm (the propagator is unitary).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Callable

import numpy as np
from scipy.linalg import eigh_tridiagonal
from scipy.special import gammaln, jv

from largeq.engines.bounds import SpectralBounds, check_operator, spectral_bounds
from largeq.operators.linalg import fused_update
from largeq.operators.vectors import accumulate_pair, axpy, norm, vdot

__all__ = [
    "EvolutionStats",
    "chebyshev_order",
    "chebyshev_coefficients",
    "krylov_apriori_bound",
    "evolve",
    "evolve_scipy_krylov",
]

METHODS = ("chebyshev", "lanczos")


@dataclass(frozen=True)
class EvolutionStats:
    """What a time evolution cost and how accurate it claims to be.

    Attributes
    ----------
    method : str
        ``"chebyshev"``, ``"lanczos"`` or ``"scipy-krylov"``.
    matvecs : int
        Matrix-vector products spent propagating (spectral bounds computed inside
        :func:`evolve` are counted separately in ``bounds.steps``).
    orders : tuple of int
        Chebyshev: expansion order (number of terms) per step (one step per block).
        Lanczos: Krylov dimension per substep.  scipy-krylov: matvecs per step.
    steps : int
        Propagation steps taken (Chebyshev blocks, Lanczos output intervals).
    substeps : int
        Lanczos substeps (equals ``steps`` when no step had to be split); ``steps`` otherwise.
    wall_seconds : float
        Wall-clock time of the whole call, including ``on_output`` callbacks.
    max_error_estimate : float
        Largest per-step error estimate, relative to the state norm (Chebyshev: rigorous tail
        bound ``2 sum_{n>=N} |J_n(a dt)|`` given correct bounds; Lanczos: a posteriori
        estimate; scipy-krylov: the requested tolerance, not verified).
    total_error_estimate : float
        Sum of per-step estimates: bounds the accumulated error for Chebyshev.
    vectors_held : int
        Full-size complex vectors the propagator held at its peak (not counting ``psi0``).
    bounds : SpectralBounds or None
        Bounds used by the Chebyshev propagator.
    """

    method: str
    matvecs: int
    orders: tuple
    steps: int
    substeps: int
    wall_seconds: float
    max_error_estimate: float
    total_error_estimate: float
    vectors_held: int
    bounds: SpectralBounds | None = None

    def matvecs_per_time(self, duration: float) -> float:
        """Matrix-vector products per unit of (inverse-energy) time, for ``duration`` covered."""
        if not duration > 0:
            raise ValueError(f"duration must be > 0, got {duration!r}")
        return self.matvecs / duration


# ----------------------------------------------------------------------------------------
# Chebyshev
# ----------------------------------------------------------------------------------------

def _log_tail_bound(x: float, n: np.ndarray) -> np.ndarray:
    """log of 2 (x/2)^n / n!, an upper bound of sum_{k>=n} |J_k(x)| for n + 1 >= x."""
    return math.log(2.0) + n * math.log(x / 2.0) - gammaln(n + 1.0)


def _tail_sums(x: float, tol: float) -> tuple[np.ndarray, np.ndarray]:
    """|J_n(x)| for n = 0..M and the tail bounds tail[n] = 2 sum_{k>=n} |J_k(x)|.

    Beyond M the rigorous bound |J_k(x)| <= (x/2)^k / k! is used; for k + 1 >= x its terms
    at least halve, so sum_{k>=m} |J_k| <= 2 (x/2)^m / m!.  M >= x is the smallest integer
    with 2 * 2 (x/2)^M / M! <= 1e-3 tol, so tail[M] <= 1e-3 tol and an order always exists.
    """
    m = int(math.ceil(x)) + 1
    target = math.log(1e-3 * tol / 2.0)
    step = max(8, int(0.1 * x))
    while _log_tail_bound(x, np.float64(m)) > target:
        m += step
    n = np.arange(m + 1)
    absj = np.abs(jv(n, x))
    rest = math.exp(_log_tail_bound(x, np.float64(m + 1)))  # >= sum_{k>m} |J_k|
    tail = 2.0 * (np.cumsum(absj[::-1])[::-1] + rest)
    return absj, tail


def chebyshev_order(x: float, tol: float = 1e-10) -> tuple[int, float]:
    """Number of Chebyshev terms ``N`` for ``exp(-i x Ht)`` with error <= ``tol``.

    ``N`` is the smallest integer with ``2 sum_{n>=N} |J_n(x)| <= tol`` (Bessel values from
    scipy.special.jv, the far tail from ``|J_n(x)| <= (x/2)^n / n!``); ``x = a dt`` is
    dimensionless.

    Returns
    -------
    order : int
        Number of terms (``order - 1`` matrix-vector products).
    error_bound : float
        ``2 sum_{n >= order} |J_n(x)|``, bound on the truncation error relative to the norm.
    """
    if not (np.isfinite(x) and x >= 0):
        raise ValueError(f"x = a*dt must be finite and >= 0, got {x!r}")
    if not (0 < tol < 1):
        raise ValueError(f"tol must be in (0, 1), got {tol!r}")
    if x == 0:
        return 1, 0.0
    _, tail = _tail_sums(float(x), float(tol))
    # terms 0..order-1 are kept; tail[order] bounds what is dropped; tail[-1] <= 1e-3 tol
    order = max(int(np.argmax(tail <= tol)), 1)
    return order, float(tail[order])


def chebyshev_coefficients(dt: float, bounds: SpectralBounds, tol: float = 1e-10
                           ) -> tuple[np.ndarray, float]:
    """Coefficients ``c_n = e^{-i b dt} (2 - delta_n0) (-i)^n J_n(a dt)`` for n < order.

    ``exp(-iH dt) psi = sum_n c_n T_n((H - b)/a) psi`` up to the returned error bound
    (relative to ``|psi|``), with ``a = bounds.half_width``, ``b = bounds.center``.
    """
    a, b = bounds.half_width, bounds.center
    order, err = chebyshev_order(a * dt, tol)
    n = np.arange(order)
    c = jv(n, a * dt) * (-1j) ** (n % 4)
    c[1:] *= 2.0
    c *= np.exp(-1j * b * dt)
    return c, err


def _chebyshev_block(op, psi, dts, bounds, tol, outs, work_a, work_b):
    """outs[k] <- exp(-iH dts[k]) psi for all k, sharing one recursion.

    ``outs``: a C-contiguous (len(dts), N) array (one row per output time).  Holds psi, two work
    vectors and the rows of ``outs``.  The rows are updated every second product with two
    Chebyshev vectors at once (phi_{n-1} and phi_n are both held right after the product that
    makes phi_n), so each row is read and written once per two products.
    Returns (matvecs, order, err).
    """
    a, b = bounds.half_width, bounds.center
    coeffs, errs = [], []
    for dt in dts:
        c, e = chebyshev_coefficients(float(dt), bounds, tol)
        coeffs.append(c)
        errs.append(e)
    order = max(len(c) for c in coeffs)
    cmat = np.zeros((len(coeffs), order + 1), np.complex128)  # padded with zeros
    for k, c in enumerate(coeffs):
        cmat[k, :len(c)] = c
    if order == 1:
        for k in range(len(coeffs)):
            np.multiply(psi, cmat[k, 0], out=outs[k])
        return 0, order, max(errs)
    # phi_1 = Ht psi
    fused_update(op, psi, work_b, 1.0 / a, -b / a, 0.0)
    accumulate_pair(outs, cmat[:, 0], psi, cmat[:, 1], work_b, overwrite=True)
    work_a[...] = psi
    prev, cur = work_a, work_b
    alpha, beta = 2.0 / a, -2.0 * b / a
    for n in range(2, order):
        # prev <- 2 Ht cur - prev  (= phi_n)
        fused_update(op, cur, prev, alpha, beta, -1.0)
        prev, cur = cur, prev  # cur = phi_n, prev = phi_{n-1}
        if n % 2 == 1:
            accumulate_pair(outs, cmat[:, n - 1], prev, cmat[:, n], cur)
        elif n == order - 1:
            accumulate_pair(outs, cmat[:, n], cur, cmat[:, n + 1], prev)  # second factor is 0
    return order - 1, order, max(errs)


# ----------------------------------------------------------------------------------------
# Lanczos
# ----------------------------------------------------------------------------------------

def krylov_apriori_bound(m: int, half_width: float, dt: float) -> float:
    """A priori error bound of the m-dimensional Lanczos approximation of exp(-iH dt) psi.

    Hochbruck & Lubich, SIAM J. Numer. Anal. 34, 1911 (1997): for spectrum in an interval of
    width ``4 rho`` (``rho = half_width / 2``) and ``m >= 2 rho dt``, the error is at most
    ``12 exp(-(rho dt)^2 / m) (e rho dt / m)^m`` (relative to |psi|).  Returns ``inf`` where
    the bound does not apply (``m < 2 rho dt``).
    """
    if m < 1:
        raise ValueError(f"m must be >= 1, got {m!r}")
    rt = 0.5 * half_width * abs(dt)
    if m < 2 * rt:
        return math.inf
    if rt == 0:
        return 0.0
    return 12.0 * math.exp(-rt * rt / m + m * math.log(math.e * rt / m))


def _krylov_coeffs(theta, s, tau):
    """exp(-i T tau) e_1 = S diag(e^{-i theta tau}) S^T e_1."""
    return s @ (np.exp(-1j * theta * tau) * s[0, :])


def _tridiag_eig(alphas, betas):
    if len(alphas) == 1:
        return np.asarray(alphas, dtype=float), np.ones((1, 1))
    return eigh_tridiagonal(np.asarray(alphas), np.asarray(betas))


def _lanczos_step(op, psi, dt, tol, max_krylov, basis, out, orders):
    """out <- exp(-iH dt) psi with adaptive Krylov dimension and substeps.

    ``basis`` is a list of reusable full-size vectors that grows up to max_krylov + 1.
    Returns (matvecs, substeps, error_estimate).
    """
    n = psi.shape[0]
    mmax = min(max_krylov, n)
    matvecs = 0
    substeps = 0
    err_total = 0.0
    src = psi
    remaining = float(dt)
    while True:
        nrm = float(norm(src))
        if len(basis) == 0:
            basis.append(np.empty_like(psi))
        np.multiply(src, 1.0 / nrm, out=basis[0])
        alphas: list[float] = []
        betas: list[float] = []
        scale = 0.0
        tau = remaining
        final = True
        converged = False
        for j in range(mmax):
            if len(basis) < j + 2:
                basis.append(np.empty_like(psi))
            w = basis[j + 1]
            fused_update(op, basis[j], w, 1.0, 0.0, 0.0)
            matvecs += 1
            if j > 0:
                axpy(-betas[j - 1], basis[j - 1], w)
            alpha = float(vdot(basis[j], w).real)
            axpy(-alpha, basis[j], w)
            beta = float(norm(w))
            alphas.append(alpha)
            scale = max(scale, abs(alpha), beta)
            theta, s = _tridiag_eig(alphas, betas)
            y = _krylov_coeffs(theta, s, tau)
            err = beta * abs(y[-1])
            if err <= tol * tau / dt or beta <= 1e-14 * scale:
                converged = True
                break
            if j == mmax - 1:
                break
            betas.append(beta)
            w /= beta
        m = len(alphas)
        if not converged:
            # shorten the substep: tau = remaining / 2^k until the estimate, scaled to the
            # fraction of the step, meets the tolerance
            final = False
            k = 0
            while True:
                k += 1
                tau = remaining * 0.5 ** k
                y = _krylov_coeffs(theta, s, tau)
                err = beta * abs(y[-1])
                if err <= tol * tau / dt or k > 60:
                    break
        # out <- nrm * sum_i y_i v_i  (basis[0] holds src / nrm, so src may be out itself)
        np.multiply(basis[0], nrm * y[0], out=out)
        for i in range(1, m):
            axpy(nrm * y[i], basis[i], out)
        orders.append(m)
        substeps += 1
        err_total += err
        if final:
            return matvecs, substeps, err_total
        remaining = remaining - tau
        src = out


# ----------------------------------------------------------------------------------------
# Driver
# ----------------------------------------------------------------------------------------

def _validate_common(op, psi0, times, tol, start_index, on_output, progress):
    n = check_operator(op)
    psi0 = np.asarray(psi0)
    if psi0.ndim != 1 or psi0.shape[0] != n:
        raise ValueError(f"psi0 must have shape ({n},) to match op, got {psi0.shape}")
    times = np.asarray(times, dtype=float)
    if times.ndim != 1 or times.size < 1:
        raise ValueError(f"times must be a non-empty 1-d array, got shape {times.shape}")
    if not np.all(np.isfinite(times)):
        raise ValueError("times must be finite")
    if times.size > 1 and not np.all(np.diff(times) > 0):
        bad = int(np.argmax(~(np.diff(times) > 0)))
        raise ValueError(
            f"times must be strictly increasing; times[{bad}] = {times[bad]!r} >= "
            f"times[{bad + 1}] = {times[bad + 1]!r}")
    if not (isinstance(tol, (float, int)) and 0 < tol < 1):
        raise ValueError(f"tol must be a number in (0, 1), got {tol!r}")
    if not isinstance(start_index, (int, np.integer)) or not (0 <= start_index < times.size):
        raise ValueError(
            f"start_index must be an integer in 0..{times.size - 1}, got {start_index!r}")
    if on_output is not None and not callable(on_output):
        raise ValueError(f"on_output must be callable or None, got {on_output!r}")
    if progress is not None and not callable(progress):
        raise ValueError(f"progress must be callable or None, got {progress!r}")
    if not np.all(np.isfinite(psi0)):
        raise ValueError("psi0 must be finite")
    if not np.any(psi0):
        raise ValueError("psi0 must be nonzero")
    return times, int(start_index)


def _readonly(v: np.ndarray) -> np.ndarray:
    view = v.view()
    view.flags.writeable = False
    return view


def evolve(op, psi0: np.ndarray, times, *, method: str = "chebyshev",
           bounds: SpectralBounds | None = None, tol: float = 1e-10, block: int = 1,
           on_output: Callable[[int, float, np.ndarray], None] | None = None,
           start_index: int = 0, progress: Callable[[int, int], None] | None = None,
           emit_start: bool = True, max_krylov: int = 30) -> EvolutionStats:
    """Advance ``psi0`` (the state at ``times[start_index]``) through the later output times.

    ``psi(t_i) = exp(-i H (t_i - t_{start_index})) psi0`` for i = start_index+1 .. len(times)-1
    (hbar = 1, times in inverse energy units of ``op``).

    Parameters
    ----------
    op : LinearOperator-like, Hermitian, shape (N, N)
        Only ``shape``, ``dtype``, ``@`` and largeq's ``fused_update`` are used.
    psi0 : ndarray, shape (N,)
        State at ``times[start_index]``; not modified (copied once to complex128).
    times : 1-d array of float
        Strictly increasing output times (need not be uniform).
    method : {"chebyshev", "lanczos"}
    bounds : SpectralBounds, optional
        Spectral interval for Chebyshev; computed with :func:`spectral_bounds` (fixed seed,
        hence deterministic) when ``None``.  Ignored by Lanczos.
    tol : float, default 1e-10
        Error allowed per propagation step, relative to the norm.
    block : int, default 1
        Chebyshev only: number of consecutive output times sharing one expansion.  Blocks are
        aligned to absolute indices ``[k*block, (k+1)*block]``; the expansion runs from the
        state at the block start, so it costs ``block`` result vectors but only one
        ``O(log 1/tol)`` overhead per block.  Must be 1 for Lanczos.
    on_output : callable(i, t, psi), optional
        Called at every output index in order, with a read-only view of the state (copy it to
        keep it; it is overwritten later).  Compute observables and checkpoint here.
    start_index : int, default 0
        Index of ``times`` at which ``psi0`` is given.  With ``block > 1`` it must be a
        multiple of ``block``: only states at block boundaries (indices ``k*block`` and the
        last index) are valid resume points.
    progress : callable(i_done, n_total), optional
        Called after each output with the absolute index reached and ``len(times) - 1``.
    emit_start : bool, default True
        Whether ``on_output`` is also called at ``start_index`` itself (with ``psi0``).  Set it
        False when resuming if the start output was already recorded.
    max_krylov : int, default 30
        Lanczos only: largest Krylov dimension before a step is split into substeps.

    Returns
    -------
    EvolutionStats

    Notes
    -----
    Full-size complex vectors held (besides ``psi0``): Chebyshev ``3 + block`` (state, two
    recursion vectors, one result per output in a block); Lanczos up to ``max_krylov + 3``
    (basis, state, result).  Resume determinism: each step's arithmetic depends only on the
    state at the step's start and on ``times`` at absolute indices, so resuming from a saved
    state at a valid resume point reproduces the uninterrupted run exactly (same operator,
    bounds and thread count).  Chebyshev raises RuntimeError if within one step the norm changes by more than
    ``2 tol + 1e-9`` (the bounds do not contain the spectrum).
    """
    t_start = time.perf_counter()
    times, start_index = _validate_common(op, psi0, times, tol, start_index, on_output, progress)
    if method not in METHODS:
        raise ValueError(f"method must be one of {METHODS}, got {method!r}")
    if not isinstance(block, (int, np.integer)) or block < 1:
        raise ValueError(f"block must be an integer >= 1, got {block!r}")
    if method == "lanczos" and block != 1:
        raise ValueError(f"block must be 1 for method='lanczos', got {block!r}")
    if start_index % block != 0:
        raise ValueError(
            f"start_index must be a multiple of block={block} (a block boundary, where "
            f"checkpoints are valid), got {start_index}")
    if not isinstance(max_krylov, (int, np.integer)) or max_krylov < 2:
        raise ValueError(f"max_krylov must be an integer >= 2, got {max_krylov!r}")
    if method == "chebyshev":
        if bounds is None:
            bounds = spectral_bounds(op)
        elif not isinstance(bounds, SpectralBounds):
            raise ValueError(f"bounds must be a SpectralBounds or None, got {type(bounds)!r}")
        if not (bounds.half_width > 0 and np.isfinite(bounds.half_width)):
            raise ValueError(f"bounds must have a finite positive width, got {bounds!r}")

    n_times = times.size
    state = np.array(psi0, dtype=np.complex128, copy=True)
    if emit_start and on_output is not None:
        on_output(start_index, float(times[start_index]), _readonly(state))

    matvecs = 0
    orders: list[int] = []
    errs: list[float] = []
    steps = 0
    substeps = 0
    vectors = 1
    i = start_index
    if method == "chebyshev":
        work_a = np.empty_like(state)
        work_b = np.empty_like(state)
        outs = np.empty((min(block, n_times - 1 - i), state.size), np.complex128)
        vectors = 3 + len(outs)
        while i < n_times - 1:
            j_end = min(n_times - 1, (i // block + 1) * block)
            dts = times[i + 1:j_end + 1] - times[i]
            norm_start = float(norm(state))  # per-step check: round-off may accumulate over many steps
            mv, order, err = _chebyshev_block(op, state, dts, bounds, tol,
                                              outs[:len(dts)], work_a, work_b)
            matvecs += mv
            orders.append(order)
            errs.append(err)
            steps += 1
            for k in range(len(dts)):
                nk = float(norm(outs[k]))
                if abs(nk - norm_start) > (2 * tol + 1e-9) * norm_start:
                    raise RuntimeError(
                        f"norm changed from {norm_start!r} to {nk!r} within one step, at output index {i + 1 + k}: "
                        f"the spectral bounds [{bounds.e_min}, {bounds.e_max}] probably do not "
                        "contain the spectrum of op")
                if on_output is not None:
                    on_output(i + 1 + k, float(times[i + 1 + k]), _readonly(outs[k]))
                if progress is not None:
                    progress(i + 1 + k, n_times - 1)
            state[...] = outs[len(dts) - 1]
            i = j_end
        substeps = steps
    else:
        basis: list[np.ndarray] = []
        out = np.empty_like(state)
        while i < n_times - 1:
            dt = float(times[i + 1] - times[i])
            mv, ns, err = _lanczos_step(op, state, dt, tol, int(max_krylov), basis, out, orders)
            matvecs += mv
            substeps += ns
            steps += 1
            errs.append(err)
            state, out = out, state
            i += 1
            if on_output is not None:
                on_output(i, float(times[i]), _readonly(state))
            if progress is not None:
                progress(i, n_times - 1)
        vectors = len(basis) + 2
        bounds = None

    return EvolutionStats(
        method=method,
        matvecs=int(matvecs),
        orders=tuple(int(o) for o in orders),
        steps=steps,
        substeps=substeps,
        wall_seconds=time.perf_counter() - t_start,
        max_error_estimate=float(max(errs, default=0.0)),
        total_error_estimate=float(sum(errs)),
        vectors_held=int(vectors),
        bounds=bounds,
    )


def evolve_scipy_krylov(op, psi0: np.ndarray, times, *, tol: float = 1e-10,
                        on_output: Callable[[int, float, np.ndarray], None] | None = None,
                        start_index: int = 0,
                        progress: Callable[[int, int], None] | None = None,
                        emit_start: bool = True, restart_every_m: int | None = None,
                        max_restarts: int = 20) -> EvolutionStats:
    """Comparison peer: the same driver contract as :func:`evolve`, each step done by
    ``scipy.sparse.linalg.funm_multiply_krylov(expm(-i X), H, psi, t=dt, assume_a='hermitian')``
    (restarted Krylov; scipy >= 1.17).

    ``tol`` is passed as ``rtol`` (scipy's convergence test compares successive restart
    cycles, so it is not a verified error bound).  Holds about ``restart_every_m + 3``
    full-size vectors (scipy default: 20 + 3).  Raises RuntimeError if scipy lacks the function.
    """
    import scipy.sparse.linalg as spla
    from scipy.linalg import expm

    func = getattr(spla, "funm_multiply_krylov", None)
    if func is None:
        raise RuntimeError("scipy.sparse.linalg.funm_multiply_krylov needs scipy >= 1.17")
    t_start = time.perf_counter()
    times, start_index = _validate_common(op, psi0, times, tol, start_index, on_output, progress)
    n = op.shape[0]
    count = [0]

    def matvec(v):
        count[0] += 1
        return op @ v

    def matmat(m):
        count[0] += m.shape[1]
        return op @ m

    dtype = np.result_type(getattr(op, "dtype", np.float64), np.complex128)
    lin = spla.LinearOperator((n, n), matvec=matvec, matmat=matmat, rmatvec=matvec, dtype=dtype)
    state = np.array(psi0, dtype=np.complex128, copy=True)
    if emit_start and on_output is not None:
        on_output(start_index, float(times[start_index]), _readonly(state))
    orders = []
    for i in range(start_index + 1, times.size):
        dt = float(times[i] - times[i - 1])
        before = count[0]
        state = np.asarray(func(lambda x: expm(-1j * x), lin, state, assume_a="hermitian", t=dt,
                                rtol=tol, restart_every_m=restart_every_m,
                                max_restarts=max_restarts), dtype=np.complex128)
        orders.append(count[0] - before)
        if on_output is not None:
            on_output(i, float(times[i]), _readonly(state))
        if progress is not None:
            progress(i, times.size - 1)
    m = restart_every_m if restart_every_m is not None else min(20, n)
    return EvolutionStats(
        method="scipy-krylov",
        matvecs=int(sum(orders)),
        orders=tuple(orders),
        steps=len(orders),
        substeps=len(orders),
        wall_seconds=time.perf_counter() - t_start,
        max_error_estimate=float(tol) if orders else 0.0,
        total_error_estimate=float(tol) * len(orders),
        vectors_held=int(m + 3),
        bounds=None,
    )
