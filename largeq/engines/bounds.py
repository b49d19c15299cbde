"""Spectral bounds of a Hermitian operator from a short Lanczos run.

The Chebyshev propagator and the kernel-polynomial method both map the spectrum of ``H``
into ``[-1, 1]`` and need an interval ``[e_min, e_max]`` that contains it.  A few tens of
plain (three-term) Lanczos steps converge the extreme Ritz values quickly; the interval is
padded by a fraction of its width plus the Ritz residual estimate.

Memory: two full-size work vectors (plus one for a random start vector while it is made).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from largeq.operators.vectors import axpy, norm, vdot
from scipy.linalg import eigh_tridiagonal

from largeq.operators.linalg import fused_update

__all__ = ["SpectralBounds", "spectral_bounds", "lanczos_tridiagonal"]

#: Seed used when ``rng=None``: bounds are a pure function of the operator by default, so a
#: resumed run recomputes exactly the same interval.
DEFAULT_SEED = 20240917


@dataclass(frozen=True)
class SpectralBounds:
    """An interval ``[e_min, e_max]`` (energy units of the operator) containing the spectrum.

    Attributes
    ----------
    e_min, e_max : float
        Padded bounds: ``ritz_min - pad_low`` and ``ritz_max + pad_high``.
    ritz_min, ritz_max : float
        Extreme Ritz values of the Lanczos tridiagonal (inside the true spectral interval).
    residual_min, residual_max : float
        Ritz residual estimates ``beta_m |s_m|`` of the two extreme Ritz pairs (an eigenvalue of
        ``H`` lies within this distance of each Ritz value).
    steps : int
        Lanczos steps taken (= matrix-vector products spent).
    """

    e_min: float
    e_max: float
    ritz_min: float
    ritz_max: float
    residual_min: float
    residual_max: float
    steps: int

    @property
    def center(self) -> float:
        """Centre ``b = (e_max + e_min) / 2``."""
        return 0.5 * (self.e_max + self.e_min)

    @property
    def half_width(self) -> float:
        """Half width ``a = (e_max - e_min) / 2``: ``(H - b) / a`` has spectrum in ``[-1, 1]``."""
        return 0.5 * (self.e_max - self.e_min)

    def kpm_scaling(self, eps: float = 0.01) -> tuple[float, float]:
        """KPM rescaling ``(a, b)`` with ``a = (e_max - e_min) / (2 - eps)``, ``b = center``.

        Weiße et al., Rev. Mod. Phys. 78, 275 (2006): the extra ``eps`` keeps the spectrum of
        ``(H - b) / a`` strictly inside ``[-1 + eps/2, 1 - eps/2]`` (approximately).
        """
        if not (0.0 <= eps < 2.0):
            raise ValueError(f"eps must be in [0, 2), got {eps!r}")
        return (self.e_max - self.e_min) / (2.0 - eps), self.center



def check_operator(op) -> int:
    shape = getattr(op, "shape", None)
    if shape is None or len(shape) != 2 or shape[0] != shape[1]:
        raise ValueError(f"op must be a square operator with a 2-d shape, got shape {shape!r}")
    return int(shape[0])


def lanczos_tridiagonal(op, v0: np.ndarray, steps: int) -> tuple[np.ndarray, np.ndarray, int]:
    """Plain three-term Lanczos recursion started from ``v0`` (not modified).

    ``H V_m = V_m T_m + beta_m v_{m+1} e_m^T`` with ``T_m`` tridiagonal (diagonal ``alpha``,
    off-diagonal ``beta[:-1]``); no reorthogonalisation (ghost copies of converged Ritz values
    may appear, which does not affect the extreme ones).

    Parameters
    ----------
    op : LinearOperator-like, Hermitian, shape (N, N)
    v0 : ndarray, shape (N,)
        Start vector, nonzero.
    steps : int
        Maximal number of steps (matrix-vector products); stops earlier on breakdown
        (an invariant subspace was found).

    Returns
    -------
    alpha : ndarray, shape (m,)
    beta : ndarray, shape (m,)
        ``beta[:-1]`` is the off-diagonal of ``T_m``; ``beta[-1]`` is the residual norm
        ``beta_m`` (0 on breakdown).
    m : int
        Steps taken.

    Notes
    -----
    Holds two full-size vectors.
    """
    n = check_operator(op)
    dtype = np.result_type(getattr(op, "dtype", np.float64), v0.dtype, np.float64)
    v = np.array(v0, dtype=dtype, copy=True).reshape(-1)
    if v.shape[0] != n:
        raise ValueError(f"v0 must have length {n} to match op, got {v.shape[0]}")
    nrm = norm(v)
    if not np.isfinite(nrm) or nrm == 0.0:
        raise ValueError("v0 must be a finite, nonzero vector")
    v /= nrm
    w = np.zeros_like(v)  # holds v_{j-1}, overwritten by the new residual
    alphas: list[float] = []
    betas: list[float] = []
    beta = 0.0
    scale = 0.0
    for _ in range(min(steps, n)):
        # w <- H v - beta_{j-1} v_{j-1}
        fused_update(op, v, w, 1.0, 0.0, -beta)
        alpha = float(vdot(v, w).real)
        axpy(-alpha, v, w)
        beta = norm(w)
        alphas.append(alpha)
        betas.append(beta)
        scale = max(scale, abs(alpha), beta)
        if beta <= 1e-13 * scale:
            betas[-1] = 0.0
            break
        w /= beta
        v, w = w, v
    return np.asarray(alphas), np.asarray(betas), len(alphas)


def spectral_bounds(op, *, steps: int = 60, margin: float = 0.01, rng=None,
                    v0: np.ndarray | None = None) -> SpectralBounds:
    """Interval containing the spectrum of a Hermitian operator, from a short Lanczos run.

    ``e_min = ritz_min - margin * width - r_min``, ``e_max = ritz_max + margin * width + r_max``
    with ``width = ritz_max - ritz_min`` and ``r`` the Ritz residual estimates ``beta_m |s_m|``.

    Parameters
    ----------
    op : LinearOperator-like, Hermitian, shape (N, N), real or complex
        Only ``shape``, ``dtype`` and ``@`` (or largeq's ``fused_update``) are used.
    steps : int, default 60
        Lanczos steps (matrix-vector products); capped at ``N``.
    margin : float, default 0.01
        Relative padding (fraction of the Ritz width) added on both sides.
    rng : None, int or numpy.random.Generator
        Source of the random start vector (ignored if ``v0`` is given).  ``None`` uses a fixed
        seed, so the result is a deterministic function of ``op``.
    v0 : ndarray, optional
        Start vector.  It should overlap the extreme eigenvectors: a vector inside one
        symmetry sector only sees that sector's spectrum.

    Returns
    -------
    SpectralBounds

    Notes
    -----
    Holds two full-size vectors (three while the random start vector is drawn).  The extreme
    Ritz values lie inside the spectrum (Cauchy interlacing); the padding makes containment of
    the true spectrum very likely but is not a proof (a start vector orthogonal to an extreme
    eigenvector never sees it).
    """
    n = check_operator(op)
    if not isinstance(steps, (int, np.integer)) or steps < 1:
        raise ValueError(f"steps must be an integer >= 1, got {steps!r}")
    if not (np.isfinite(margin) and margin >= 0):
        raise ValueError(f"margin must be a finite number >= 0, got {margin!r}")
    if v0 is None:
        gen = np.random.default_rng(DEFAULT_SEED if rng is None else rng)
        if np.iscomplexobj(np.empty(0, dtype=getattr(op, "dtype", np.float64))):
            v0 = gen.standard_normal(n) + 1j * gen.standard_normal(n)
        else:
            v0 = gen.standard_normal(n)
    else:
        v0 = np.asarray(v0)
        if v0.ndim != 1 or v0.shape[0] != n:
            raise ValueError(f"v0 must have shape ({n},) to match op, got {v0.shape}")
    alpha, beta, m = lanczos_tridiagonal(op, v0, int(steps))
    del v0
    if m == 1:
        theta, s_last = alpha.copy(), np.ones(1)
    else:
        theta, s = eigh_tridiagonal(alpha, beta[:-1])
        s_last = s[-1, :]  # last components of the Ritz vectors
    ritz_min, ritz_max = float(theta[0]), float(theta[-1])
    r_min = float(beta[-1] * abs(s_last[0]))
    r_max = float(beta[-1] * abs(s_last[-1]))
    width = ritz_max - ritz_min
    # floor: a degenerate spectrum (H proportional to the identity) still gets a nonzero width
    floor = 1e-8 * max(1.0, abs(ritz_min), abs(ritz_max))
    pad = max(margin * width, floor)
    return SpectralBounds(
        e_min=ritz_min - pad - r_min,
        e_max=ritz_max + pad + r_max,
        ritz_min=ritz_min,
        ritz_max=ritz_max,
        residual_min=r_min,
        residual_max=r_max,
        steps=m,
    )
