"""Small, independent reference Hamiltonians for tests (full Hilbert space, L <= 16).

Built from Kronecker products of 2x2 matrices with scipy.sparse only (no largeq code), in
largeq's basis convention: basis index ``b = sum_j bit_j 2**j``, bit ``j`` = 1 means site ``j``
is spin up (sigma^z_j = +1).  Hence in ``kron(A_{L-1}, ..., A_1, A_0)`` site 0 is the LAST
(least significant) factor and each 2x2 factor is written in the order (down, up).

Couplings multiply spin operators S = sigma/2 unless a builder says "Pauli".
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

__all__ = [
    "SX", "SY", "SZ", "site_op", "two_site", "xx_ring", "xxz_j1j2_ring",
    "mixed_field_ising", "neel_vector", "product_vector", "sigma_z_diagonals",
    "random_state",
]

# Pauli matrices in the single-site basis (|down> = 0, |up> = 1).
# sigma^z|up> = +|up>; sigma^y|up> = i|down>, sigma^y|down> = -i|up>.
SX = np.array([[0.0, 1.0], [1.0, 0.0]], dtype=complex)
SY = np.array([[0.0, 1j], [-1j, 0.0]], dtype=complex)
SZ = np.array([[-1.0, 0.0], [0.0, 1.0]], dtype=complex)

MAX_SITES = 16


def _check_L(L: int) -> None:
    if not isinstance(L, (int, np.integer)) or not (2 <= L <= MAX_SITES):
        raise ValueError(f"L must be an integer in 2..{MAX_SITES}, got {L!r}")


def site_op(L: int, j: int, m: np.ndarray) -> sp.csr_matrix:
    """2x2 matrix ``m`` acting on site ``j`` of ``L`` (identity elsewhere), sparse 2^L x 2^L."""
    _check_L(L)
    if not (0 <= j < L):
        raise ValueError(f"site j must be in 0..{L - 1}, got {j}")
    left = sp.identity(2 ** (L - 1 - j), format="csr", dtype=complex)
    right = sp.identity(2 ** j, format="csr", dtype=complex)
    return sp.kron(sp.kron(left, sp.csr_matrix(m)), right, format="csr")


def two_site(L: int, i: int, j: int, a: np.ndarray, b: np.ndarray) -> sp.csr_matrix:
    """Product ``a_i b_j`` of two single-site matrices on distinct sites."""
    if i == j:
        raise ValueError(f"sites must differ, got i = j = {i}")
    return (site_op(L, i, a) @ site_op(L, j, b)).tocsr()


def _heis_bond(L, i, j, jxy, jz):
    """jxy (S^x S^x + S^y S^y) + jz S^z S^z on bond (i, j), S = sigma/2."""
    out = 0.25 * jxy * (two_site(L, i, j, SX, SX) + two_site(L, i, j, SY, SY))
    if jz != 0:
        out = out + 0.25 * jz * two_site(L, i, j, SZ, SZ)
    return out


def _realify(h: sp.spmatrix) -> sp.csr_matrix:
    h = h.tocsr()
    if h.nnz == 0 or np.abs(h.data.imag).max() == 0.0:
        return h.real.tocsr()
    return h


def xx_ring(L: int, J: float = 1.0) -> sp.csr_matrix:
    """H = J sum_j (S^x_j S^x_{j+1} + S^y_j S^y_{j+1}), periodic (real, sparse)."""
    _check_L(L)
    h = sp.csr_matrix((2 ** L, 2 ** L), dtype=complex)
    for j in range(L):
        h = h + _heis_bond(L, j, (j + 1) % L, J, 0.0)
    return _realify(h)


def xxz_j1j2_ring(L: int, j1: float, j2: float, d1: float, d2: float) -> sp.csr_matrix:
    """H = sum_j j1 (S^x S^x + S^y S^y + d1 S^z S^z)_{j,j+1} + j2 (... + d2 S^z S^z)_{j,j+2}.

    Periodic ring; requires L >= 5 so that each bond appears once.
    """
    _check_L(L)
    if L < 5:
        raise ValueError(f"xxz_j1j2_ring needs L >= 5 for distinct bonds, got {L}")
    h = sp.csr_matrix((2 ** L, 2 ** L), dtype=complex)
    for j in range(L):
        h = h + _heis_bond(L, j, (j + 1) % L, j1, j1 * d1)
        if j2 != 0:
            h = h + _heis_bond(L, j, (j + 2) % L, j2, j2 * d2)
    return _realify(h)


def mixed_field_ising(L: int, J: float, g: float, h: float, periodic: bool = True) -> sp.csr_matrix:
    """Pauli units: H = sum_j J sigma^z_j sigma^z_{j+1} + sum_j (g sigma^x_j + h sigma^z_j).

    (Bañuls, Cirac & Hastings, PRL 106, 050405 (2011) use J = 1, g = -1.05, h = 0.5.)
    """
    _check_L(L)
    out = sp.csr_matrix((2 ** L, 2 ** L), dtype=complex)
    nb = L if periodic else L - 1
    for j in range(nb):
        out = out + J * two_site(L, j, (j + 1) % L, SZ, SZ)
    for j in range(L):
        out = out + g * site_op(L, j, SX) + h * site_op(L, j, SZ)
    return _realify(out)


def product_vector(L: int, bits: int) -> np.ndarray:
    """Basis vector |bits> (complex, length 2^L)."""
    _check_L(L)
    if not (0 <= bits < 2 ** L):
        raise ValueError(f"bits must be in 0..2^L-1, got {bits}")
    v = np.zeros(2 ** L, dtype=complex)
    v[bits] = 1.0
    return v


def neel_vector(L: int) -> np.ndarray:
    """Néel product state with spin up on even sites: <sigma^z_j> = (-1)^j."""
    return product_vector(L, sum(1 << j for j in range(0, L, 2)))


def sigma_z_diagonals(L: int) -> np.ndarray:
    """Array (L, 2^L): row j is the diagonal of sigma^z_j (+1 where bit j is set)."""
    _check_L(L)
    b = np.arange(2 ** L)
    return np.array([2.0 * ((b >> j) & 1) - 1.0 for j in range(L)])


def random_state(dim: int, seed: int) -> np.ndarray:
    """Normalized complex Gaussian vector of length ``dim`` from ``numpy.random.default_rng(seed)``."""
    rng = np.random.default_rng(seed)
    v = rng.standard_normal(dim) + 1j * rng.standard_normal(dim)
    return v / np.linalg.norm(v)
