"""Pauli-string sums: the single operator representation used by every model and basis.

A Pauli string on L sites is stored as ``(x_mask, z_mask, coeff)``.  Site ``j`` carries
X if only bit ``j`` of ``x_mask`` is set, Z if only bit ``j`` of ``z_mask`` is set and Y if
both are set.  Basis states are L-bit integers ``b`` with bit ``j`` = 1 meaning spin up
(sigma^z_j = +1).  With Y = i X Z (Z acting first) the action on a basis state is

    P |b> = i^{#Y} (-1)^{popcount(z_mask & ~b)} |b ^ x_mask>,

so sigma^z|up> = +|up>, sigma^y|up> = i|down>, sigma^y|down> = -i|up>.  We fold the
``i^{#Y}`` into a stored *phase coefficient* ``c' = coeff * i^{#Y}`` so that a kernel only
needs the sign ``(-1)^{popcount(z_mask & ~b)}``.
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import product

import numpy as np

__all__ = ["PauliSum", "pauli_string", "identity", "parity_sign"]

_LETTERS = {"I": (0, 0), "X": (1, 0), "Y": (1, 1), "Z": (0, 1)}


def _popcount(v: int) -> int:
    return int(v).bit_count()


def parity_sign(z_mask: int, b: int) -> int:
    """(-1)^{popcount(z_mask & ~b)}: the sign a Z/Y pattern gives basis state ``b``."""
    return -1 if _popcount(z_mask & ~b) & 1 else 1


@dataclass(frozen=True)
class PauliSum:
    """A Hermitian-or-not sum of Pauli strings on ``n_sites`` sites.

    Attributes
    ----------
    n_sites : int
    x_mask, z_mask : numpy.ndarray of int64
    coeff : numpy.ndarray of complex128
        The user-facing coefficient of each string (before the ``i^{#Y}`` phase).
    """

    n_sites: int
    x_mask: np.ndarray
    z_mask: np.ndarray
    coeff: np.ndarray

    def __post_init__(self):
        x = np.ascontiguousarray(self.x_mask, dtype=np.int64).reshape(-1)
        z = np.ascontiguousarray(self.z_mask, dtype=np.int64).reshape(-1)
        c = np.ascontiguousarray(self.coeff, dtype=np.complex128).reshape(-1)
        if not (x.shape == z.shape == c.shape):
            raise ValueError("x_mask, z_mask and coeff must have the same length")
        if self.n_sites < 1 or self.n_sites > 62:
            raise ValueError(f"n_sites must be in 1..62, got {self.n_sites}")
        limit = np.int64(1) << np.int64(self.n_sites)
        if x.size and (x.min() < 0 or z.min() < 0 or x.max() >= limit or z.max() >= limit):
            raise ValueError("mask touches a site outside 0..n_sites-1")
        for name, arr in (("x_mask", x), ("z_mask", z), ("coeff", c)):
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)

    # ------------------------------------------------------------------ algebra
    def __len__(self) -> int:
        return int(self.coeff.size)

    def __add__(self, other: "PauliSum") -> "PauliSum":
        if not isinstance(other, PauliSum):
            return NotImplemented
        if other.n_sites != self.n_sites:
            raise ValueError("cannot add Pauli sums on different numbers of sites")
        return PauliSum(
            self.n_sites,
            np.concatenate([self.x_mask, other.x_mask]),
            np.concatenate([self.z_mask, other.z_mask]),
            np.concatenate([self.coeff, other.coeff]),
        ).simplify()

    def __mul__(self, scalar) -> "PauliSum":
        return PauliSum(self.n_sites, self.x_mask, self.z_mask, self.coeff * complex(scalar))

    __rmul__ = __mul__

    def simplify(self, tol: float = 1e-14) -> "PauliSum":
        """Merge identical strings and drop coefficients with modulus below ``tol``."""
        if len(self) == 0:
            return self
        keys = np.stack([self.x_mask, self.z_mask], axis=1)
        uniq, inv = np.unique(keys, axis=0, return_inverse=True)
        c = np.zeros(len(uniq), dtype=np.complex128)
        np.add.at(c, inv.reshape(-1), self.coeff)
        keep = np.abs(c) > tol
        return PauliSum(self.n_sites, uniq[keep, 0], uniq[keep, 1], c[keep])

    # ------------------------------------------------------------------ facts
    @property
    def n_y(self) -> np.ndarray:
        """Number of Y factors in each string."""
        return np.array([_popcount(int(a) & int(b)) for a, b in zip(self.x_mask, self.z_mask)], dtype=np.int64)

    @property
    def phase_coeff(self) -> np.ndarray:
        """coeff * i^{#Y}: the factor in front of (-1)^{popcount(z & ~b)}."""
        return self.coeff * (1j ** (self.n_y % 4))

    def is_hermitian(self, tol: float = 1e-12) -> bool:
        """A Pauli sum is Hermitian iff every (merged) coefficient is real."""
        return bool(np.all(np.abs(self.simplify().coeff.imag) <= tol))

    def is_real(self, tol: float = 1e-12) -> bool:
        """True when every matrix element in the z basis is real."""
        return bool(np.all(np.abs(self.phase_coeff.imag) <= tol))

    def is_diagonal(self) -> bool:
        return bool(np.all(self.x_mask == 0))

    def groups(self) -> dict[int, tuple[np.ndarray, np.ndarray]]:
        """Strings grouped by x_mask: {x_mask: (z_masks, phase_coeffs)}."""
        out: dict[int, tuple[list, list]] = {}
        pc = self.phase_coeff
        for x, z, c in zip(self.x_mask.tolist(), self.z_mask.tolist(), pc.tolist()):
            out.setdefault(x, ([], []))
            out[x][0].append(z)
            out[x][1].append(c)
        return {x: (np.array(zs, dtype=np.int64), np.array(cs, dtype=np.complex128)) for x, (zs, cs) in out.items()}

    def conserves_magnetization(self, max_bits: int = 20) -> bool:
        """True when the sum commutes with the total magnetization sum_j sigma^z_j.

        For each x_mask group the matrix element f(b) = sum_s c'_s (-1)^{popcount(z_s & ~b)}
        must vanish whenever b ^ x_mask has a different number of up spins than b.  f depends
        only on the bits in (x_mask | all z_masks of the group); those are enumerated.
        """
        for x, (zs, cs) in self.simplify().groups().items():
            if x == 0:
                continue
            support = x
            for z in zs.tolist():
                support |= z
            bits = [j for j in range(self.n_sites) if (support >> j) & 1]
            if len(bits) > max_bits:
                return False
            nx = _popcount(x)
            for assignment in product((0, 1), repeat=len(bits)):
                b = 0
                for j, a in zip(bits, assignment):
                    b |= a << j
                if 2 * _popcount(b & x) == nx:
                    continue  # flip keeps the magnetization
                f = sum(c * parity_sign(z, b) for z, c in zip(zs.tolist(), cs.tolist()))
                if abs(f) > 1e-12:
                    return False
        return True

    def max_abs_coeff(self) -> float:
        return float(np.max(np.abs(self.coeff))) if len(self) else 0.0

    def norm_bound(self) -> float:
        """Triangle-inequality bound ||A|| <= sum |c_s|."""
        return float(np.sum(np.abs(self.coeff)))

    def describe(self, max_terms: int = 12) -> list[str]:
        """Human-readable lines such as '+0.25 X0 X1'."""
        lines = []
        for x, z, c in zip(self.x_mask.tolist(), self.z_mask.tolist(), self.coeff.tolist()):
            letters = []
            for j in range(self.n_sites):
                xb, zb = (x >> j) & 1, (z >> j) & 1
                if xb or zb:
                    letters.append(("X" if not zb else "Y") if xb else "Z")
                    letters[-1] += str(j)
            cr = c.real if abs(c.imag) < 1e-15 else c
            lines.append(f"{cr:+.6g} {' '.join(letters) if letters else 'I'}")
            if len(lines) >= max_terms:
                lines.append(f"... ({len(self) - max_terms} more terms)")
                break
        return lines


def pauli_string(n_sites: int, ops: dict[int, str], coeff: complex = 1.0) -> PauliSum:
    """One Pauli string, e.g. ``pauli_string(8, {0: 'X', 1: 'X'}, 0.25)``."""
    x = z = 0
    for site, letter in ops.items():
        if not 0 <= site < n_sites:
            raise ValueError(f"site {site} outside 0..{n_sites - 1}")
        key = letter.upper()
        if key not in _LETTERS:
            raise ValueError(f"unknown Pauli letter {letter!r}; allowed: I, X, Y, Z")
        xb, zb = _LETTERS[key]
        x |= xb << site
        z |= zb << site
    return PauliSum(n_sites, np.array([x]), np.array([z]), np.array([coeff]))


def identity(n_sites: int, coeff: complex = 1.0) -> PauliSum:
    return PauliSum(n_sites, np.array([0]), np.array([0]), np.array([coeff]))


def empty(n_sites: int) -> PauliSum:
    return PauliSum(n_sites, np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.complex128))
