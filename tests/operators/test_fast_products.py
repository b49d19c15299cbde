"""The tiled product for real operators (real vectors, complex vectors as two real columns,
several vectors per pass) against independent references.

References: dense Kronecker products of 2x2 Pauli matrices (``dense_reference`` of
tests/test_operators.py, written from the definition) at small L, and the CSR matrix assembled
by the generic per-state gather (``PauliOperator.to_csr``, which shares no tables with the
compiled products) at sizes where the product runs on all threads.
"""

import numpy as np
import pytest

from largeq.basis import full_basis, magnetization_basis
from largeq.operators.pauli_operator import PauliOperator
from largeq.model.pauli import PauliSum, pauli_string

from .test_operators import as_pauli, dense_reference


def random_real_terms(rng, L, n_terms):
    """Random strings of X, Z and pairs of Y (an even number of Y: real matrix elements)."""
    terms = []
    for _ in range(n_terms):
        k = int(rng.integers(1, min(L, 4) + 1))
        sites = [int(s) for s in rng.choice(L, size=k, replace=False)]
        ops = {s: "XZ"[int(rng.integers(2))] for s in sites}
        if k >= 2 and rng.random() < 0.4:
            ops[sites[0]] = "Y"
            ops[sites[1]] = "Y"
        terms.append((ops, float(rng.normal())))
    return terms


def xxz_ring(L, j2=0.3, delta=0.7):
    h = PauliSum(L, np.zeros(0), np.zeros(0), np.zeros(0))
    for r, J in ((1, 1.0), (2, j2)):
        for i in range(L):
            for letter, c in (("X", J), ("Y", J), ("Z", J * delta)):
                h = h + pauli_string(L, {i: letter, (i + r) % L: letter}, c / 4)
    return h


def _bases(L):
    return [full_basis(L), magnetization_basis(L, L // 2), magnetization_basis(L, L // 2 - 1),
            full_basis(L, n_lo=2), magnetization_basis(L, L // 2, n_lo=L - 2)]


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_tiled_product_matches_kronecker_reference(seed):
    L = 8
    rng = np.random.default_rng(seed)
    terms = random_real_terms(rng, L, 30)
    M = dense_reference(terms, L)
    assert np.abs(M.imag).max() == 0
    full = full_basis(L)
    for b in _bases(L):
        op = PauliOperator(as_pauli(terms, L), b)
        assert op.coeff_dtype == np.float64
        idx = b.index(b.states())
        Mb = M.real[np.ix_(b.states(), b.states())]
        assert np.array_equal(idx, np.arange(b.dim))
        x = rng.standard_normal(b.dim)
        y0 = rng.standard_normal(b.dim)
        y = y0.copy()
        op.fused_update(x, y, 0.7, -0.4, 1.3)
        np.testing.assert_allclose(y, 0.7 * Mb @ x - 0.4 * x + 1.3 * y0, atol=1e-12)
        xc = x + 1j * rng.standard_normal(b.dim)
        yc0 = y0 - 2j * rng.standard_normal(b.dim)
        yc = yc0.copy()
        op.fused_update(xc, yc, -1.1, 0.25, -1.0)
        np.testing.assert_allclose(yc, -1.1 * Mb @ xc + 0.25 * xc - yc0, atol=1e-12)
        # gamma == 0 ignores the old content, NaN included
        yc[:] = np.nan
        op.fused_update(xc, yc, 1.0, 0.0, 0.0)
        np.testing.assert_allclose(yc, Mb @ xc, atol=1e-12)
    assert full.dim == 2**L


@pytest.mark.parametrize("R", [1, 2, 3, 4, 8, 16])
@pytest.mark.parametrize("kind", ["real", "complex"])
def test_block_product_matches_csr(R, kind):
    L = 12
    rng = np.random.default_rng(R)
    terms = random_real_terms(rng, L, 40)
    for b in (magnetization_basis(L, 6), full_basis(L), magnetization_basis(L, 5, n_lo=4)):
        op = PauliOperator(as_pauli(terms, L), b)
        csr = op.to_csr()
        X = rng.standard_normal((b.dim, R))
        Y0 = rng.standard_normal((b.dim, R))
        if kind == "complex":
            X = X + 1j * rng.standard_normal((b.dim, R))
            Y0 = Y0 + 1j * rng.standard_normal((b.dim, R))
        Y = Y0.copy()
        op.fused_update_block(X, Y, 0.5, 2.0, -1.0)
        np.testing.assert_allclose(Y, 0.5 * (csr @ X) + 2.0 * X - Y0, atol=1e-12)
        # each column equals the single-vector product
        for j in range(R):
            yj = Y0[:, j].copy()
            op.fused_update(np.ascontiguousarray(X[:, j]), yj, 0.5, 2.0, -1.0)
            np.testing.assert_allclose(Y[:, j], yj, atol=1e-13)


def test_multithreaded_tiled_product_matches_csr():
    """dim >= vectors.PARALLEL_MIN: the product runs on all threads."""
    L = 18
    rng = np.random.default_rng(5)
    for b in (magnetization_basis(L, 9), full_basis(L)):
        op = PauliOperator(xxz_ring(L), b)
        csr = op.to_csr()
        x = rng.standard_normal(b.dim) + 1j * rng.standard_normal(b.dim)
        y = np.empty_like(x)
        op.fused_update(x, y)
        np.testing.assert_allclose(y, csr @ x, atol=1e-12)
        X = rng.standard_normal((b.dim, 4))
        Y = np.empty_like(X)
        op.fused_update_block(X, Y)
        np.testing.assert_allclose(Y, csr @ X, atol=1e-12)


def test_complex_scalars_and_complex_operators_still_work():
    L = 10
    rng = np.random.default_rng(3)
    b = magnetization_basis(L, 5)
    op = PauliOperator(xxz_ring(L), b)
    csr = op.to_csr()
    x = rng.standard_normal(b.dim) + 1j * rng.standard_normal(b.dim)
    y0 = rng.standard_normal(b.dim) + 1j * rng.standard_normal(b.dim)
    y = y0.copy()
    op.fused_update(x, y, 0.3 - 0.2j, 1j, 0.5)
    np.testing.assert_allclose(y, (0.3 - 0.2j) * (csr @ x) + 1j * x + 0.5 * y0, atol=1e-12)
    X = np.column_stack([x, 2 * x])
    Y = np.column_stack([y0, y0])
    op.fused_update_block(X, Y, 0.3 - 0.2j, 1j, 0.5)
    np.testing.assert_allclose(Y[:, 1], (0.3 - 0.2j) * (csr @ (2 * x)) + 2j * x + 0.5 * y0, atol=1e-12)
    # a complex operator (one Y) with a block of vectors
    hc = xxz_ring(L) + pauli_string(L, {0: "Y", 3: "Z"}, 0.2) + pauli_string(L, {0: "Y", 1: "X"}, 0.1)
    opc = PauliOperator(hc, full_basis(L))
    assert opc.coeff_dtype == np.complex128
    Xc = rng.standard_normal((2**L, 3)) + 0j
    Yc = np.empty_like(Xc)
    opc.fused_update_block(Xc, Yc)
    np.testing.assert_allclose(Yc, opc.to_csr() @ Xc, atol=1e-12)


def test_block_product_argument_checks():
    b = magnetization_basis(8, 4)
    op = PauliOperator(xxz_ring(8), b)
    X = np.ones((b.dim, 2))
    with pytest.raises(ValueError):
        op.fused_update_block(X, X)
    with pytest.raises(ValueError):
        op.fused_update_block(X, np.ones((b.dim, 3)))
    with pytest.raises(TypeError):
        op.fused_update_block(X + 0j, np.ones((b.dim, 2)))
    with pytest.raises(ValueError):
        op.fused_update_block(np.asfortranarray(np.ones((b.dim, 2))), np.ones((b.dim, 2)))


@pytest.mark.parametrize("n", [1000, 70_000])
def test_accumulate_pair_matches_numpy(n):
    from largeq.operators.vectors import accumulate_pair

    rng = np.random.default_rng(n)
    K = 5
    outs0 = rng.standard_normal((K, n)) + 1j * rng.standard_normal((K, n))
    u = rng.standard_normal(n) + 1j * rng.standard_normal(n)
    v = rng.standard_normal(n) + 1j * rng.standard_normal(n)
    a = rng.standard_normal(K) + 1j * rng.standard_normal(K)
    b = rng.standard_normal(K) - 1j * rng.standard_normal(K)
    outs = outs0.copy()
    accumulate_pair(outs, a, u, b, v)
    np.testing.assert_allclose(outs, outs0 + a[:, None] * u + b[:, None] * v, atol=1e-13)
    outs[:] = np.nan
    accumulate_pair(outs, a, u, b, v, overwrite=True)
    np.testing.assert_allclose(outs, a[:, None] * u + b[:, None] * v, atol=1e-13)
    with pytest.raises(ValueError):
        accumulate_pair(outs[:, ::2], a, u[::2], b, v[::2])


@pytest.mark.parametrize("dtype", [float, complex])
def test_block_chebyshev_moments_equal_one_at_a_time(dtype):
    """Moments of R vectors at once against the one-vector recursion and against dense numpy
    Chebyshev polynomials T_n(Ht) = cos(n arccos Ht) on the eigenvalues (Weisse et al.,
    Rev. Mod. Phys. 78, 275 (2006), Eq. (16))."""
    from largeq.engines.kpm import chebyshev_moments, chebyshev_moments_block, chebyshev_scale

    L = 10
    b = magnetization_basis(L, 5)
    op = PauliOperator(xxz_ring(L), b)
    H = op.to_dense()
    w, U = np.linalg.eigh(H)
    bounds = (w[0] - 0.1, w[-1] + 0.1)
    rng = np.random.default_rng(11)
    R = 4
    V = rng.standard_normal((b.dim, R))
    if dtype is complex:
        V = V + 1j * rng.standard_normal((b.dim, R))
    N = 40
    mu = chebyshev_moments_block(op, V, N, bounds)
    a, c = chebyshev_scale(bounds)
    theta = np.arccos((w - c) / a)
    for r in range(R):
        np.testing.assert_allclose(mu[r], chebyshev_moments(op, V[:, r].copy(), N, bounds), atol=1e-9)
        weights = np.abs(U.conj().T @ V[:, r]) ** 2
        ref = np.array([np.sum(weights * np.cos(n * theta)) for n in range(N)])
        np.testing.assert_allclose(mu[r], ref, atol=1e-8 * np.sum(weights))


def test_density_of_states_same_with_vectors_per_pass():
    from largeq.engines.kpm import density_of_states

    L = 12
    b = magnetization_basis(L, 6)
    op = PauliOperator(xxz_ring(L), b)
    bounds = (-6.0, 6.0)
    one = density_of_states(op, 64, bounds, 5, np.random.default_rng(2))
    seen = []
    blk = density_of_states(op, 64, bounds, 5, np.random.default_rng(2), vectors_per_pass=2,
                            on_vector=lambda i, m: seen.append(i))
    assert seen == [0, 1, 2, 3, 4]
    np.testing.assert_allclose(blk.vector_moments, one.vector_moments, atol=1e-8 * b.dim)
    np.testing.assert_allclose(blk.density, one.density, rtol=1e-9, atol=1e-12)
    with pytest.raises(ValueError):
        density_of_states(op, 64, bounds, 5, np.random.default_rng(2), vectors_per_pass=0)


def test_bases_with_huge_blocks_use_the_block_kernel():
    """A split with one block of 2^18 states would need 64 MiB of tile scratch: the operator
    falls back to the block-by-block kernel, with the same result."""
    L = 18
    b = full_basis(L, n_lo=L)
    op = PauliOperator(xxz_ring(L), b)
    assert not op._tiling_ok
    assert PauliOperator(xxz_ring(L), full_basis(L))._tiling_ok
    rng = np.random.default_rng(0)
    x = rng.standard_normal(b.dim) + 1j * rng.standard_normal(b.dim)
    y = np.empty_like(x)
    op.fused_update(x, y)
    np.testing.assert_allclose(y, op.to_csr() @ x, atol=1e-12)
    X = rng.standard_normal((b.dim, 2))
    Y = np.empty_like(X)
    op.fused_update_block(X, Y)
    np.testing.assert_allclose(Y, op.to_csr() @ X, atol=1e-12)
