"""Matrix-free operators against independent references.

References: quimb's Hamiltonian builders (a general-purpose library); dense Kronecker
products of 2x2 Pauli matrices written here; scipy's eigsh; exact small-ring energies.
"""

import math

import numpy as np
import pytest
import scipy.sparse.linalg as sla

from largeq.basis.spaces import full_basis, magnetization_basis
from largeq.operators.pauli_operator import PauliOperator
from largeq.model.pauli import PauliSum, pauli_string

PAULI = {
    "I": np.eye(2),
    "X": np.array([[0, 1], [1, 0]], complex),
    "Y": np.array([[0, -1j], [1j, 0]], complex),
    "Z": np.diag([1.0, -1.0]).astype(complex),
}


def dense_reference(terms, L):
    """Dense matrix of sum c * P in OUR basis order (bit j = site j, 1 = up), by kron.

    The 2x2 matrices above act on (|up>, |down>) in that order; our integer index uses
    bit value 1 for up, so we build each site factor in the (down, up) order.
    """
    flip = np.array([[0, 1], [1, 0]])
    D = 2**L
    M = np.zeros((D, D), complex)
    for ops, c in terms:
        m = np.ones((1, 1))
        for j in range(L):  # site j is bit j: later sites are more significant -> kron on the left
            p = PAULI[ops.get(j, "I")]
            p = flip @ p @ flip  # (up, down) order -> (down, up) order
            m = np.kron(p, m)
        M += c * m
    return M


def random_terms(rng, L, n_terms):
    terms = []
    for _ in range(n_terms):
        k = rng.integers(1, min(L, 4) + 1)
        sites = rng.choice(L, size=k, replace=False)
        ops = {int(s): "XYZ"[rng.integers(3)] for s in sites}
        terms.append((ops, float(rng.normal())))
    return terms


def as_pauli(terms, L):
    h = PauliSum(L, np.zeros(0), np.zeros(0), np.zeros(0))
    for ops, c in terms:
        h = h + pauli_string(L, ops, c)
    return h


def heisenberg_ring(L, J=1.0, r=1, delta=1.0):
    h = PauliSum(L, np.zeros(0), np.zeros(0), np.zeros(0))
    for i in range(L):
        j = (i + r) % L
        for a, c in (("X", J / 4), ("Y", J / 4), ("Z", J * delta / 4)):
            h = h + pauli_string(L, {i: a, j: a}, c)
    return h


@pytest.mark.parametrize("L,seed", [(5, 0), (6, 1), (7, 2)])
def test_random_pauli_sums_match_kronecker_reference(L, seed):
    rng = np.random.default_rng(seed)
    terms = random_terms(rng, L, 12)
    ref = dense_reference(terms, L)
    op = PauliOperator(as_pauli(terms, L), full_basis(L))
    np.testing.assert_allclose(op.to_dense(), ref, atol=1e-12)
    x = rng.normal(size=2**L) + 1j * rng.normal(size=2**L)
    np.testing.assert_allclose(op @ x, ref @ x, atol=1e-12)
    assert abs(op.expectation(x) - np.vdot(x, ref @ x)) < 1e-10


@pytest.mark.parametrize("n_lo", [0, 1, 3, 5, 8])
def test_block_split_does_not_change_the_operator(n_lo):
    L = 8
    rng = np.random.default_rng(7)
    terms = random_terms(rng, L, 20)
    ref = dense_reference(terms, L)
    op = PauliOperator(as_pauli(terms, L), full_basis(L, n_lo=n_lo))
    x = rng.normal(size=2**L) + 1j * rng.normal(size=2**L)
    np.testing.assert_allclose(op @ x, ref @ x, atol=1e-12)


def quimb_permutation(L):
    """Our index b -> quimb's index (site 0 most significant, |0> = up)."""
    b = np.arange(2**L)
    q = np.zeros_like(b)
    for j in range(L):
        q |= (1 - ((b >> j) & 1)) << (L - 1 - j)
    return q


@pytest.mark.parametrize("L", [6, 8, 10])
def test_heisenberg_ring_matches_quimb(L):
    quimb = pytest.importorskip("quimb")
    # quimb.ham_heis: H = sum_j J S_j . S_{j+1} with S = sigma/2 (quimb documentation)
    Hq = quimb.ham_heis(L, j=1.0, cyclic=True, sparse=True).tocsr()
    perm = quimb_permutation(L)
    Hq_ours = Hq[perm][:, perm]
    op = PauliOperator(heisenberg_ring(L), full_basis(L))
    diff = op.to_csr() - Hq_ours
    assert abs(diff).max() < 1e-12


@pytest.mark.parametrize("L", [8, 10])
def test_j1j2_ring_matches_quimb(L):
    quimb = pytest.importorskip("quimb")
    j2 = 0.3
    # quimb.ham_j1j2: sum J1 S_i.S_{i+1} + J2 S_i.S_{i+2}, cyclic
    Hq = quimb.ham_j1j2(L, j1=1.0, j2=j2, cyclic=True, sparse=True).tocsr()
    perm = quimb_permutation(L)
    ours = heisenberg_ring(L) + heisenberg_ring(L, J=j2, r=2)
    op = PauliOperator(ours, full_basis(L))
    assert abs(op.to_csr() - Hq[perm][:, perm]).max() < 1e-12


@pytest.mark.parametrize("L,n_up", [(8, 4), (9, 2), (10, 5), (10, 0)])
def test_sector_operator_equals_projection_of_full_operator(L, n_up):
    rng = np.random.default_rng(L + n_up)
    h = heisenberg_ring(L, delta=0.7) + heisenberg_ring(L, J=0.4, r=3, delta=1.3)
    h = h + pauli_string(L, {1: "Z"}, 0.3) + pauli_string(L, {0: "Z", L - 1: "Z"}, -0.2)
    full = PauliOperator(h, full_basis(L)).to_csr()
    B = magnetization_basis(L, n_up)
    s = B.states()
    sector = PauliOperator(h, B)
    np.testing.assert_allclose(sector.to_dense(), full[s][:, s].toarray(), atol=1e-13)
    for dtype in (np.float64, np.complex128):
        x = rng.normal(size=B.dim).astype(dtype)
        if dtype is np.complex128:
            x = x + 1j * rng.normal(size=B.dim)
        np.testing.assert_allclose(sector @ x, full[s][:, s] @ x, atol=1e-12)


def test_fused_update_semantics():
    L = 8
    rng = np.random.default_rng(3)
    op = PauliOperator(heisenberg_ring(L), magnetization_basis(L, 4))
    M = op.to_csr()
    x = rng.normal(size=op.shape[0]) + 1j * rng.normal(size=op.shape[0])
    y0 = rng.normal(size=op.shape[0]) + 1j * rng.normal(size=op.shape[0])
    y = y0.copy()
    op.fused_update(x, y, 0.7, -0.3, 1.9)
    np.testing.assert_allclose(y, 0.7 * (M @ x) - 0.3 * x + 1.9 * y0, atol=1e-12)
    y = np.full_like(y0, np.nan)
    op.fused_update(x, y, 2.0, 1.0, 0.0)  # gamma = 0 ignores old content, even NaN
    np.testing.assert_allclose(y, 2.0 * (M @ x) + x, atol=1e-12)
    with pytest.raises(ValueError, match="share memory"):
        op.fused_update(x, x)
    with pytest.raises(TypeError, match="output dtype"):
        op.fused_update(x, np.empty(op.shape[0]))


def test_offdiagonal_observable_in_sector_is_projected():
    # sigma^x_0 leaves every magnetization sector: its projection onto a sector is zero
    L = 6
    op = PauliOperator(pauli_string(L, {0: "X"}), magnetization_basis(L, 3))
    x = np.random.default_rng(0).normal(size=op.shape[0])
    assert np.abs(op @ x).max() == 0
    # sigma^y_0 sigma^y_1 does not: compare with the projection of the full matrix
    yy = pauli_string(L, {0: "Y", 1: "Y"})
    B = magnetization_basis(L, 3)
    full = PauliOperator(yy, full_basis(L)).to_dense()
    s = B.states()
    np.testing.assert_allclose(PauliOperator(yy, B).to_dense(), full[np.ix_(s, s)], atol=1e-14)


@pytest.mark.parametrize("L,exact", [(4, -2.0), (6, -(2 + math.sqrt(13)) / 2)])
def test_small_heisenberg_rings_exact_ground_energy(L, exact):
    # exact small-ring values quoted in the design notes (E0(L=4) = -2J, E0(L=6) = -(2+sqrt13)J/2),
    # checked against the matrix of the ring diagonalised by numpy.
    op = PauliOperator(heisenberg_ring(L), magnetization_basis(L, L // 2))
    e0 = np.linalg.eigvalsh(op.to_dense())[0]
    assert abs(e0 - exact) < 1e-12


def test_heisenberg_energy_per_site_approaches_hulthen_limit():
    # L. Hulthen (1938): e_inf = 1/4 - ln 2 per site; finite rings approach it from below as
    # e_inf - pi^2/(12 L^2) (conformal finite-size scaling with c = 1, v = pi J / 2; Bloete, Cardy &
    # Nightingale and Affleck, PRL 56 (1986)), up to logarithmic corrections.
    e_inf = 0.25 - math.log(2)
    gaps = []
    for L in (12, 16, 20):
        op = PauliOperator(heisenberg_ring(L), magnetization_basis(L, L // 2))
        e0 = sla.eigsh(op, k=1, which="SA", tol=1e-10)[0][0] / L
        cft = e_inf - math.pi**2 / (12 * L**2)
        assert e0 < e_inf
        # logarithmic corrections are a few per cent of the 1/L^2 term at these sizes
        assert abs(e0 - cft) < 0.1 * math.pi**2 / (12 * L**2)
        gaps.append(e_inf - e0)
    assert gaps[0] > gaps[1] > gaps[2]


def test_union_of_sector_spectra_is_the_full_spectrum():
    L = 8
    h = heisenberg_ring(L, delta=0.6) + heisenberg_ring(L, J=0.3, r=2, delta=1.4) + pauli_string(L, {2: "Z"}, 0.25)
    full = np.linalg.eigvalsh(PauliOperator(h, full_basis(L)).to_dense())
    parts = np.concatenate(
        [np.linalg.eigvalsh(PauliOperator(h, magnetization_basis(L, n)).to_dense()) for n in range(L + 1)]
    )
    np.testing.assert_allclose(np.sort(parts), full, atol=1e-11)


def test_table_memory_is_tiny_compared_with_a_vector():
    # the operator's tables grow like 2^(L/2); one sector vector like C(L, L/2)
    L = 24
    op = PauliOperator(heisenberg_ring(L) + heisenberg_ring(L, J=0.3, r=2), magnetization_basis(L, 12))
    assert op.table_bytes() < 0.1 * op.basis.bytes_per_vector(np.float64)


@pytest.mark.parametrize("example", ["neel_j1j2", "ising_tilted", "xx_neel", "disordered_heisenberg"])
@pytest.mark.parametrize("basis_kind", ["chosen", "full"])
def test_every_preset_matrix_free_equals_csr(example, basis_kind):
    from largeq.operators.problem import build_problem
    from largeq.scenario import resolve_scenario

    sc = resolve_scenario(example, 10)
    problem = build_problem(sc)
    basis = problem.basis if basis_kind == "chosen" else full_basis(10)
    op = PauliOperator(problem.hamiltonian, basis)
    M = op.to_csr()
    rng = np.random.default_rng(5)
    for x in (rng.normal(size=basis.dim), rng.normal(size=basis.dim) + 1j * rng.normal(size=basis.dim)):
        np.testing.assert_allclose(op @ x, M @ x, rtol=0, atol=1e-12)
    for name, obs in problem.observables.items():
        A = PauliOperator(obs.pauli, basis)
        x = rng.normal(size=basis.dim) + 1j * rng.normal(size=basis.dim)
        np.testing.assert_allclose(A @ x, A.to_csr() @ x, rtol=0, atol=1e-12)
