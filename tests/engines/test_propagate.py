"""Tests of largeq.engines.propagate against outside references.

References: free-fermion solution of the XX ring (Jordan-Wigner), dense eigendecomposition and
scipy.linalg.expm, Bessel-function identities (scipy.special.jv).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg as sla
import scipy.sparse.linalg as spla
from scipy.special import j0, jv

from largeq.engines.bounds import SpectralBounds, spectral_bounds
from largeq.engines.propagate import (
    EvolutionStats,
    chebyshev_coefficients,
    chebyshev_order,
    evolve,
    evolve_scipy_krylov,
    krylov_apriori_bound,
)
from tests.reference_models import (
    mixed_field_ising,
    neel_vector,
    random_state,
    sigma_z_diagonals,
    xx_ring,
    xxz_j1j2_ring,
)


def _run(op, psi0, times, **kw):
    """evolve() recording a copy of every output state."""
    states = {}
    stats = evolve(op, psi0, times, on_output=lambda i, t, p: states.__setitem__(i, p.copy()), **kw)
    return stats, states


# ----------------------------------------------------------------------------------------
# XX ring from the Néel state: free fermions on a finite ring
# ----------------------------------------------------------------------------------------

def free_fermion_sz(L, J, times, *, s=None, hopping_scale=1.0):
    """<sigma^z_j(t)> for the XX ring quenched from the Néel state (up on even sites).

    Jordan-Wigner: H = J sum (S^x S^x + S^y S^y) = (J/2) sum (c^dag_j c_{j+1} + h.c.) + boundary
    term, so eps(k) = J cos k, with k = 2 pi (n + s)/L, s = 0 for N odd and s = 1/2 for N even
    fermions (Flesch et al., PRA 78, 033608 (2008); boundary sign from Jordan-Wigner).
    n_j(t) = sum_l |G_jl(t)|^2 n_l(0), G_jl = (1/L) sum_k e^{ik(j-l)} e^{-i eps(k) t};
    sigma^z_j = 2 n_j - 1.  ``hopping_scale`` multiplies eps (2 = the wrong, hopping-J convention).
    """
    n_f = (L + 1) // 2
    if s is None:
        s = 0.0 if n_f % 2 == 1 else 0.5
    k = 2 * np.pi * (np.arange(L) + s) / L
    d = np.arange(L)[:, None] - np.arange(L)[None, :]
    occ = np.array([1.0 if l % 2 == 0 else 0.0 for l in range(L)])
    out = []
    for t in times:
        phase = np.exp(-1j * hopping_scale * J * np.cos(k) * t)
        g = (np.exp(1j * k[None, None, :] * d[:, :, None]) * phase).sum(axis=2) / L
        out.append(2 * (np.abs(g) ** 2 @ occ) - 1)
    return np.array(out)


def _sz_curves(op, L, times, **kw):
    diag = sigma_z_diagonals(L)
    curves = {}

    def record(i, t, psi):
        curves[i] = diag @ (np.abs(psi) ** 2)

    stats = evolve(op, neel_vector(L), times, on_output=record, **kw)
    return stats, np.array([curves[i] for i in range(len(times))])


def test_xx_single_magnon_dispersion_is_J_cos_k():
    # Convention check (derived): in the one-up-spin sector, H = J sum(SxSx + SySy) hops with
    # amplitude J/2, so the eigenvalues are J cos(2 pi n / L), not 2J cos(...).
    L, J = 8, 1.3
    h = xx_ring(L, J).toarray()
    one = [1 << j for j in range(L)]
    ev = np.linalg.eigvalsh(h[np.ix_(one, one)])
    expect = np.sort(J * np.cos(2 * np.pi * np.arange(L) / L))
    np.testing.assert_allclose(ev, expect, atol=1e-12)


@pytest.mark.parametrize("L", [12, 14])
@pytest.mark.parametrize("method", ["chebyshev", "lanczos"])
def test_xx_neel_quench_matches_free_fermions(L, method):
    # Exact finite-ring free-fermion result: Flesch et al., PRA 78, 033608 (2008) (Jordan-Wigner)
    J = 1.0
    times = np.linspace(0.0, 6.0, 13)
    stats, sz = _sz_curves(xx_ring(L, J), L, times, method=method, tol=1e-12)
    ref = free_fermion_sz(L, J, times)
    np.testing.assert_allclose(sz, ref, atol=1e-8, rtol=0)
    assert stats.max_error_estimate <= 1e-12


def test_xx_neel_wrong_conventions_do_not_match():
    # The checks above can fail: the wrong boundary sign s or the hopping-J dispersion 2J cos k
    # are far off (DESIGN.md quotes ~0.6 for the wrong s).
    L, J = 12, 1.0
    times = np.linspace(0.0, 6.0, 13)
    _, sz = _sz_curves(xx_ring(L, J), L, times, tol=1e-10)
    assert np.abs(sz - free_fermion_sz(L, J, times, s=0.0)).max() > 0.1
    assert np.abs(sz - free_fermion_sz(L, J, times, hopping_scale=2.0)).max() > 0.1


def test_xx_neel_short_times_match_infinite_chain_bessel():
    # Infinite chain: <sigma^z_j(t)> = (-1)^j J_0(2 J t) (Flesch et al., PRA 78, 033608 (2008)).
    # On a ring of L = 14 the images enter through J_n(Jt) with n >= L/2 = 7: at J t <= 1.5 these
    # are < 3e-5, hence the 1e-4 tolerance (finite-size, not numerical, error).
    L, J = 14, 1.0
    times = np.linspace(0.0, 1.5, 7)
    _, sz = _sz_curves(xx_ring(L, J), L, times)
    sign = (-1.0) ** np.arange(L)
    np.testing.assert_allclose(sz, np.outer(j0(2 * J * times), sign), atol=1e-4)


# ----------------------------------------------------------------------------------------
# Dense references
# ----------------------------------------------------------------------------------------

MODELS = {
    # J2 = 0.3 J1, Delta1 != Delta2 (away from the Majumdar-Ghosh point)
    "xxz_j1j2_L8": lambda: xxz_j1j2_ring(8, 1.0, 0.3, 0.8, 1.3),
    # Bañuls, Cirac & Hastings, PRL 106, 050405 (2011): J = 1, g = -1.05, h = 0.5 (Pauli units)
    "mixed_ising_L9": lambda: mixed_field_ising(9, 1.0, -1.05, 0.5, periodic=True),
    # Kim & Huse, PRL 111, 127205 (2013): J = 1, g = 0.9045 (transverse), h = 0.809 (longitudinal)
    "mixed_ising_open_L8": lambda: mixed_field_ising(8, 1.0, 0.9045, 0.809, periodic=False),
}


@pytest.fixture(scope="module")
def dense_cache():
    cache = {}

    def get(name):
        if name not in cache:
            h = MODELS[name]()
            ev, v = np.linalg.eigh(h.toarray())
            cache[name] = (h, ev, v)
        return cache[name]
    return get


NONUNIFORM = np.array([0.0, 0.05, 0.4, 1.0, 1.01, 2.7, 4.0, 7.5])


@pytest.mark.parametrize("name", sorted(MODELS))
@pytest.mark.parametrize("method", ["chebyshev", "lanczos"])
def test_matches_dense_eigendecomposition(dense_cache, name, method):
    h, ev, v = dense_cache(name)
    psi0 = random_state(h.shape[0], 7)
    stats, states = _run(h, psi0, NONUNIFORM, method=method, tol=1e-12)
    c0 = v.conj().T @ psi0
    for i, t in enumerate(NONUNIFORM):
        ref = v @ (np.exp(-1j * ev * t) * c0)
        assert np.linalg.norm(states[i] - ref) <= 1e-10, (i, t)
    assert stats.method == method and stats.steps == len(NONUNIFORM) - 1


def test_matches_scipy_expm_complex_start_state():
    # independent of eigh: scipy.linalg.expm (Pade) at one time, starting from a product
    # state with complex amplitudes (all spins along +y)
    h = xxz_j1j2_ring(8, 1.0, 0.3, 0.8, 1.3).toarray()
    plus_y = np.array([1j, 1.0]) / np.sqrt(2)  # (down, up) amplitudes of |+y>
    psi0 = plus_y
    for _ in range(7):
        psi0 = np.kron(plus_y, psi0)
    t = 2.3
    ref = sla.expm(-1j * t * h) @ psi0
    for method in ("chebyshev", "lanczos"):
        _, states = _run(h, psi0, [0.0, t], method=method, tol=1e-13)
        assert np.linalg.norm(states[1] - ref) <= 1e-10, method


def test_complex_hermitian_operator():
    rng = np.random.default_rng(3)
    a = rng.standard_normal((200, 200)) + 1j * rng.standard_normal((200, 200))
    h = (a + a.conj().T) / 4
    psi0 = random_state(200, 4)
    ev, v = np.linalg.eigh(h)
    times = [0.0, 0.7, 1.9]
    for method in ("chebyshev", "lanczos"):
        _, states = _run(h, psi0, times, method=method, tol=1e-12)
        ref = v @ (np.exp(-1j * ev * 1.9) * (v.conj().T @ psi0))
        assert np.linalg.norm(states[2] - ref) <= 1e-10, method


@pytest.mark.parametrize("method", ["chebyshev", "lanczos"])
def test_norm_and_energy_conserved(dense_cache, method):
    h, ev, _ = dense_cache("mixed_ising_L9")
    psi0 = random_state(h.shape[0], 8)
    e0 = np.vdot(psi0, h @ psi0).real
    times = np.linspace(0, 20, 41)
    stats, states = _run(h, psi0, times, method=method, tol=1e-10)
    err = stats.total_error_estimate
    assert 0 < err < 41 * 1e-10
    hnorm = np.abs(ev).max()
    for i in range(len(times)):
        psi = states[i]
        assert abs(np.linalg.norm(psi) - 1) <= err + 1e-12
        # |<p|H|p> - <q|H|q>| <= 2 |H| |p - q| + |H| |p - q|^2
        assert abs(np.vdot(psi, h @ psi).real - e0) <= 3 * hnorm * err + 1e-11


# ----------------------------------------------------------------------------------------
# Chebyshev internals
# ----------------------------------------------------------------------------------------

@pytest.mark.parametrize("x", [1e-3, 0.5, 3.0, 25.0, 160.0])
@pytest.mark.parametrize("tol", [1e-6, 1e-10, 1e-14])
def test_chebyshev_order_is_minimal_and_bound_holds(x, tol):
    order, bound = chebyshev_order(x, tol)
    n = np.arange(int(x) + 400)
    absj = np.abs(jv(n, x))  # Bessel tail computed independently, far beyond the order
    tail = 2 * absj[order:].sum()
    assert tail <= bound * (1 + 1e-12) and bound <= tol
    if order > 1:
        assert 2 * absj[order - 1:].sum() > tol  # one term fewer would not do
    assert order >= x  # J_n(x) is not small before n ~ x


def test_chebyshev_order_scales_like_x_plus_log():
    orders = [chebyshev_order(x, 1e-10)[0] for x in (10.0, 100.0, 1000.0)]
    for x, o in zip((10.0, 100.0, 1000.0), orders):
        assert x < o < x + 10 * x ** (1 / 3) + 40


def test_chebyshev_single_step_error_within_bound(dense_cache):
    h, ev, v = dense_cache("xxz_j1j2_L8")
    sb = spectral_bounds(h)
    psi0 = random_state(h.shape[0], 1)
    ref = v @ (np.exp(-1j * ev * 3.0) * (v.conj().T @ psi0))
    for tol in (1e-4, 1e-7):
        c, bound = chebyshev_coefficients(3.0, sb, tol)
        _, states = _run(h, psi0, [0.0, 3.0], bounds=sb, tol=tol)
        err = np.linalg.norm(states[1] - ref)
        assert err <= bound and bound <= tol
        assert err > 1e-3 * tol  # the truncation really is at the tolerance, not far below


def test_block_equals_block_one_and_saves_matvecs(dense_cache):
    h, _, _ = dense_cache("xxz_j1j2_L8")
    psi0 = random_state(h.shape[0], 2)
    times = np.arange(0, 12.5, 0.5)  # 25 times: last block is partial for block=4
    s1, st1 = _run(h, psi0, times, tol=1e-12)
    s4, st4 = _run(h, psi0, times, tol=1e-12, block=4)
    assert sorted(st4) == list(range(len(times)))
    for i in range(len(times)):
        assert np.linalg.norm(st4[i] - st1[i]) <= 1e-10
    assert s4.matvecs < s1.matvecs
    assert s4.steps == 6 and s1.steps == 24
    assert s4.vectors_held == 7 and s1.vectors_held == 4


def test_too_narrow_bounds_are_detected(dense_cache):
    h, ev, _ = dense_cache("xxz_j1j2_L8")
    narrow = SpectralBounds(e_min=0.5 * ev[0], e_max=0.5 * ev[-1], ritz_min=0.5 * ev[0],
                            ritz_max=0.5 * ev[-1], residual_min=0.0, residual_max=0.0, steps=0)
    with pytest.raises(RuntimeError, match="bounds"):
        evolve(h, random_state(h.shape[0], 0), [0.0, 5.0], bounds=narrow)


# ----------------------------------------------------------------------------------------
# Lanczos internals
# ----------------------------------------------------------------------------------------

def test_lanczos_substeps_when_krylov_space_is_capped(dense_cache):
    h, ev, v = dense_cache("mixed_ising_L9")
    psi0 = random_state(h.shape[0], 5)
    times = [0.0, 10.0]
    stats, states = _run(h, psi0, times, method="lanczos", tol=1e-11, max_krylov=10)
    assert stats.substeps > stats.steps == 1
    assert max(stats.orders) <= 10
    ref = v @ (np.exp(-1j * ev * 10.0) * (v.conj().T @ psi0))
    assert np.linalg.norm(states[1] - ref) <= 1e-10
    assert stats.vectors_held <= 10 + 3


def test_hochbruck_lubich_bound_holds_for_plain_krylov(dense_cache):
    # Hochbruck & Lubich, SIAM J. Numer. Anal. 34, 1911 (1997): error of the m-dimensional
    # Krylov approximation <= 12 exp(-(rho t)^2/m) (e rho t/m)^m, spectrum width 4 rho.
    h, ev, v = dense_cache("xxz_j1j2_L8")
    hd = h.toarray()
    psi0 = random_state(h.shape[0], 6)
    # shift so the spectrum is centred: the bound is for [-2 rho, 2 rho]
    shift = (ev[0] + ev[-1]) / 2
    half = (ev[-1] - ev[0]) / 2
    hc = hd - shift * np.eye(len(ev))
    t = 1.5
    ref = v @ (np.exp(-1j * (ev - shift) * t) * (v.conj().T @ psi0))
    # independent Krylov approximation: orthonormal basis by QR of [psi, H psi, ...]
    for m in (6, 10, 14, 18):
        kry = np.empty((len(ev), m), dtype=complex)
        kry[:, 0] = psi0
        for j in range(1, m):
            kry[:, j] = hc @ kry[:, j - 1]
            kry[:, j] /= np.linalg.norm(kry[:, j])
        q, _ = np.linalg.qr(kry)
        approx = q @ (sla.expm(-1j * t * (q.conj().T @ hc @ q)) @ (q.conj().T @ psi0))
        err = np.linalg.norm(approx - ref)
        bound = krylov_apriori_bound(m, half, t)
        assert err <= bound
    assert krylov_apriori_bound(2, half, 10.0) == np.inf


# ----------------------------------------------------------------------------------------
# Driver contract: outputs, resume, arguments
# ----------------------------------------------------------------------------------------

def test_on_output_indices_progress_and_readonly(dense_cache):
    h, _, _ = dense_cache("xxz_j1j2_L8")
    psi0 = random_state(h.shape[0], 0)
    calls, prog = [], []

    def record(i, t, psi):
        calls.append((i, t))
        with pytest.raises(ValueError):
            psi[0] = 0.0

    times = np.linspace(0, 1, 7)
    stats = evolve(h, psi0, times, on_output=record, progress=lambda i, n: prog.append((i, n)),
                   block=2)
    assert [c[0] for c in calls] == list(range(7))
    assert [c[1] for c in calls] == pytest.approx(list(times))
    assert prog == [(i, 6) for i in range(1, 7)]
    assert isinstance(stats, EvolutionStats) and stats.matvecs > 0
    calls.clear()
    evolve(h, psi0, times, on_output=record, start_index=2, emit_start=False, block=2)
    assert [c[0] for c in calls] == list(range(3, 7))
    # psi0 untouched
    np.testing.assert_array_equal(psi0, random_state(h.shape[0], 0))


@pytest.mark.parametrize("method, block, k", [
    ("chebyshev", 1, 5), ("chebyshev", 3, 6), ("lanczos", 1, 4)])
def test_resume_reproduces_uninterrupted_run(dense_cache, method, block, k):
    h, _, _ = dense_cache("mixed_ising_L9")
    psi0 = random_state(h.shape[0], 9)
    times = np.concatenate([np.linspace(0, 3, 10), [3.7, 5.0, 5.2]])
    _, full = _run(h, psi0, times, method=method, block=block, tol=1e-10)
    _, resumed = _run(h, full[k], times, method=method, block=block, tol=1e-10, start_index=k)
    assert sorted(resumed) == list(range(k, len(times)))
    for i in range(k, len(times)):
        assert np.abs(resumed[i] - full[i]).max() <= 1e-12, i


def test_resume_must_start_at_block_boundary(dense_cache):
    h, _, _ = dense_cache("xxz_j1j2_L8")
    with pytest.raises(ValueError, match="start_index must be a multiple of block=3"):
        evolve(h, random_state(h.shape[0], 0), np.linspace(0, 1, 10), block=3, start_index=4)


@pytest.mark.parametrize("kwargs, match", [
    (dict(times=[0.0, 1.0, 0.5]), "strictly increasing"),
    (dict(times=[0.0, 1.0, 1.0]), "strictly increasing"),
    (dict(times=[0.0, np.nan]), "finite"),
    (dict(times=[]), "non-empty"),
    (dict(method="rk4"), "method"),
    (dict(tol=0.0), "tol"),
    (dict(tol=1.0), "tol"),
    (dict(block=0), "block"),
    (dict(block=2, method="lanczos"), "block must be 1"),
    (dict(start_index=3), "start_index"),
    (dict(start_index=-1), "start_index"),
    (dict(psi0=np.ones(5)), "psi0"),
    (dict(psi0=np.zeros(16)), "psi0"),
    (dict(on_output=3), "on_output"),
    (dict(max_krylov=1, method="lanczos"), "max_krylov"),
    (dict(bounds=(0.0, 1.0)), "bounds"),
])
def test_bad_arguments_raise(kwargs, match):
    h = np.diag(np.arange(16.0))
    args = dict(psi0=np.ones(16) / 4, times=[0.0, 1.0, 2.0])
    args.update(kwargs)
    psi0, times = args.pop("psi0"), args.pop("times")
    with pytest.raises(ValueError, match=match):
        evolve(h, psi0, times, **args)


def test_single_time_only_emits_start():
    calls = []
    stats = evolve(np.diag([0.0, 1.0]), np.array([1.0, 0.0]), [0.5],
                   on_output=lambda i, t, p: calls.append((i, t, p.copy())))
    assert len(calls) == 1 and calls[0][0] == 0 and stats.matvecs == 0


def test_linear_operator_protocol_only(dense_cache):
    h, ev, v = dense_cache("xxz_j1j2_L8")
    lin = spla.aslinearoperator(h)
    psi0 = random_state(h.shape[0], 3)
    ref = v @ (np.exp(-1j * ev * 2.0) * (v.conj().T @ psi0))
    for method in ("chebyshev", "lanczos"):
        _, states = _run(lin, psi0, [0.0, 2.0], method=method, tol=1e-12)
        assert np.linalg.norm(states[1] - ref) <= 1e-10


@pytest.mark.skipif(not hasattr(spla, "funm_multiply_krylov"), reason="needs scipy >= 1.17")
def test_scipy_krylov_peer_agrees(dense_cache):
    h, ev, v = dense_cache("xxz_j1j2_L8")
    psi0 = random_state(h.shape[0], 4)
    times = [0.0, 0.5, 1.5]
    states = {}
    stats = evolve_scipy_krylov(h, psi0, times, tol=1e-12,
                                on_output=lambda i, t, p: states.__setitem__(i, p.copy()))
    for i, t in enumerate(times):
        ref = v @ (np.exp(-1j * ev * t) * (v.conj().T @ psi0))
        assert np.linalg.norm(states[i] - ref) <= 1e-9
    assert stats.method == "scipy-krylov" and stats.matvecs > 0


class StrictFusedOperator:
    """Minimal operator with its own ``fused_update`` that enforces the contract strictly:
    distinct contiguous vectors, and with gamma == 0 the old content of y is poisoned with NaN
    first (so an engine relying on it would fail).  Counts products."""

    def __init__(self, h):
        self.h = h
        self.shape = h.shape
        self.dtype = h.dtype
        self.calls = 0

    def fused_update(self, x, y, alpha, beta, gamma):
        assert x is not y and not np.shares_memory(x, y)
        assert x.flags.c_contiguous and y.flags.c_contiguous
        self.calls += 1
        hx = self.h @ x
        if gamma == 0:
            y[...] = np.nan
            y[...] = alpha * hx + beta * x
        else:
            y[...] = alpha * hx + beta * x + gamma * y

    def __matmul__(self, x):
        raise AssertionError("engines must use fused_update when the operator provides it")


@pytest.mark.parametrize("method", ["chebyshev", "lanczos"])
def test_fused_update_contract(dense_cache, method):
    h, ev, v = dense_cache("mixed_ising_L9")
    op = StrictFusedOperator(h)
    psi0 = random_state(h.shape[0], 12)
    sb = spectral_bounds(op)
    assert op.calls == sb.steps
    op.calls = 0
    stats, states = _run(op, psi0, [0.0, 0.8, 2.0], method=method, bounds=sb, tol=1e-12)
    assert op.calls == stats.matvecs  # the matvec count is honest
    ref = v @ (np.exp(-1j * ev * 2.0) * (v.conj().T @ psi0))
    assert np.linalg.norm(states[2] - ref) <= 1e-10


def test_largeq_pauli_operator_integration():
    # the package's own matrix-free operator (fused_update path) against the kron reference
    pauli = pytest.importorskip("largeq.model.pauli")
    ops = pytest.importorskip("largeq.operators.pauli_operator")
    basis_mod = pytest.importorskip("largeq.basis.spaces")
    L = 8
    terms = pauli.empty(L)
    for j in range(L):
        for r, J, d in ((1, 1.0, 0.8), (2, 0.3, 1.3)):
            k = (j + r) % L
            for a, c in (("X", J / 4), ("Y", J / 4), ("Z", J * d / 4)):
                terms = terms + pauli.pauli_string(L, {j: a, k: a}, c)
    op = ops.pauli_operator(terms, basis_mod.full_basis(L))
    h = xxz_j1j2_ring(L, 1.0, 0.3, 0.8, 1.3)
    psi0 = random_state(2 ** L, 13)
    ev, v = np.linalg.eigh(h.toarray())
    ref = v @ (np.exp(-1j * ev * 1.7) * (v.conj().T @ psi0))
    for method in ("chebyshev", "lanczos"):
        _, states = _run(op, psi0, [0.0, 1.7], method=method, tol=1e-12)
        assert np.linalg.norm(states[1] - ref) <= 1e-10, method


@pytest.mark.parametrize("args, match", [
    ((-1.0, 1e-10), "x = a\\*dt"), ((np.inf, 1e-10), "x = a\\*dt"), ((1.0, 0.0), "tol"),
    ((1.0, 1.5), "tol")])
def test_chebyshev_order_bad_arguments(args, match):
    with pytest.raises(ValueError, match=match):
        chebyshev_order(*args)


def test_chebyshev_order_zero_and_tiny_x():
    assert chebyshev_order(0.0) == (1, 0.0)
    order, bound = chebyshev_order(1e-300, 1e-10)
    assert order == 1 and bound <= 1e-10
    with pytest.raises(ValueError, match="m must be"):
        krylov_apriori_bound(0, 1.0, 1.0)


def test_many_small_steps_do_not_trip_the_norm_check():
    # regression: the norm check once compared against the initial norm, so round-off
    # accumulated over ~100 steps at tol = 1e-10 raised a spurious "bounds" error
    from largeq.operators.problem import build_problem
    from largeq.scenario import resolve_scenario

    problem = build_problem(resolve_scenario("neel_j1j2", 10))
    psi, _ = problem.initial_vector()
    times = np.linspace(0.0, 40.0, 401)
    stats = evolve(problem.operator, psi, times, tol=1e-10, block=1)
    assert stats.steps == 400
