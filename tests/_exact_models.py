"""Small reference Hamiltonians for the exact-diagonalization tests (independent of largeq's builders).

Bit convention of largeq: basis state b = sum_j bit_j 2^j, bit_j = 1 means spin up.  np.kron puts the
first factor on the most significant bit, so site j sits at kron position L-1-j.  Local 2x2 matrices
are in the order (down, up) = (bit 0, bit 1).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

# Pauli matrices in the (down, up) order: sigma^z|up> = +|up>, sigma^y|up> = i|down>
PAULI = {
    "I": np.eye(2, dtype=complex),
    "X": np.array([[0, 1], [1, 0]], dtype=complex),
    "Y": np.array([[0, 1j], [-1j, 0]], dtype=complex),
    "Z": np.array([[-1, 0], [0, 1]], dtype=complex),
}


def site_op(L: int, j: int, letter: str) -> sp.csr_matrix:
    """sigma^letter on site j of L sites, full 2^L space, largeq bit order."""
    return sp.kron(sp.kron(sp.identity(2 ** (L - 1 - j)), sp.csr_matrix(PAULI[letter])), sp.identity(2**j)).tocsr()


def bond(L: int, i: int, j: int, letter: str) -> sp.csr_matrix:
    return (site_op(L, i, letter) @ site_op(L, j, letter)).tocsr()


def mixed_field_ising(L: int, J: float = 1.0, g: float = -1.05, h: float = 0.5, periodic: bool = False):
    """H = sum_j J sz_j sz_{j+1} + g sx_j + h sz_j (Pauli units), real."""
    n_b = L if periodic else L - 1
    H = sum(J * bond(L, j, (j + 1) % L, "Z") for j in range(n_b))
    H = H + sum(g * site_op(L, j, "X") + h * site_op(L, j, "Z") for j in range(L))
    return H.real.tocsr()


def heisenberg(L: int, fields=None, J: float = 1.0, delta: float = 1.0, periodic: bool = False):
    """H = J sum (Sx Sx + Sy Sy + delta Sz Sz) + sum_j h_j Sz_j with S = sigma/2, real."""
    n_b = L if periodic else L - 1
    H = sp.csr_matrix((2**L, 2**L), dtype=complex)
    for j in range(n_b):
        k = (j + 1) % L
        H = H + 0.25 * J * (bond(L, j, k, "X") + bond(L, j, k, "Y") + delta * bond(L, j, k, "Z"))
    if fields is not None:
        for j, hj in enumerate(fields):
            H = H + 0.5 * hj * site_op(L, j, "Z")
    return H.real.tocsr()


def xx_chain(L: int, J: float = 1.0, periodic: bool = False):
    """H = J sum (Sx Sx + Sy Sy), S = sigma/2 (free fermions, many degenerate gaps)."""
    return heisenberg(L, None, J=J, delta=0.0, periodic=periodic)


def sector_indices(L: int, n_up: int) -> np.ndarray:
    """Basis states with n_up spins up, ascending."""
    b = np.arange(2**L)
    pop = np.array([int(x).bit_count() for x in b])
    return b[pop == n_up]


def restrict(op, idx) -> np.ndarray:
    """Dense block of op on the basis states idx (exact when op conserves the sector)."""
    return op.tocsr()[idx][:, idx].toarray()


def reflect(L: int, b: int) -> int:
    return int(format(b, f"0{L}b")[::-1], 2)


def reflection_even_isometry(L: int) -> sp.csr_matrix:
    """Columns (|b> + |R b>)/sqrt2 (b < R b) and |b> (b = R b): the reflection-even subspace."""
    rows, cols, vals = [], [], []
    c = 0
    for b in range(2**L):
        r = reflect(L, b)
        if r < b:
            continue
        if r == b:
            rows.append(b), cols.append(c), vals.append(1.0)
        else:
            rows += [b, r]
            cols += [c, c]
            vals += [2**-0.5, 2**-0.5]
        c += 1
    return sp.csr_matrix((vals, (rows, cols)), shape=(2**L, c))


def neel_state(L: int, idx: np.ndarray | None = None) -> np.ndarray:
    """|up down up down ...> (site 0 up) in the full space or on the sector states idx."""
    b = sum(1 << j for j in range(0, L, 2))
    if idx is None:
        v = np.zeros(2**L)
        v[b] = 1.0
        return v
    v = np.zeros(len(idx))
    v[np.searchsorted(idx, b)] = 1.0
    return v
