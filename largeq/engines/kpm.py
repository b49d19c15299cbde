"""Kernel polynomial method: Chebyshev moments, kernels, densities of states.

Reference for every formula here: A. Weisse, G. Wellein, A. Alvermann and H. Fehske,
"The kernel polynomial method", Rev. Mod. Phys. 78, 275 (2006).

The spectrum of ``H`` is mapped into [-1, 1] by ``Ht = (H - b) / a`` with
``a = (E_max - E_min) / (2 - eps)`` and ``b = (E_max + E_min) / 2``.  Moments
``mu_n = <v|T_n(Ht)|v>`` are produced two per matrix-vector product
(``mu_2n = 2<phi_n|phi_n> - mu_0``, ``mu_2n+1 = 2<phi_n+1|phi_n> - mu_1``), damped by a kernel
``g_n`` and summed on the Chebyshev nodes ``x_k = cos(pi (k + 1/2) / Nt)`` with a type-III
discrete cosine transform.

Normalisation choices (stated once, used everywhere below):

* a local density of states (LDOS) is that of the *normalised* input state, so it integrates
  to 1; the input norm is reported separately;
* a density of states (DOS) from the stochastic trace integrates to the dimension ``D``
  exactly: every random vector is scaled to ``||r||^2 = D``;
* the cumulative (counting) function is the exact integral of the kernel-damped Chebyshev
  series from the lower end of the rescaled interval, ``E = b - a``, evaluated from the moments
  (``int T_n / (pi sqrt(1 - x^2)) dx`` is elementary), not a quadrature of the sampled density.

Energies are in the units of the operator; densities in states per energy unit.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
import scipy.fft

from largeq.engines.chebyshev import apply_chebyshev_series, check_vector, chebyshev_scale
from largeq.engines.random_vectors import child_generators, random_state
from largeq.operators.linalg import apply_into, fused_update, result_dtype
from largeq.operators.vectors import column_vdots, vdot

__all__ = [
    "SpectralDensity",
    "chebyshev_scale",
    "chebyshev_moments",
    "chebyshev_moments_block",
    "jackson_kernel",
    "lorentz_kernel",
    "kernel_factors",
    "kernel_resolution",
    "reconstruct_density",
    "reconstruct_cumulative",
    "local_density",
    "density_of_states",
    "dos_on_grid",
    "counting_function",
    "apply_chebyshev_series",
]

_KERNELS = ("jackson", "lorentz", "none")


def _check_n_moments(n_moments) -> int:
    if int(n_moments) != n_moments or n_moments < 2:
        raise ValueError(f"n_moments must be an integer >= 2, got {n_moments!r}")
    return int(n_moments)


# --------------------------------------------------------------------------- moments
def chebyshev_moments(op, v: np.ndarray, n_moments: int, bounds, *, eps: float = 0.01) -> np.ndarray:
    """Chebyshev moments ``mu_n = <v|T_n(Ht)|v>``, n = 0 .. n_moments - 1 (dimensionless).

    ``Ht = (H - b) / a`` (see :func:`chebyshev_scale`); two moments per matrix-vector product:
    ``mu_2n = 2<phi_n|phi_n> - mu_0`` and ``mu_2n+1 = 2<phi_n+1|phi_n> - mu_1`` with
    ``phi_n = T_n(Ht) v``.  Costs ``ceil(n_moments / 2)`` products; holds 2 full-size vectors
    besides ``v`` (``v`` is not modified).  ``v`` is not normalised: ``mu_0 = <v|v>``.

    Parameters
    ----------
    op : LinearOperator, sparse matrix, ndarray or largeq operator (Hermitian)
    v : numpy.ndarray, shape (D,)
    n_moments : int, >= 2
    bounds : (e_min, e_max) or object with e_min/e_max; must enclose the spectrum
    eps : float, rescaling margin

    Returns
    -------
    numpy.ndarray of float64, shape (n_moments,)
    """
    n_moments = _check_n_moments(n_moments)
    v = check_vector(op, v)
    a, b = chebyshev_scale(bounds, eps)
    dtype = result_dtype(op, v)
    mu = np.empty(n_moments)
    prev = np.array(v, dtype=dtype, copy=True)       # phi_0
    cur = np.empty_like(prev)
    fused_update(op, prev, cur, 1.0 / a, -b / a, 0.0)  # phi_1 = Ht phi_0
    mu0 = vdot(prev, prev).real
    mu1 = vdot(prev, cur).real
    mu[0] = mu0
    mu[1] = mu1
    n = 1  # cur = phi_n, prev = phi_{n-1}
    while 2 * n < n_moments:
        mu[2 * n] = 2.0 * vdot(cur, cur).real - mu0
        if 2 * n + 1 >= n_moments:
            break
        fused_update(op, cur, prev, 2.0 / a, -2.0 * b / a, -1.0)  # prev <- phi_{n+1}
        mu[2 * n + 1] = 2.0 * vdot(prev, cur).real - mu1
        prev, cur = cur, prev
        n += 1
    return mu


def _block_update(op, X, Y, alpha, beta, gamma):
    """Y <- alpha * (op X) + beta * X + gamma * Y for the columns of (D, R) arrays."""
    method = getattr(op, "fused_update_block", None)
    if method is not None:
        method(X, Y, alpha, beta, gamma)
        return Y
    for j in range(X.shape[1]):
        yj = np.ascontiguousarray(Y[:, j])
        fused_update(op, np.ascontiguousarray(X[:, j]), yj, alpha, beta, gamma)
        Y[:, j] = yj
    return Y


def chebyshev_moments_block(op, V: np.ndarray, n_moments: int, bounds, *, eps: float = 0.01) -> np.ndarray:
    """Chebyshev moments of R vectors at once: row r equals ``chebyshev_moments(op, V[:, r], ...)``.

    ``V``: (D, R) array, one vector per column (not modified).  The recursion runs on all
    columns together, so every product reads the operator's tables once per R vectors
    (``PauliOperator.fused_update_block``; other operators are applied column by column).
    Holds 2 (D, R) arrays besides ``V``.  Returns an array of shape (R, n_moments).
    """
    n_moments = _check_n_moments(n_moments)
    V = np.asarray(V)
    if V.ndim != 2:
        raise ValueError(f"V must be a 2-d array (one vector per column), got shape {V.shape}")
    shape = getattr(op, "shape", None)
    if shape is not None and (shape[0] != shape[1] or shape[1] != V.shape[0]):
        raise ValueError(f"V has {V.shape[0]} rows but the operator has shape {shape}")
    a, b = chebyshev_scale(bounds, eps)
    dtype = result_dtype(op, V)
    R = V.shape[1]
    mu = np.empty((R, n_moments))
    prev = np.array(V, dtype=dtype, order="C", copy=True)  # phi_0
    cur = np.empty_like(prev)
    _block_update(op, prev, cur, 1.0 / a, -b / a, 0.0)  # phi_1 = Ht phi_0
    mu0 = column_vdots(prev, prev).real
    mu1 = column_vdots(prev, cur).real
    mu[:, 0] = mu0
    mu[:, 1] = mu1
    n = 1
    while 2 * n < n_moments:
        mu[:, 2 * n] = 2.0 * column_vdots(cur, cur).real - mu0
        if 2 * n + 1 >= n_moments:
            break
        _block_update(op, cur, prev, 2.0 / a, -2.0 * b / a, -1.0)  # prev <- phi_{n+1}
        mu[:, 2 * n + 1] = 2.0 * column_vdots(prev, cur).real - mu1
        prev, cur = cur, prev
        n += 1
    return mu


# --------------------------------------------------------------------------- kernels
def jackson_kernel(n_moments: int) -> np.ndarray:
    """Jackson damping factors ``g_n``, n = 0 .. N-1 (N = n_moments).

    ``g_n = [(N - n + 1) cos(pi n / (N + 1)) + sin(pi n / (N + 1)) cot(pi / (N + 1))] / (N + 1)``.
    Positive kernel; a delta peak at x becomes a near-Gaussian of width ~ pi/N (band centre).
    """
    N = _check_n_moments(n_moments)
    n = np.arange(N)
    q = np.pi / (N + 1)
    return ((N - n + 1) * np.cos(q * n) + np.sin(q * n) / np.tan(q)) / (N + 1)


def lorentz_kernel(n_moments: int, lam: float = 4.0) -> np.ndarray:
    """Lorentz damping factors ``g_n = sinh(lam (1 - n/N)) / sinh(lam)``, n = 0 .. N-1.

    Gives Lorentzian broadening of width ~ lam/N (rescaled units); lam in 3..5 is usual.
    """
    N = _check_n_moments(n_moments)
    if not lam > 0:
        raise ValueError(f"lam must be > 0, got {lam}")
    n = np.arange(N)
    return np.sinh(lam * (1.0 - n / N)) / np.sinh(lam)


def kernel_factors(kernel: str, n_moments: int) -> np.ndarray:
    """Damping factors for ``kernel`` in {'jackson', 'lorentz', 'none'} (lorentz with lam = 4)."""
    if kernel == "jackson":
        return jackson_kernel(n_moments)
    if kernel == "lorentz":
        return lorentz_kernel(n_moments)
    if kernel == "none":
        return np.ones(_check_n_moments(n_moments))
    raise ValueError(f"kernel must be one of {_KERNELS}, got {kernel!r}")


def kernel_resolution(g: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Standard deviation (rescaled units) of a delta peak at ``x`` after damping by ``g``.

    Exact for any kernel: ``sigma^2 = (1 + g_2 T_2(x)) / 2 - (g_1 x)^2``.  For Jackson this is
    ``~ (pi / N) sqrt(1 - x^2)`` away from the edges.  Multiply by ``a`` for energy units.
    """
    x = np.asarray(x, dtype=float)
    var = 0.5 * (1.0 + g[2] * (2.0 * x**2 - 1.0)) - (g[1] * x) ** 2
    return np.sqrt(np.maximum(var, 0.0))


# --------------------------------------------------------------------------- reconstruction
def _nodes(n_points: int) -> np.ndarray:
    return np.cos(np.pi * (np.arange(n_points) + 0.5) / n_points)


def reconstruct_density(damped: np.ndarray, n_points: int) -> tuple[np.ndarray, np.ndarray]:
    """Chebyshev series ``[c_0 + 2 sum_n c_n T_n(x)] / (pi sqrt(1 - x^2))`` on the nodes.

    ``damped`` holds ``c_n = mu_n g_n`` (last axis).  Returns ``(x, rho)`` with x ascending
    (rescaled units, density per rescaled unit).  One type-III DCT of length ``n_points``.
    """
    damped = np.asarray(damped, dtype=float)
    N = damped.shape[-1]
    if n_points < N:
        raise ValueError(f"n_points must be >= n_moments = {N}, got {n_points}")
    pad = np.zeros(damped.shape[:-1] + (n_points,))
    pad[..., :N] = damped
    gamma = scipy.fft.dct(pad, type=3, axis=-1)  # c_0 + 2 sum c_n cos(n theta_k)
    x = _nodes(n_points)
    rho = gamma / (np.pi * np.sqrt(1.0 - x**2))
    return x[::-1].copy(), rho[..., ::-1].copy()


def reconstruct_cumulative(damped: np.ndarray, n_points: int) -> tuple[np.ndarray, np.ndarray]:
    """Exact integral of the damped series from -1 to each node x_k (ascending x).

    With ``x = cos(theta)``: ``int_{-1}^{x} rho = c_0 (1 - theta/pi) - (2/pi) sum_n c_n sin(n theta)/n``.
    The sine sum is one type-III DST of length ``n_points``.
    """
    damped = np.asarray(damped, dtype=float)
    N = damped.shape[-1]
    if n_points < N:
        raise ValueError(f"n_points must be >= n_moments = {N}, got {n_points}")
    # DST-III: y_k = (-1)^k s_{M-1} + 2 sum_{m=0}^{M-2} s_m sin(pi (m+1)(k+1/2) / M); put
    # s_m = c_{m+1} / (m+1) so that y_k = 2 sum_{n>=1} c_n sin(n theta_k) / n (s_{M-1} = 0).
    s = np.zeros(damped.shape[:-1] + (n_points,))
    n = np.arange(1, N)
    s[..., : N - 1] = damped[..., 1:] / n
    y = scipy.fft.dst(s, type=3, axis=-1)
    theta = np.pi * (np.arange(n_points) + 0.5) / n_points
    cum = damped[..., :1] * (1.0 - theta / np.pi) - y / np.pi
    x = np.cos(theta)
    return x[::-1].copy(), cum[..., ::-1].copy()


# --------------------------------------------------------------------------- results
@dataclass(frozen=True, eq=False)
class SpectralDensity:
    """A KPM density (LDOS or DOS) on the Chebyshev nodes mapped to energies.

    Attributes
    ----------
    energies : ndarray (n_points,), ascending, energy units (``E = a x + b``).
    density : ndarray, states per energy unit (LDOS: integrates to 1; DOS: to ``dimension``).
    cumulative : ndarray, exact integral of ``density`` from ``b - a`` up to each energy.
    density_err, cumulative_err : ndarray or None
        Standard error from the spread over random vectors (DOS only; None for an LDOS).
    moments : ndarray (n_moments,), undamped moments (DOS: mean over vectors, mu_0 = D;
        LDOS: of the normalised state, mu_0 = 1).
    vector_moments : ndarray (n_vectors, n_moments) or None, per-vector DOS moments
        (each vector scaled to ``||r||^2 = D``) for checkpoint/resume.
    kernel : str; kernel_factors : ndarray (n_moments,) the ``g_n`` used.
    n_moments : int; scale, shift : float, the ``a`` and ``b`` of the rescaling (energy units).
    resolution : ndarray, standard deviation (energy units) of a broadened delta peak at each
        energy (:func:`kernel_resolution` times ``a``).
    resolution_center : float, ``pi a / N``: the Jackson width at the band centre.
    total : float, integral of the density (``mu_0 g_0``).
    mean_exact, variance_exact : float or None
        LDOS only: ``<psi|H|psi>`` and ``||H psi||^2 - <H>^2`` for the normalised state,
        computed from one direct product ``H psi``.
    mean_moments, variance_moments : float or None
        The same numbers implied by the moments: ``<H> = a mu_1 + b``,
        ``Var = a^2 [(1 + mu_2)/2 - mu_1^2]`` (normalised moments).
    norm : float or None, LDOS only: the norm of the input state.
    dimension : int; n_vectors : int (0 for an LDOS); vector_kind : str or None.
    """

    energies: np.ndarray
    density: np.ndarray
    cumulative: np.ndarray
    density_err: np.ndarray | None
    cumulative_err: np.ndarray | None
    moments: np.ndarray
    vector_moments: np.ndarray | None
    kernel: str
    kernel_factors: np.ndarray
    n_moments: int
    scale: float
    shift: float
    resolution: np.ndarray
    resolution_center: float
    total: float
    mean_exact: float | None
    variance_exact: float | None
    mean_moments: float | None
    variance_moments: float | None
    norm: float | None
    dimension: int
    n_vectors: int
    vector_kind: str | None


def _n_points(n_points, n_moments: int) -> int:
    if n_points is None:
        return 2 * n_moments
    if int(n_points) != n_points or n_points < n_moments:
        raise ValueError(f"n_points must be an integer >= n_moments = {n_moments}, got {n_points!r}")
    return int(n_points)


def _moment_mean_var(mu: np.ndarray, a: float, b: float) -> tuple[float, float]:
    m1 = mu[1] / mu[0]
    m2 = 0.5 * (1.0 + mu[2] / mu[0])
    return a * m1 + b, a * a * (m2 - m1 * m1)


# --------------------------------------------------------------------------- LDOS
def local_density(
    op,
    psi: np.ndarray,
    n_moments: int,
    bounds,
    kernel: str = "jackson",
    n_points: int | None = None,
    *,
    eps: float = 0.01,
) -> SpectralDensity:
    """Local density of states ``rho_psi(E) = sum_m |c_m|^2 delta(E - E_m)`` of the normalised psi.

    ``c_m = <m|psi> / ||psi||``; the result integrates to 1.  Costs ``ceil(N/2) + 1``
    products; holds 2 full-size vectors besides ``psi`` (the direct ``H psi`` for the exact
    mean and variance is made and freed before the moment loop).

    Parameters
    ----------
    op : Hermitian operator; psi : ndarray (D,), any nonzero norm
    n_moments : int >= 3; bounds : (e_min, e_max) enclosing the spectrum (energy units)
    kernel : 'jackson' (default), 'lorentz' or 'none'
    n_points : number of output energies (default 2 * n_moments)
    """
    n_moments = _check_n_moments(n_moments)
    if n_moments < 3:
        raise ValueError(f"n_moments must be >= 3 for the variance check, got {n_moments}")
    psi = check_vector(op, psi, "psi")
    a, b = chebyshev_scale(bounds, eps)
    g = kernel_factors(kernel, n_moments)
    npts = _n_points(n_points, n_moments)
    norm = float(np.linalg.norm(psi))
    if not norm > 0:
        raise ValueError("psi must be a nonzero vector")
    hpsi = np.empty(psi.shape, dtype=result_dtype(op, psi))
    apply_into(op, psi, hpsi)
    mean_exact = float(vdot(psi, hpsi).real) / norm**2
    var_exact = float(vdot(hpsi, hpsi).real) / norm**2 - mean_exact**2
    del hpsi
    mu = chebyshev_moments(op, psi, n_moments, bounds, eps=eps) / norm**2
    mean_m, var_m = _moment_mean_var(mu, a, b)
    x, rho = reconstruct_density(mu * g, npts)
    _, cum = reconstruct_cumulative(mu * g, npts)
    return SpectralDensity(
        energies=a * x + b,
        density=rho / a,
        cumulative=cum,
        density_err=None,
        cumulative_err=None,
        moments=mu,
        vector_moments=None,
        kernel=kernel,
        kernel_factors=g,
        n_moments=n_moments,
        scale=a,
        shift=b,
        resolution=a * kernel_resolution(g, x),
        resolution_center=np.pi * a / n_moments,
        total=float(mu[0] * g[0]),
        mean_exact=mean_exact,
        variance_exact=var_exact,
        mean_moments=float(mean_m),
        variance_moments=float(var_m),
        norm=norm,
        dimension=int(psi.shape[0]),
        n_vectors=0,
        vector_kind=None,
    )


# --------------------------------------------------------------------------- DOS
def density_of_states(
    op,
    n_moments: int,
    bounds,
    n_vectors: int,
    rng: np.random.Generator,
    kernel: str = "jackson",
    dtype=complex,
    n_points: int | None = None,
    on_vector: Callable[[int, np.ndarray], None] | None = None,
    *,
    done_moments: np.ndarray | None = None,
    vector_kind: str = "gaussian",
    eps: float = 0.01,
    vectors_per_pass: int = 1,
) -> SpectralDensity:
    """Density of states ``rho(E) = sum_m delta(E - E_m)`` by a stochastic trace (integrates to D).

    ``mu_n ~ (1/R) sum_r <r|T_n(Ht)|r>`` with each random vector scaled to ``||r||^2 = D``
    (complex or real Gaussian, or random phases; ``dtype=float`` for real Hamiltonians).
    Error bars: standard error over the R vectors (std / sqrt(R)) of the per-vector densities,
    which shrinks like 1/sqrt(R D) relative to D.  Holds 3 full-size vectors (3 per vector of a pass with ``vectors_per_pass > 1``).

    Vector ``i`` is drawn from child ``i`` of ``rng`` (:func:`~largeq.engines.random_vectors.child_generators`, the caller's generator is not advanced), so a run resumed with
    ``done_moments`` (the first k rows of an earlier ``vector_moments``) and a generator seeded
    the same way gives the same numbers as an uninterrupted run.

    Parameters
    ----------
    op : Hermitian operator of shape (D, D)
    n_moments : int >= 2; bounds : (e_min, e_max) enclosing the spectrum (energy units)
    n_vectors : int >= 1, total number of random vectors R (including done ones)
    rng : numpy.random.Generator
    kernel : 'jackson', 'lorentz' or 'none'
    dtype : complex or float, dtype of the random vectors
    n_points : output energies (default 2 * n_moments)
    on_vector : callable(i, moments_i), called after each newly computed vector (checkpoint)
    done_moments : ndarray (k, n_moments), moments of vectors 0..k-1 already computed
    vector_kind : 'gaussian' or 'phase' (random phases; random signs if dtype is real)
    vectors_per_pass : int >= 1, random vectors whose recursions run together
        (:func:`chebyshev_moments_block`); holds ``3 * vectors_per_pass`` full-size vectors.
        The moments are those of the one-at-a-time run up to rounding.
    """

    n_moments = _check_n_moments(n_moments)
    if int(n_vectors) != n_vectors or n_vectors < 1:
        raise ValueError(f"n_vectors must be an integer >= 1, got {n_vectors!r}")
    if not isinstance(rng, np.random.Generator):
        raise ValueError(f"rng must be a numpy.random.Generator, got {type(rng).__name__}")
    shape = getattr(op, "shape", None)
    if shape is None or shape[0] != shape[1]:
        raise ValueError(f"op must be square with a shape attribute, got shape {shape}")
    dim = int(shape[0])
    a, b = chebyshev_scale(bounds, eps)
    g = kernel_factors(kernel, n_moments)
    npts = _n_points(n_points, n_moments)
    moments = np.empty((int(n_vectors), n_moments))
    start = 0
    if done_moments is not None:
        done_moments = np.asarray(done_moments, dtype=float)
        if done_moments.ndim != 2 or done_moments.shape[1] != n_moments or done_moments.shape[0] > n_vectors:
            raise ValueError(
                f"done_moments must have shape (k <= {n_vectors}, {n_moments}), got {done_moments.shape}"
            )
        start = done_moments.shape[0]
        moments[:start] = done_moments
    if int(vectors_per_pass) != vectors_per_pass or vectors_per_pass < 1:
        raise ValueError(f"vectors_per_pass must be an integer >= 1, got {vectors_per_pass!r}")
    children = child_generators(rng, int(n_vectors))
    r = None
    if vectors_per_pass == 1:
        for i in range(start, int(n_vectors)):
            r = random_state(dim, children[i], kind=vector_kind, dtype=dtype, out=r)
            r *= np.sqrt(dim)
            moments[i] = chebyshev_moments(op, r, n_moments, bounds, eps=eps)
            if on_vector is not None:
                on_vector(i, moments[i].copy())
    else:
        for i0 in range(start, int(n_vectors), int(vectors_per_pass)):
            i1 = min(int(n_vectors), i0 + int(vectors_per_pass))
            if r is None or r.shape[1] != i1 - i0:
                r = np.empty((dim, i1 - i0), dtype=np.dtype(dtype))
            col = np.empty(dim, dtype=np.dtype(dtype))
            for i in range(i0, i1):
                r[:, i - i0] = random_state(dim, children[i], kind=vector_kind, dtype=dtype, out=col)
            del col
            r *= np.sqrt(dim)
            moments[i0:i1] = chebyshev_moments_block(op, r, n_moments, bounds, eps=eps)
            if on_vector is not None:
                for i in range(i0, i1):
                    on_vector(i, moments[i].copy())
    del r
    R = int(n_vectors)
    mu = moments.mean(axis=0)
    x, rho_i = reconstruct_density(moments * g, npts)
    _, cum_i = reconstruct_cumulative(moments * g, npts)
    rho = rho_i.mean(axis=0)
    cum = cum_i.mean(axis=0)
    if R > 1:
        rho_err = rho_i.std(axis=0, ddof=1) / np.sqrt(R)
        cum_err = cum_i.std(axis=0, ddof=1) / np.sqrt(R)
    else:
        rho_err = np.full_like(rho, np.nan)
        cum_err = np.full_like(cum, np.nan)
    return SpectralDensity(
        energies=a * x + b,
        density=rho / a,
        cumulative=cum,
        density_err=rho_err / a,
        cumulative_err=cum_err,
        moments=mu,
        vector_moments=moments,
        kernel=kernel,
        kernel_factors=g,
        n_moments=n_moments,
        scale=a,
        shift=b,
        resolution=a * kernel_resolution(g, x),
        resolution_center=np.pi * a / n_moments,
        total=float(mu[0] * g[0]),
        mean_exact=None,
        variance_exact=None,
        mean_moments=None,
        variance_moments=None,
        norm=None,
        dimension=dim,
        n_vectors=R,
        vector_kind=vector_kind,
    )


# --------------------------------------------------------------------------- helpers
def dos_on_grid(result: SpectralDensity, energies) -> np.ndarray:
    """Density of ``result`` linearly interpolated at ``energies`` (0 outside the node range)."""
    return np.interp(np.asarray(energies, dtype=float), result.energies, result.density, left=0.0, right=0.0)


def counting_function(result: SpectralDensity, energies) -> np.ndarray:
    """Exact integral of the KPM density of ``result`` from ``b - a`` to each energy.

    ``N(E) = c_0 (1 - theta/pi) - (2/pi) sum_{n>=1} c_n sin(n theta) / n``, ``cos(theta) = (E - b)/a``,
    ``c_n = mu_n g_n``; clipped to the rescaled interval.  O(len(energies) * n_moments) work.
    """
    x = np.clip((np.asarray(energies, dtype=float) - result.shift) / result.scale, -1.0, 1.0)
    theta = np.arccos(x)
    c = result.moments * result.kernel_factors
    n = np.arange(1, result.n_moments)
    out = c[0] * (1.0 - theta / np.pi)
    flat = theta.reshape(-1)
    sums = np.array([np.dot(c[1:] / n, np.sin(n * t)) for t in flat]).reshape(theta.shape)
    return out - 2.0 / np.pi * sums
