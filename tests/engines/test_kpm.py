"""Tests of largeq.engines.kpm (kernel polynomial method).

Reference for the method: A. Weisse, G. Wellein, A. Alvermann, H. Fehske, Rev. Mod. Phys. 78,
275 (2006).  Outside references: dense numpy.linalg.eigh / eigvalsh of the same matrices, and the
analytic Neel-state moments of the J1-J2 ring (DESIGN.md section 5, derived there).
"""

import numpy as np
import pytest

from largeq.engines.kpm import (
    SpectralDensity,
    apply_chebyshev_series,
    chebyshev_moments,
    chebyshev_scale,
    counting_function,
    density_of_states,
    dos_on_grid,
    jackson_kernel,
    kernel_resolution,
    local_density,
    lorentz_kernel,
    reconstruct_cumulative,
    reconstruct_density,
)

from .._kpm_models import j1j2_xxz_ring, neel_state, real_csr


@pytest.fixture(scope="module")
def ring10():
    """J1-J2 Heisenberg ring, L = 10, J2 = 0.3 (full space, D = 1024) with its exact spectrum."""
    H = real_csr(j1j2_xxz_ring(10, 1.0, 1.0, 0.3, 1.0))
    e, V = np.linalg.eigh(H.toarray())
    return H, e, V


def exact_moments(e, w, n_moments, bounds):
    """mu_n = sum_m w_m T_n(x_m) from the exact spectrum (x_m rescaled eigenvalues)."""
    a, b = chebyshev_scale(bounds)
    theta = np.arccos((e - b) / a)
    return np.array([np.sum(w * np.cos(n * theta)) for n in range(n_moments)])


@pytest.mark.parametrize("n_moments", [40, 41])
def test_moments_match_dense(ring10, n_moments):
    H, e, V = ring10
    bounds = (e[0], e[-1])
    rng = np.random.default_rng(11)
    v = rng.normal(size=e.size) + 1j * rng.normal(size=e.size)
    v0 = v.copy()
    mu = chebyshev_moments(H, v, n_moments, bounds)
    ref = exact_moments(e, np.abs(V.T @ v) ** 2, n_moments, bounds)
    assert mu.shape == (n_moments,)
    np.testing.assert_allclose(mu, ref, rtol=0, atol=1e-11 * ref[0])
    np.testing.assert_array_equal(v, v0)  # input untouched


def test_moments_real_vector_dense_matrix():
    rng = np.random.default_rng(2)
    A = rng.normal(size=(30, 30))
    A = A + A.T
    e, V = np.linalg.eigh(A)
    v = rng.normal(size=30)
    bounds = (e[0] - 0.3, e[-1] + 0.1)
    mu = chebyshev_moments(A, v, 25, bounds, eps=0.05)
    a, b = chebyshev_scale(bounds, 0.05)
    ref = np.array([np.sum((V.T @ v) ** 2 * np.cos(n * np.arccos((e - b) / a))) for n in range(25)])
    np.testing.assert_allclose(mu, ref, atol=1e-11 * ref[0])


def test_scale_and_validation():
    a, b = chebyshev_scale((-3.0, 5.0), eps=0.01)
    assert a == pytest.approx(8.0 / 1.99) and b == pytest.approx(1.0)

    class B:
        e_min, e_max = -3.0, 5.0

    assert chebyshev_scale(B()) == (a, b)
    with pytest.raises(ValueError, match="e_max > e_min"):
        chebyshev_scale((1.0, 1.0))
    with pytest.raises(ValueError, match="eps"):
        chebyshev_scale((0.0, 1.0), eps=1.5)
    with pytest.raises(ValueError, match="n_moments"):
        chebyshev_moments(np.eye(3), np.ones(3), 1, (-2, 2))
    with pytest.raises(ValueError, match="length"):
        chebyshev_moments(np.eye(3), np.ones(4), 10, (-2, 2))
    with pytest.raises(ValueError, match="kernel"):
        local_density(np.eye(3), np.ones(3), 10, (-2, 2), kernel="gauss")


def test_kernels_and_resolution():
    N = 256
    g = jackson_kernel(N)
    assert g[0] == pytest.approx(1.0)
    assert np.all(np.diff(g) < 0) and g[-1] > 0
    # Weisse et al. (2006), Sec. II.C.3: Jackson broadening ~ pi/N at the band centre,
    # shrinking like sqrt(1 - x^2) towards the edges.
    s = kernel_resolution(g, np.array([0.0, 0.6]))
    assert s[0] == pytest.approx(np.pi / N, rel=0.02)
    assert s[1] / s[0] == pytest.approx(0.8, rel=0.03)
    lam = 4.0
    gl = lorentz_kernel(N, lam)
    assert gl[0] == pytest.approx(1.0)
    assert gl[-1] == pytest.approx(np.sinh(lam / N) / np.sinh(lam))
    # resolution formula is exact: compare with the numerically broadened delta at x0 = 0.3
    x0 = 0.3
    mu = np.cos(np.arange(N) * np.arccos(x0))
    x, rho = reconstruct_density(mu * g, 8 * N)
    mean = np.trapezoid(rho * x, x)
    var = np.trapezoid(rho * x * x, x) - mean**2
    assert np.sqrt(var) == pytest.approx(kernel_resolution(g, x0), rel=1e-3)


def test_reconstruction_matches_direct_sums():
    rng = np.random.default_rng(5)
    N, M = 37, 101
    c = rng.normal(size=N)
    x, rho = reconstruct_density(c, M)
    xs, cum = reconstruct_cumulative(c, M)
    assert np.all(np.diff(x) > 0) and np.array_equal(x, xs)
    n = np.arange(N)
    T = np.cos(np.outer(np.arccos(x), n))
    direct = (c[0] + 2 * T[:, 1:] @ c[1:]) / (np.pi * np.sqrt(1 - x**2))
    np.testing.assert_allclose(rho, direct, atol=1e-12 * np.abs(direct).max())
    # cumulative = integral of the series from -1: check by fine quadrature in theta
    th = np.linspace(np.pi, 0, 200001)
    integrand = c[0] + 2 * np.cos(np.outer(th, n[1:])) @ c[1:]  # rho dx = -(...)/pi dtheta
    from scipy.integrate import cumulative_trapezoid

    F = cumulative_trapezoid(-integrand / np.pi, th, initial=0.0)
    np.testing.assert_allclose(cum, np.interp(x, np.cos(th), F), atol=1e-7)


def test_ldos_neel_matches_analytic_moments():
    # DESIGN.md section 5 (derived there): Neel state in the J1-J2 XXZ ring,
    # <H> = L(-J1 D1 + J2 D2)/4 and <H^2> - <H>^2 = L J1^2 / 4.
    L, J1, D1, J2, D2 = 10, 1.0, 0.7, 0.3, 1.3
    H = j1j2_xxz_ring(L, J1, D1, J2, D2)
    # norm bound: each bond term J(SxSx + SySy + D SzSz) has norm <= J(2 + |D|)/4
    bound = L * (J1 * (2 + D1) + J2 * (2 + D2)) / 4
    psi = 3.0 * neel_state(L)  # non-normalised input on purpose
    res = local_density(H, psi, 80, (-bound, bound))
    mean = L * (-J1 * D1 + J2 * D2) / 4
    var = L * J1**2 / 4
    assert isinstance(res, SpectralDensity)
    assert res.norm == pytest.approx(3.0)
    assert res.mean_exact == pytest.approx(mean, abs=1e-12)
    assert res.variance_exact == pytest.approx(var, abs=1e-12)
    assert res.mean_moments == pytest.approx(mean, abs=1e-10)
    assert res.variance_moments == pytest.approx(var, abs=1e-10)
    assert res.total == pytest.approx(1.0)
    # the KPM density itself carries the same first two moments up to kernel damping:
    # int E rho = a g_1 mu_1 + b  (Weisse et al. 2006, kernel damps moment n by g_n)
    E, rho = res.energies, res.density
    a, b = res.scale, res.shift
    m1 = np.trapezoid(E * rho, E)
    assert m1 == pytest.approx(a * res.kernel_factors[1] * res.moments[1] + b, abs=2e-3)


def test_ldos_random_state_matches_dense(ring10):
    H, e, V = ring10
    rng = np.random.default_rng(3)
    psi = rng.normal(size=e.size) + 1j * rng.normal(size=e.size)
    p = np.abs(V.T @ psi) ** 2
    p /= p.sum()
    res = local_density(H, psi, 64, (e[0] - 0.1, e[-1] + 0.1))
    m1, m2 = np.sum(p * e), np.sum(p * e**2)  # exact <H>, <H^2> from dense eigh
    for got in (res.mean_exact, res.mean_moments):
        assert got == pytest.approx(m1, abs=1e-10)
    for got in (res.variance_exact, res.variance_moments):
        assert got == pytest.approx(m2 - m1**2, abs=1e-10)


def _bracket_violation(e, energies, resolution, cumulative, k):
    lo = np.searchsorted(e, energies - k * resolution, side="right")
    hi = np.searchsorted(e, energies + k * resolution, side="right")
    return np.maximum(lo - cumulative, 0.0), np.maximum(cumulative - hi, 0.0)


@pytest.mark.parametrize("n_moments", [64, 200])
def test_dos_counting_bracketed_by_exact(ring10, n_moments):
    """Integrated KPM DOS lies between the exact counting function shifted by -/+ 3 resolutions.

    Criterion: the Jackson-smoothed counting function is the exact one convolved with a positive,
    near-Gaussian kernel of local width sigma(E) (``resolution``).  Weight beyond 3 sigma is about
    0.135% per side (Gaussian value), so at most 0.0014 D states can leak past the bracket; the
    stochastic estimate may further deviate by its own error bar (4 standard errors allowed).
    Reference: dense numpy.linalg.eigh.
    """
    H, e, _ = ring10
    D = e.size
    bounds = (e[0] - 0.05, e[-1] + 0.05)
    slack = 0.0014 * D
    # (i) exact moments (no sampling): only the kernel enters
    g = jackson_kernel(n_moments)
    mu = exact_moments(e, np.ones(D), n_moments, bounds)
    a, b = chebyshev_scale(bounds)
    x, cum = reconstruct_cumulative(mu * g, 2 * n_moments)
    below, above = _bracket_violation(e, a * x + b, a * kernel_resolution(g, x), cum, 3)
    assert below.max() <= slack and above.max() <= slack
    # one resolution is NOT enough: the criterion can fail (guards against a vacuous bracket)
    below1, above1 = _bracket_violation(e, a * x + b, a * kernel_resolution(g, x), cum, 1)
    assert max(below1.max(), above1.max()) > slack
    # (ii) the stochastic DOS
    res = density_of_states(H, n_moments, bounds, 12, np.random.default_rng(21), dtype=float)
    assert res.total == pytest.approx(D)
    assert res.resolution_center == pytest.approx(np.pi * a / n_moments)
    below, above = _bracket_violation(e, res.energies, res.resolution, res.cumulative, 3)
    tol = slack + 4 * res.cumulative_err
    assert np.all(below <= tol) and np.all(above <= tol)
    assert res.cumulative[-1] == pytest.approx(D, abs=1.0 + 4 * res.cumulative_err[-1])


def test_dos_error_bars_are_honest(ring10):
    """Deviation of the stochastic DOS from the exact-moment KPM DOS, in units of its error bar.

    With R = 20 vectors the z-scores follow roughly a Student t with 19 dof (E z^2 = 19/17);
    nodes of one run are strongly correlated, so we pool 8 independent seeds.
    """
    H, e, _ = ring10  # reference spectrum from dense numpy.linalg.eigh
    bounds = (e[0] - 0.05, e[-1] + 0.05)
    N = 64
    a, _ = chebyshev_scale(bounds)
    _, rho_exact = reconstruct_density(exact_moments(e, np.ones(e.size), N, bounds) * jackson_kernel(N), 2 * N)
    z2 = []
    for seed in range(8):
        res = density_of_states(H, N, bounds, 20, np.random.default_rng(seed))
        z2.append(np.mean(((res.density - rho_exact / a) / res.density_err) ** 2))
    assert 0.6 < np.mean(z2) < 1.8
    # error bars do shrink with R: 4x the vectors -> about half the error (1/sqrt(R))
    r20 = density_of_states(H, N, bounds, 20, np.random.default_rng(99))
    r80 = density_of_states(H, N, bounds, 80, np.random.default_rng(99))
    ratio = np.median(r20.density_err / r80.density_err)
    assert 1.5 < ratio < 2.7


def test_dos_resume_gives_same_numbers(ring10):
    H, e, _ = ring10
    bounds = (e[0] - 0.05, e[-1] + 0.05)
    seen = []
    full = density_of_states(H, 32, bounds, 6, np.random.default_rng(7), on_vector=lambda i, m: seen.append(i))
    assert seen == list(range(6))
    part = full.vector_moments[:4]
    seen.clear()
    resumed = density_of_states(
        H, 32, bounds, 6, np.random.default_rng(7), done_moments=part, on_vector=lambda i, m: seen.append(i)
    )
    assert seen == [4, 5]
    np.testing.assert_array_equal(resumed.vector_moments, full.vector_moments)
    np.testing.assert_array_equal(resumed.density, full.density)
    with pytest.raises(ValueError, match="done_moments"):
        density_of_states(H, 32, bounds, 6, np.random.default_rng(7), done_moments=np.zeros((2, 31)))


def test_grid_helpers(ring10):
    H, e, _ = ring10
    res = density_of_states(H, 48, (e[0] - 0.05, e[-1] + 0.05), 3, np.random.default_rng(1), vector_kind="phase")
    np.testing.assert_allclose(dos_on_grid(res, res.energies), res.density)
    assert dos_on_grid(res, [e[0] - 10.0])[0] == 0.0
    np.testing.assert_allclose(counting_function(res, res.energies), res.cumulative, atol=1e-9 * e.size)


def test_apply_chebyshev_series_matches_dense(ring10):
    H, e, V = ring10
    bounds = (e[0], e[-1])
    a, b = chebyshev_scale(bounds)
    c = np.random.default_rng(4).normal(size=9)
    v = np.random.default_rng(5).normal(size=e.size)
    w = apply_chebyshev_series(H, v, c, bounds)
    x = (e - b) / a
    f = np.polynomial.chebyshev.chebval(x, c)
    np.testing.assert_allclose(w, V @ (f * (V.T @ v)), atol=1e-11 * np.abs(f).max() * np.linalg.norm(v))


def test_linear_operator_fallback(ring10):
    """A plain scipy LinearOperator (no fused kernel) gives the same moments as the CSR matrix."""
    from scipy.sparse.linalg import aslinearoperator

    H, e, _ = ring10
    v = np.random.default_rng(8).normal(size=e.size)
    bounds = (e[0] - 0.1, e[-1] + 0.1)
    np.testing.assert_allclose(
        chebyshev_moments(aslinearoperator(H), v, 30, bounds), chebyshev_moments(H, v, 30, bounds), atol=1e-10
    )
