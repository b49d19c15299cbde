"""Tests of largeq.engines.typical (random states, thermal pure quantum states, filters).

Outside references: the free-fermion (Jordan-Wigner) solution of the XX ring, the analytic
infinite-temperature moment Tr H^2 / D of the J1-J2 ring (DESIGN.md section 5), the
stochastic-trace variance Tr(X^2)/(R D^2) (DESIGN.md section 5), and dense numpy.linalg.eigh.
"""

import numpy as np
import pytest
from scipy.sparse.linalg import eigsh

from largeq.engines.kpm import chebyshev_scale
from largeq.engines.typical import (
    CanonicalResult,
    MicrocanonicalResult,
    bessel_coefficients,
    boltzmann_apply,
    canonical_averages,
    gaussian_window_coefficients,
    microcanonical_average,
    random_state,
    solve_beta,
    trace_estimate,
)

from .._kpm_models import j1j2_xxz_ring, mixed_field_ising, pauli, real_csr, xx_free_fermion_energy, xx_ring


def test_random_state_kinds():
    rng = np.random.default_rng(0)
    v = random_state(5000, rng)
    assert v.dtype == np.complex128 and np.linalg.norm(v) == pytest.approx(1.0)
    u = random_state(20000, np.random.default_rng(1), normalize=False)
    assert np.mean(np.abs(u) ** 2) == pytest.approx(1.0, abs=0.05)  # E|r_i|^2 = 1
    assert np.mean(u.real**2) == pytest.approx(0.5, abs=0.03)
    r = random_state(20000, np.random.default_rng(1), dtype=float, normalize=False)
    assert r.dtype == np.float64 and np.mean(r**2) == pytest.approx(1.0, abs=0.05)
    p = random_state(1000, np.random.default_rng(2), kind="phase", normalize=False)
    np.testing.assert_allclose(np.abs(p), 1.0)
    s = random_state(1000, np.random.default_rng(2), kind="phase", dtype=float, normalize=False)
    assert set(np.unique(s)) == {-1.0, 1.0}
    np.testing.assert_array_equal(random_state(64, np.random.default_rng(9)), random_state(64, np.random.default_rng(9)))
    with pytest.raises(ValueError, match="kind"):
        random_state(4, rng, kind="uniform")
    with pytest.raises(ValueError, match="rng"):
        random_state(4, 3)


def test_free_fermion_formula_matches_dense():
    """Check the reference itself first: Jordan-Wigner parity projection vs dense eigvalsh, L = 8."""
    L = 8
    e = np.linalg.eigvalsh(xx_ring(L).toarray())
    for beta in (-1.5, 0.2, 1.0, 3.0):
        w = np.exp(-beta * (e - (e.min() if beta > 0 else e.max())))
        assert xx_free_fermion_energy(L, 1.0, beta) == pytest.approx(np.sum(w * e) / np.sum(w), abs=1e-12)
    # without the parity projection (one set of momenta, grand-canonical fermions) the energy
    # is visibly off at beta = 3 (guards against a vacuous check)
    w = np.exp(-3.0 * (e - e.min()))
    exact = np.sum(w * e) / np.sum(w)
    n = np.arange(L)
    for shift in (0.0, 0.5):
        eps = np.cos(2 * np.pi * (n + shift) / L)
        assert abs(np.sum(eps / (1 + np.exp(3.0 * eps))) - exact) > 0.02


def test_boltzmann_apply_matches_dense():
    H = real_csr(j1j2_xxz_ring(8, 1.0, 0.7, 0.3, 1.3))
    e, V = np.linalg.eigh(H.toarray())
    v = random_state(e.size, np.random.default_rng(3))
    for tau in (0.05, 1.0, 7.0, 40.0, -2.5):
        w, log_norm = boltzmann_apply(H, v, tau, (e[0] - 0.01, e[-1] + 0.01), tol=1e-12)
        exact = V @ (np.exp(-tau * (e - e[0])) * (V.T @ v))
        got = np.exp(log_norm + tau * e[0]) * w
        assert np.linalg.norm(got - exact) <= 1e-9 * np.linalg.norm(exact)
    c = bessel_coefficients(12.0, 1e-10)
    x = np.linspace(-1, 1, 7)
    np.testing.assert_allclose(np.polynomial.chebyshev.chebval(x, c), np.exp(12.0 * x - 12.0), atol=1e-10)


@pytest.fixture(scope="module")
def xx12():
    H = real_csr(xx_ring(12))
    # extreme eigenvalues by Lanczos (scipy eigsh), padded
    lo = eigsh(H, k=1, which="SA", return_eigenvectors=False)[0]
    hi = eigsh(H, k=1, which="LA", return_eigenvectors=False)[0]
    return H, (lo - 0.05, hi + 0.05)


@pytest.fixture(scope="module")
def xx12_canonical(xx12):
    H, bounds = xx12
    betas = [-2.0, -0.5, 0.0, 0.25, 0.5, 1.0, 2.0, 4.0]
    return canonical_averages(H, {"sz0": pauli(12, 0, "z").real}, betas, 12, np.random.default_rng(2024), bounds, dtype=float)


def test_canonical_xx_ring_vs_free_fermions(xx12_canonical):
    """Canonical energy of the XX ring, L = 12, all sectors: TPQ vs exact Jordan-Wigner value.

    Reference: free fermions with parity-dependent boundary conditions (E. Lieb, T. Schultz,
    D. Mattis, Ann. Phys. 16, 407 (1961)); formula checked against dense ED above.
    """
    res = xx12_canonical
    assert isinstance(res, CanonicalResult)
    assert np.all(np.diff(res.betas) > 0)
    exact = np.array([xx_free_fermion_energy(12, 1.0, b) for b in res.betas])
    assert np.all(res.energy_err > 0)
    assert np.all(np.abs(res.energy - exact) < 4 * res.energy_err)
    # errors small enough for the check to mean something (typicality: ~ sqrt(Var/(R Z_eff)))
    assert np.all(res.energy_err < 0.06)
    # -d<H>/dbeta = variance: exact by finite differences of the free-fermion energy
    for k, b in enumerate(res.betas):
        h = 1e-5
        slope = -(xx_free_fermion_energy(12, 1.0, b + h) - xx_free_fermion_energy(12, 1.0, b - h)) / (2 * h)
        assert abs(res.energy_variance[k] - slope) < 4 * res.energy_variance_err[k] + 1e-6
    # symmetry: <sigma^z_0>_beta = 0 in every sector sum (H commutes with the global spin flip)
    assert np.all(np.abs(res.values["sz0"]) < 4 * res.errors["sz0"] + 1e-12)
    # ln Z/D at beta = 0 is exactly 0 for unit vectors
    assert res.log_z[res.betas == 0.0][0] == pytest.approx(0.0, abs=1e-12)


def test_solve_beta(xx12_canonical):
    res = xx12_canonical
    for beta_true in (0.7, 3.0, -1.0):
        target = xx_free_fermion_energy(12, 1.0, beta_true)
        beta, beta_err = solve_beta(res, target)
        assert np.sign(beta) == np.sign(beta_true)
        assert beta_err > 0
        assert abs(beta - beta_true) < 4 * beta_err + 0.02 * abs(beta_true)
    # on a grid point the interpolant returns the grid beta exactly
    assert solve_beta(res, res.energy[3])[0] == pytest.approx(res.betas[3])
    with pytest.raises(ValueError, match="outside"):
        solve_beta(res, res.energy.min() - 1.0)


def test_high_temperature_expansion():
    """<H>_beta = -beta Tr(H^2)/D + beta^2 m3/2 - kappa4 beta^3/6 ..., J1-J2 ring L = 12.

    Reference: Tr H / D = 0, Tr H^2 / D = L[J1^2(2 + D1^2) + J2^2(2 + D2^2)]/16 (DESIGN.md section 5).
    The antisymmetric combination [E(b) - E(-b)]/(2b) = -m2 - kappa4 b^2/6 removes the b^2 term;
    |kappa4| <= max(m4, 3 m2^2) <= ||H||^2 m2 + 3 m2^2 bounds the rest.  Its sampling error is that
    of the beta = 0 energy variance estimate (the same vectors; first order in b), allowed 4 sigma.
    """
    L, J1, D1, J2, D2 = 12, 1.0, 0.7, 0.3, 1.3
    H = real_csr(j1j2_xxz_ring(L, J1, D1, J2, D2))
    m2 = L * (J1**2 * (2 + D1**2) + J2**2 * (2 + D2**2)) / 16
    bound = 0.25 * L * (J1 + J2) * 1.5  # crude ||H|| bound: each bond term has norm <= J(2 + |D|)/4
    b = 0.02
    res = canonical_averages(H, None, [-b, 0.0, b], 10, np.random.default_rng(8), (-bound, bound), dtype=float)
    var0, var0_err = res.energy_variance[1], res.energy_variance_err[1]
    assert abs(res.energy[1]) < 4 * res.energy_err[1]
    assert abs(var0 - m2) < 4 * var0_err
    slope = (res.energy[2] - res.energy[0]) / (2 * b)
    remainder = (bound**2 * m2 + 3 * m2**2) * b**2 / 6
    assert abs(slope + m2) < 4 * var0_err + remainder
    assert var0_err < 0.02 * m2


def test_trace_error_scales_as_one_over_sqrt_rd():
    """Stochastic trace of X = H (J1-J2 ring): Var of <r|X|r>/D is Tr(X^2)/D^2 per vector.

    Reference: DESIGN.md section 5 (complex Gaussian vectors: Var = Tr(X^2)/(R D^2)); here
    Tr(X^2)/D = m2 analytic, so the standard error of Tr X / D is sqrt(m2 / (R D)).
    The sample variance of R i.i.d. values has relative spread ~ sqrt(2/R) (plus a small
    fourth-cumulant term 6 Tr X^4/(R (Tr X^2)^2)); we allow 5 of those.
    """
    J1, D1, J2, D2 = 1.0, 0.7, 0.3, 1.3
    R = 600
    sizes, errs = [], []
    for L in (6, 8, 10):
        H = real_csr(j1j2_xxz_ring(L, J1, D1, J2, D2))
        D = 2**L
        m2 = L * (J1**2 * (2 + D1**2) + J2**2 * (2 + D2**2)) / 16
        est = trace_estimate(H, R, np.random.default_rng(L))
        assert est.dimension == D and est.samples.shape == (R,)
        predicted_var = m2 * D  # Tr(X^2) for one vector
        ratio = est.samples.var(ddof=1) / predicted_var
        assert abs(ratio - 1) < 5 * np.sqrt(2 / R) + 0.1
        assert abs(est.per_dim) < 4 * est.per_dim_error  # Tr H / D = 0
        sizes.append(R * D)
        errs.append(est.per_dim_error / np.sqrt(m2))  # m2 grows with L: compare sqrt(m2/(R D))
    slope = np.polyfit(np.log(sizes), np.log(errs), 1)[0]
    assert slope == pytest.approx(-0.5, abs=0.06)
    # the same at fixed D for growing R: 16x the vectors -> 1/4 the error
    H = real_csr(j1j2_xxz_ring(8, J1, D1, J2, D2))
    e_small = trace_estimate(H, 50, np.random.default_rng(1)).per_dim_error
    e_large = trace_estimate(H, 800, np.random.default_rng(2)).per_dim_error
    assert e_small / e_large == pytest.approx(4.0, rel=0.35)
    with pytest.raises(ValueError, match="dim"):
        trace_estimate(lambda r: r, 3, np.random.default_rng(0))
    callable_est = trace_estimate(lambda r: 2.0 * r, 20, np.random.default_rng(0), dim=100)
    assert callable_est.value == pytest.approx(200.0, rel=0.2)


def test_gaussian_window_coefficients():
    bounds = (-5.0, 3.0)
    a, b = chebyshev_scale(bounds)
    c, tail = gaussian_window_coefficients(-1.0, 0.2, bounds, tol=1e-10)
    x = np.linspace(-1, 1, 2001)
    f = np.exp(-((a * x + b + 1.0) ** 2) / (4 * 0.2**2))
    assert np.abs(np.polynomial.chebyshev.chebval(x, c) - f).max() < 1e-9
    assert tail < 1e-10
    c20, tail20 = gaussian_window_coefficients(-1.0, 0.2, bounds, n_moments=20)
    assert c20.size == 20 and tail20 > 1e-3  # a too-short expansion says so


@pytest.fixture(scope="module")
def ising10():
    L = 10
    H = mixed_field_ising(L)  # J = 1, g = -1.05, h = 0.5: Banuls, Cirac & Hastings, PRL 106, 050405 (2011)
    e, V = np.linalg.eigh(H.toarray())
    return L, H, e, V


@pytest.mark.parametrize("energy, width", [(-4.0, 0.4), (2.0, 0.3)])
def test_microcanonical_vs_dense(ising10, energy, width):
    """Gaussian-window microcanonical average vs the dense-ED average with the same window."""
    L, H, e, V = ising10
    obs = {"z0": pauli(L, 0, "z"), "x0": pauli(L, 0, "x")}
    res = microcanonical_average(H, obs, energy, width, 24, np.random.default_rng(31), (e[0] - 0.01, e[-1] + 0.01))
    assert isinstance(res, MicrocanonicalResult)
    w = np.exp(-((e - energy) ** 2) / (2 * width**2))
    for name, A in obs.items():
        diag = np.einsum("im,im->m", V.conj(), A @ V).real
        ref = np.sum(w * diag) / np.sum(w)
        assert res.errors[name] > 0
        assert abs(res.values[name] - ref) < 4 * res.errors[name]
        assert res.errors[name] < 0.05
    e_ref = np.sum(w * e) / np.sum(w)
    spread_ref = np.sqrt(np.sum(w * e**2) / np.sum(w) - e_ref**2)
    assert abs(res.mean_energy - e_ref) < 4 * res.mean_energy_err
    assert abs(res.energy_spread - spread_ref) < 4 * res.energy_spread_err
    assert abs(res.window_weight - w.sum() / e.size) < 4 * res.window_weight_err
    assert res.truncation < 1e-10


def test_canonical_mixed_field_ising_observable_vs_dense(ising10):
    """<sigma^x_0>_beta and <H>_beta against dense ED (complex vectors, complex Hamiltonian)."""
    L, H, e, V = ising10
    A = pauli(L, 0, "x")
    diag = np.einsum("im,im->m", V.conj(), A @ V).real
    betas = [-0.3, 0.0, 0.4, 1.2]
    res = canonical_averages(H, {"x0": A}, betas, 12, np.random.default_rng(77), (e[0] - 0.01, e[-1] + 0.01))
    for k, beta in enumerate(res.betas):
        w = np.exp(-beta * (e - (e[0] if beta > 0 else e[-1])))
        assert abs(res.energy[k] - np.sum(w * e) / w.sum()) < 4 * res.energy_err[k]
        assert abs(res.values["x0"][k] - np.sum(w * diag) / w.sum()) < 4 * res.errors["x0"][k]
        z_exact = np.log(np.mean(np.exp(-beta * e)))
        assert abs(res.log_z[k] - z_exact) < 4 * res.log_z_err[k] + 1e-12


def test_validation(xx12):
    H, bounds = xx12
    rng = np.random.default_rng(0)
    with pytest.raises(ValueError, match="betas"):
        canonical_averages(H, None, [0.0, np.inf], 2, rng, bounds)
    with pytest.raises(ValueError, match="distinct"):
        canonical_averages(H, None, [1.0, 1.0], 2, rng, bounds)
    with pytest.raises(ValueError, match="observable"):
        canonical_averages(H, {"bad": np.eye(3)}, [1.0], 2, rng, bounds)
    with pytest.raises(ValueError, match="n_vectors"):
        microcanonical_average(H, None, 0.0, 0.1, 0, rng, bounds)
    with pytest.raises(ValueError, match="width"):
        microcanonical_average(H, None, 0.0, -0.1, 2, rng, bounds)


def test_with_largeq_operators():
    """The engines on largeq's own matrix-free operators (fused kernel path) agree with CSR."""
    from largeq.basis.spaces import full_basis
    from largeq.engines.bounds import spectral_bounds
    from largeq.operators.pauli_operator import pauli_operator
    from largeq.model.pauli import pauli_string

    L = 8
    terms = [pauli_string(L, {j: "Z", (j + 1) % L: "Z"}, 1.0) for j in range(L)]
    terms += [pauli_string(L, {j: "X"}, -1.05) for j in range(L)]
    terms += [pauli_string(L, {j: "Z"}, 0.5) for j in range(L)]
    ps = terms[0]
    for t in terms[1:]:
        ps = ps + t
    H = pauli_operator(ps, full_basis(L))
    Href = mixed_field_ising(L)  # same Hamiltonian built by kron in the tests' helper
    np.testing.assert_allclose(H.to_dense(), Href.toarray(), atol=1e-12)
    bounds = spectral_bounds(H, rng=np.random.default_rng(0))
    Y = pauli_operator(pauli_string(L, {0: "Y"}, 1.0), full_basis(L))  # complex observable, real vectors
    X = pauli_operator(pauli_string(L, {0: "X"}, 1.0), full_basis(L))
    kw = dict(betas=[0.0, 0.5], n_vectors=3, bounds=bounds, dtype=float)
    r1 = canonical_averages(H, {"x0": X, "y0": Y}, rng=np.random.default_rng(1), **kw)
    r2 = canonical_averages(Href.real.tocsr(), {"x0": pauli(L, 0, "x").real, "y0": pauli(L, 0, "y")},
                            rng=np.random.default_rng(1), **kw)
    np.testing.assert_allclose(r1.energy, r2.energy, atol=1e-10)
    np.testing.assert_allclose(r1.values["x0"], r2.values["x0"], atol=1e-10)
    np.testing.assert_allclose(r1.values["y0"], 0.0, atol=1e-12)  # <r|sigma^y|r> = 0 for real r
    m1 = microcanonical_average(H, {"x0": X}, -2.0, 0.5, 2, np.random.default_rng(3), bounds)
    m2 = microcanonical_average(Href, {"x0": pauli(L, 0, "x")}, -2.0, 0.5, 2, np.random.default_rng(3), bounds)
    assert m1.values["x0"] == pytest.approx(m2.values["x0"], abs=1e-10)
