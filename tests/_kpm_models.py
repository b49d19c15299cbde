"""Small full-space reference Hamiltonians for the KPM / typicality tests (L <= 14).

Built with scipy.sparse.kron of 2x2 matrices in largeq's bit convention: basis index
b = sum_j bit_j 2^j, bit j = 1 means spin up.  The single-site basis is ordered
(|down> = 0, |up> = 1), and site j is the (L-1-j)-th factor of the Kronecker product
(the leftmost factor is the most significant bit).  Couplings multiply S = sigma/2
unless a builder says it uses Pauli matrices.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

# sigma^z|up> = +|up>, sigma^x swaps, sigma^y|up> = i|down>, sigma^y|down> = -i|up>
SX = np.array([[0, 1], [1, 0]], dtype=complex)
SY = np.array([[0, 1j], [-1j, 0]], dtype=complex)
SZ = np.array([[-1, 0], [0, 1]], dtype=complex)
PAULI = {"x": SX, "y": SY, "z": SZ}


def site_op(L: int, j: int, m: np.ndarray) -> sp.csr_matrix:
    """2x2 matrix ``m`` acting on site j of an L-site chain (full space, CSR)."""
    out = sp.identity(1, dtype=complex, format="csr")
    for site in range(L - 1, -1, -1):
        factor = sp.csr_matrix(m) if site == j else sp.identity(2, dtype=complex, format="csr")
        out = sp.kron(out, factor, format="csr")
    return out


def pauli(L: int, j: int, letter: str) -> sp.csr_matrix:
    return site_op(L, j, PAULI[letter])


def j1j2_xxz_ring(L: int, j1=1.0, delta1=1.0, j2=0.3, delta2=1.0) -> sp.csr_matrix:
    """H = sum_j J1 (SxSx + SySy + D1 SzSz)_{j,j+1} + J2 (... + D2 SzSz)_{j,j+2}, periodic."""
    H = sp.csr_matrix((2**L, 2**L), dtype=complex)
    sx = [pauli(L, j, "x") / 2 for j in range(L)]
    sy = [pauli(L, j, "y") / 2 for j in range(L)]
    sz = [pauli(L, j, "z") / 2 for j in range(L)]
    for r, (J, D) in ((1, (j1, delta1)), (2, (j2, delta2))):
        if J == 0:
            continue
        for j in range(L):
            k = (j + r) % L
            H = H + J * (sx[j] @ sx[k] + sy[j] @ sy[k] + D * (sz[j] @ sz[k]))
    return H.tocsr()


def xx_ring(L: int, J=1.0) -> sp.csr_matrix:
    """H = J sum_j (S^x_j S^x_{j+1} + S^y_j S^y_{j+1}), periodic."""
    return j1j2_xxz_ring(L, j1=J, delta1=0.0, j2=0.0)


def mixed_field_ising(L: int, J=1.0, g=-1.05, h=0.5) -> sp.csr_matrix:
    """H = sum_j (J sz_j sz_{j+1} + g sx_j + h sz_j) with Pauli matrices, periodic."""
    H = sp.csr_matrix((2**L, 2**L), dtype=complex)
    for j in range(L):
        H = H + J * (pauli(L, j, "z") @ pauli(L, (j + 1) % L, "z"))
        H = H + g * pauli(L, j, "x") + h * pauli(L, j, "z")
    return H.tocsr()


def real_csr(H: sp.csr_matrix) -> sp.csr_matrix:
    """Real part of a Hamiltonian known to be real (asserts it)."""
    assert abs(H.imag).max() == 0 if H.nnz else True
    return H.real.tocsr()


def neel_state(L: int) -> np.ndarray:
    """|up down up down ...>: sites 0, 2, 4, ... up."""
    b = sum(1 << j for j in range(0, L, 2))
    v = np.zeros(2**L, dtype=complex)
    v[b] = 1.0
    return v


def xx_free_fermion_energy(L: int, J: float, beta: float) -> float:
    """Exact canonical energy of the XX ring (all sectors) from Jordan-Wigner fermions.

    H = J sum_j (S^x S^x + S^y S^y) = (J/2) sum_j (c_j^+ c_j+1 + h.c.) with the boundary bond
    carrying (-1)^(N+1): periodic momenta k = 2 pi n / L for odd fermion number N, antiperiodic
    k = 2 pi (n + 1/2) / L for even N; eps_k = J cos k.  With Z^{s}_{P/AP} = prod_k (1 + s e^{-beta eps_k})
    the parity projection gives Z = (1/2)[Z_AP^+ + Z_AP^- + Z_P^+ - Z_P^-] (standard; e.g.
    E. Lieb, T. Schultz, D. Mattis, Ann. Phys. 16, 407 (1961)).  Returns -d ln Z / d beta.
    """
    n = np.arange(L)
    terms = []
    for shift, s, weight in ((0.5, 1.0, 1.0), (0.5, -1.0, 1.0), (0.0, 1.0, 1.0), (0.0, -1.0, -1.0)):
        eps = J * np.cos(2 * np.pi * (n + shift) / L)
        f = 1.0 + s * np.exp(-beta * eps)
        z = np.prod(f)
        # dZ/dbeta = sum_k (-s eps_k e^{-beta eps_k}) prod_{k' != k} f_k'
        dz = 0.0
        for k in range(L):
            dz += -s * eps[k] * np.exp(-beta * eps[k]) * np.prod(np.delete(f, k))
        terms.append((weight * z, weight * dz))
    Z = 0.5 * sum(t[0] for t in terms)
    dZ = 0.5 * sum(t[1] for t in terms)
    return float(-dZ / Z)
