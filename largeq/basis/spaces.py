"""Bases of the spin-1/2 chain: the full space and a fixed magnetization sector.

Both are stored in the same *two-level* layout.  A basis state ``b`` (L-bit integer, bit j =
site j, 1 = up) is split into a high part ``hi = b >> n_lo`` and a low part
``lo = b & (2**n_lo - 1)``.  States are ordered by their integer value, so all states with
the same ``hi`` form one contiguous *block* of the state vector:

    index(b) = block_offset[hi] + lo_rank[lo]

``lo_rank[lo]`` is the rank of ``lo`` among the ``n_lo``-bit integers with the same number of
up spins (the identity for the full space).  Both tables have 2**(L/2) entries, so a lookup
is O(1): two table reads and an add, no hash map and no search.  The compiled kernels in
``largeq.operators._kernels`` use the blocks directly: terms acting only on high sites move whole
contiguous blocks, terms acting only on low sites stay inside one block.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from math import comb

import numpy as np

__all__ = ["Basis", "full_basis", "magnetization_basis", "choose_basis", "BasisChoice", "basis_decision",
           "basis_label", "basis_dimension", "basis_table_bytes"]

MAX_SITES = 62


def _popcount(a: np.ndarray) -> np.ndarray:
    return np.bitwise_count(np.asarray(a, dtype=np.int64)).astype(np.int64)


@dataclass(frozen=True, eq=False)
class Basis:
    """A two-level basis (full space or one magnetization sector).

    Attributes
    ----------
    n_sites : int
        Chain length L.
    up_spins : int or None
        Number of up spins of the sector, None for the full space.
    n_lo : int
        Number of low sites (sites 0 .. n_lo - 1) forming the in-block index.
    dim : int
        Dimension of the basis.
    """

    n_sites: int
    up_spins: int | None
    n_lo: int
    dim: int
    block_offset: np.ndarray = field(repr=False)  # (2**n_hi,) int64, -1 for empty blocks
    block_lo_up: np.ndarray = field(repr=False)  # (2**n_hi,) int64: up spins of the low part (0 for full)
    lo_list: np.ndarray = field(repr=False)  # low parts grouped by class, ascending in each class
    lo_start: np.ndarray = field(repr=False)  # class n occupies lo_list[lo_start[n]:lo_start[n+1]]
    lo_rank: np.ndarray = field(repr=False)  # (2**n_lo,) int64

    @property
    def kind(self) -> str:
        return "full" if self.up_spins is None else "magnetization"

    @property
    def is_sector(self) -> bool:
        return self.up_spins is not None

    @property
    def n_hi(self) -> int:
        return self.n_sites - self.n_lo

    @property
    def label(self) -> str:
        return basis_label(self.n_sites, self.up_spins)

    def bytes_per_vector(self, dtype=np.complex128) -> int:
        return int(self.dim) * np.dtype(dtype).itemsize

    def table_bytes(self) -> int:
        """Memory held by the lookup tables (not by any vector)."""
        return int(self.block_offset.nbytes + self.block_lo_up.nbytes + self.lo_list.nbytes + self.lo_rank.nbytes)

    def index(self, states) -> np.ndarray:
        """Positions of basis states ``states`` in the vector; -1 for states not in the basis."""
        s = np.asarray(states, dtype=np.int64)
        if s.size and (s.min() < 0 or s.max() >= (1 << self.n_sites)):
            raise ValueError(f"basis state outside 0 .. 2^{self.n_sites} - 1")
        hi = s >> self.n_lo
        lo = s & ((1 << self.n_lo) - 1)
        off = self.block_offset[hi]
        idx = off + self.lo_rank[lo]
        ok = off >= 0
        if self.up_spins is not None:
            ok &= _popcount(s) == self.up_spins
        return np.where(ok, idx, -1)

    def states(self) -> np.ndarray:
        """All basis states in vector order (one int64 array of length ``dim``)."""
        if self.dim > 200_000_000:
            raise MemoryError(f"refusing to list {self.dim:,} basis states")
        his = np.nonzero(self.block_offset >= 0)[0]
        parts = []
        for hi in his:
            n = self.block_lo_up[hi]
            los = self.lo_list[self.lo_start[n] : self.lo_start[n + 1]]
            parts.append((np.int64(hi) << self.n_lo) | los)
        out = np.concatenate(parts) if parts else np.zeros(0, np.int64)
        return out

    def describe(self) -> dict:
        return {
            "kind": self.kind,
            "sites": self.n_sites,
            "up_spins": self.up_spins,
            "dimension": int(self.dim),
            "low_sites": self.n_lo,
            "table_bytes": self.table_bytes(),
        }


def _split(n_sites: int, n_lo: int | None) -> int:
    if n_lo is None:
        n_lo = n_sites // 2
    if not 0 <= n_lo <= n_sites:
        raise ValueError(f"n_lo must be in 0..{n_sites}, got {n_lo}")
    return n_lo


def _check_sites(n_sites) -> int:
    if isinstance(n_sites, bool) or not isinstance(n_sites, (int, np.integer)) or not 1 <= n_sites <= MAX_SITES:
        raise ValueError(f"n_sites: got {n_sites!r}; allowed: an integer between 1 and {MAX_SITES}")
    return int(n_sites)


def full_basis(n_sites: int, *, n_lo: int | None = None) -> Basis:
    """The full 2^L-dimensional space."""
    n_sites = _check_sites(n_sites)
    n_lo = _split(n_sites, n_lo)
    n_hi = n_sites - n_lo
    his = np.arange(1 << n_hi, dtype=np.int64)
    return Basis(
        n_sites=n_sites,
        up_spins=None,
        n_lo=n_lo,
        dim=1 << n_sites,
        block_offset=his << n_lo,
        block_lo_up=np.zeros(1 << n_hi, np.int64),
        lo_list=np.arange(1 << n_lo, dtype=np.int64),
        lo_start=np.array([0, 1 << n_lo], np.int64),
        lo_rank=np.arange(1 << n_lo, dtype=np.int64),
    )


def magnetization_basis(n_sites: int, up_spins: int, *, n_lo: int | None = None) -> Basis:
    """The sector with ``up_spins`` spins up: dimension C(L, up_spins)."""
    n_sites = _check_sites(n_sites)
    if isinstance(up_spins, bool) or not isinstance(up_spins, (int, np.integer)) or not 0 <= up_spins <= n_sites:
        raise ValueError(f"up_spins: got {up_spins!r}; allowed: an integer between 0 and {n_sites}")
    up_spins = int(up_spins)
    n_lo = _split(n_sites, n_lo)
    n_hi = n_sites - n_lo
    los = np.arange(1 << n_lo, dtype=np.int64)
    pc_lo = _popcount(los)
    order = np.argsort(pc_lo, kind="stable")  # grouped by class, ascending inside each class
    lo_list = los[order]
    counts = np.bincount(pc_lo, minlength=n_lo + 1)
    lo_start = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    lo_rank = np.empty_like(los)
    lo_rank[lo_list] = np.arange(lo_list.size) - lo_start[pc_lo[lo_list]]
    his = np.arange(1 << n_hi, dtype=np.int64)
    need = up_spins - _popcount(his)
    valid = (need >= 0) & (need <= n_lo)
    sizes = np.where(valid, counts[np.clip(need, 0, n_lo)], 0)
    offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int64)
    block_offset = np.where(valid, offsets, -1)
    dim = int(sizes.sum())
    assert dim == comb(n_sites, up_spins)
    return Basis(
        n_sites=n_sites,
        up_spins=up_spins,
        n_lo=n_lo,
        dim=dim,
        block_offset=block_offset,
        block_lo_up=np.where(valid, need, 0).astype(np.int64),
        lo_list=lo_list,
        lo_start=lo_start,
        lo_rank=lo_rank,
    )


@dataclass(frozen=True)
class BasisChoice:
    basis: Basis
    reason: str


def basis_label(n_sites: int, up_spins: int | None) -> str:
    """The basis in words (no tables needed)."""
    dim = basis_dimension(n_sites, up_spins)
    if up_spins is None:
        return f"full space, L = {n_sites}, dimension 2^{n_sites} = {dim:,}"
    return (
        f"magnetization sector n_up = {up_spins} of L = {n_sites} "
        f"(sum of sigma^z = {2 * up_spins - n_sites}), dimension C({n_sites},{up_spins}) = {dim:,}"
    )


def basis_dimension(n_sites: int, up_spins: int | None) -> int:
    """Dimension of the full space (``up_spins`` None) or of a magnetization sector, by counting."""
    return (1 << n_sites) if up_spins is None else comb(n_sites, up_spins)


def basis_table_bytes(n_sites: int, up_spins: int | None = None, n_lo: int | None = None) -> int:
    """Bytes of the lookup tables :func:`full_basis` / :func:`magnetization_basis` would allocate
    (four int64 tables of 2^n_hi or 2^n_lo entries), known before allocating them."""
    n_lo = _split(n_sites, n_lo)
    return 16 * ((1 << (n_sites - n_lo)) + (1 << n_lo))


def basis_decision(n_sites: int, *, conserves_magnetization: bool, state_up_spins: int | None,
                   requested_up_spins: int | None = None) -> tuple[int | None, str]:
    """Which basis :func:`choose_basis` takes, without building it: (up_spins or None, reason)."""
    if requested_up_spins is not None:
        if not conserves_magnetization:
            raise ValueError("sector.up_spins: a magnetization sector was requested but the Hamiltonian "
                             "does not conserve the magnetization (x field or XYZ anisotropy)")
        if state_up_spins is not None and state_up_spins != requested_up_spins:
            raise ValueError(f"sector.up_spins: got {requested_up_spins}; the initial state has {state_up_spins} up spins")
        if isinstance(requested_up_spins, bool) or not 0 <= requested_up_spins <= n_sites:
            raise ValueError(f"up_spins: got {requested_up_spins!r}; allowed: an integer between 0 and {n_sites}")
        return requested_up_spins, f"magnetization sector n_up = {requested_up_spins} requested in the scenario"
    if conserves_magnetization and state_up_spins is not None:
        dim = comb(n_sites, state_up_spins)
        return state_up_spins, (
            f"H conserves the total magnetization and the initial state has n_up = {state_up_spins}: "
            f"the run stays in that sector ({dim:,} states instead of {1 << n_sites:,})")
    if not conserves_magnetization:
        why = "H does not conserve the magnetization (a transverse field or XYZ couplings), so the full space is needed"
    else:
        why = ("the initial state is not a definite-magnetization state (it spreads over several sectors); "
               "the full space holds it")
    return None, why


def choose_basis(n_sites: int, *, conserves_magnetization: bool, state_up_spins: int | None,
                 requested_up_spins: int | None = None) -> BasisChoice:
    """Smallest basis holding both the Hamiltonian's dynamics and the initial state.

    A z-basis product state has a definite number of up spins; when the Hamiltonian commutes
    with the total magnetization the evolution never leaves that sector.  The decision itself is
    :func:`basis_decision` (no tables), so planners can make it before allocating anything.
    """
    up, why = basis_decision(n_sites, conserves_magnetization=conserves_magnetization,
                             state_up_spins=state_up_spins, requested_up_spins=requested_up_spins)
    b = full_basis(n_sites) if up is None else magnetization_basis(n_sites, up)
    return BasisChoice(b, why)
