"""Operators on symmetry sectors, splitting of states into sectors, cross-sector observables.

* :class:`SymmetricOperator` -- a G-invariant Pauli sum (the Hamiltonian, a translation-invariant
  observable) on one :class:`~largeq.basis.sectors.SymmetricSector`, matrix-free, with the same
  ``fused_update`` / ``expectation`` / ``to_csr`` protocol as :class:`largeq.operators.PauliOperator`.
* :func:`split_basis_state` -- the components P_chi |b> of a z-basis product state in every sector
  it touches (weights |S_r| / |G| summing to one).
* :func:`split_product_state` -- the components of any product state (tilted spins included), over the
  characters and, when H conserves the magnetization, over n_up (full-space sectors otherwise).
* :class:`CrossSectorDiagonal` -- <psi|A|psi> = sum_{s, s'} <psi_s|A|psi_s'> for diagonal (z-basis)
  observables A that need not commute with G (sigma^z_0, staggered magnetization), from per-orbit
  tables built once; a time step then costs one pass over the sector vectors.
* :class:`CrossSectorObservables` -- the same sum for any Pauli sum (bond energies, sigma^x sums,
  XX + YY correlations), matrix-free: <psi_a|A|psi_b> = <psi_a|B_ab|psi_b> with the covariant part
  B_ab = (1/|G|) sum_h conj(chi_a(h)) chi_b(h) h A h^dagger, one gather pass per sector pair.
* :func:`split_start` -- the components of a start given as a z-basis integer or as spinors; the
  evolution itself is :func:`largeq.engines.sector_evolution.evolve_split`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from largeq.basis import _sector_kernels as sk
from largeq.operators.pauli_operator import FusedOperator, fused_arguments
from largeq.model import symmetry as msym
from largeq.model.pauli import PauliSum
from largeq.basis.sectors import GroupSpec, SymmetricSector, orbit_representatives, symmetric_sector
from largeq.operators.vectors import threads_for, vdot

__all__ = ["SymmetricOperator", "StoredSectorMatrix", "SectorCSR", "is_invariant", "split_basis_state", "SectorComponent", "CrossSectorDiagonal",
           "split_product_state", "product_sector_weights", "choose_sectors", "sector_dimensions", "CrossSectorObservables", "covariant_part",
           "sector_observables", "split_start", "stabiliser_average", "observables_for_start", "expand_to_magnetization", "project_from_magnetization"]


# --------------------------------------------------------------------------- invariance
def is_invariant(ps: PauliSum, group: GroupSpec) -> dict[str, bool]:
    """Whether g A g^dagger = A for each generator of ``group`` (checked exactly on the Pauli sum by
    ``largeq.model.symmetry.commutes``, the same check that finds the symmetries of H)."""
    gens = {"translation": (1 % ps.n_sites, 0, 0), "reflection": (0, 1, 0), "spin_flip": (0, 0, 1)}
    on = {"translation": group.translation, "reflection": group.reflection, "spin_flip": group.spin_flip}
    return {name: msym.commutes(ps, g) for name, g in gens.items() if on[name]}


# --------------------------------------------------------------------------- operator
class SymmetricOperator(FusedOperator):
    """A G-invariant Pauli sum on one symmetry sector, applied matrix-free (gather form).

    (A x)_i = sum_{strings} c' (-1)^{popcount(z & ~b)} chi(g') sqrt(|S_r| / |S_{r_i}|) x[idx(r)],
    b = r_i ^ x_mask, r = g' b its representative (found by scanning the orbit) -- Sandvik (2010).

    Raises ValueError when the Pauli sum is not invariant under the sector's group (such an operator
    connects sectors: use :class:`CrossSectorDiagonal` for diagonal ones).
    """

    def __init__(self, pauli: PauliSum, sector: SymmetricSector, *, check: bool = True):
        if pauli.n_sites != sector.n_sites:
            raise ValueError(f"operator has {pauli.n_sites} sites but the sector has {sector.n_sites}")
        pauli = pauli.simplify()
        if check:
            inv = is_invariant(pauli, sector.group)
            bad = [k for k, v in inv.items() if not v]
            if bad:
                raise ValueError(f"the operator is not invariant under {', '.join(bad)}: it connects different "
                                 "sectors; use CrossSectorDiagonal (diagonal observables) or a smaller group")
        self.pauli = pauli
        self.sector = sector
        self.hermitian = pauli.is_hermitian()
        real = sector.real and pauli.is_real()
        cdtype = np.float64 if real else np.complex128
        self.coeff_dtype = np.dtype(cdtype)
        super().__init__(dtype=cdtype, shape=(sector.dim, sector.dim))
        groups = pauli.groups()
        cast = (lambda a: np.ascontiguousarray(np.real(a), np.float64)) if real else (
            lambda a: np.ascontiguousarray(a, np.complex128))
        dz, dc = groups.get(0, (np.zeros(1, np.int64), np.zeros(1, np.complex128)))
        self._diag = np.empty(sector.dim, cdtype)
        sk.diag_values(sector.reps, dz, cast(dc), self._diag)
        keys = sorted(k for k in groups if k != 0)
        gx = np.array(keys, np.int64)
        gptr = np.zeros(len(keys) + 1, np.int64)
        gz, gc = [], []
        for n, x in enumerate(keys):
            z, c = groups[x]
            gz.extend(z.tolist()); gc.extend(c.tolist())
            gptr[n + 1] = len(gz)
        self._groups = (gx, gptr, np.array(gz, np.int64), cast(np.array(gc if gc else [0.0], np.complex128)))
        tphase, sr, sf = sector.character_args()
        if not real:
            tphase = tphase.astype(np.complex128)
        self._char = (tphase, sr, sf)

    def _args(self):
        s = self.sector
        L, full, t, r, f = s.group_args()
        tphase, sr, sf = self._char
        return (L, full, s.group.kernel_up, t, r, f, tphase, sr, sf, *s.lookup_args(), self._diag, *self._groups)

    def table_bytes(self) -> int:
        return int(self._diag.nbytes + sum(a.nbytes for a in self._groups)) + self.sector.table_bytes()

    def fused_update(self, x, y, alpha=1.0, beta=0.0, gamma=0.0):
        """In place ``y <- alpha * (A x) + beta * x + gamma * y``; x and y distinct 1-d arrays."""
        n = self.shape[0]
        x, scal = fused_arguments(n, self.coeff_dtype, x, y, alpha, beta, gamma)
        if n == 0:
            return y
        with threads_for(n):
            sk.sym_fused(*self._args(), x, y, *scal)
        return y

    def expectation(self, x: np.ndarray):
        """<x|A|x> (x not necessarily normalised), chunked so it does not depend on the thread count."""
        x = np.ascontiguousarray(x)
        if x.shape != (self.shape[0],):
            raise ValueError(f"expectation: vector must have shape ({self.shape[0]},), got {x.shape}")
        need = self._vec_dtype(x)
        if x.dtype != need:
            x = x.astype(need)
        partial = np.zeros(min(256, max(1, self.shape[0])), np.complex128)
        if self.shape[0]:
            with threads_for(self.shape[0]):
                sk.sym_expect(*self._args(), x, partial)
        val = complex(partial.sum())
        return val.real if self.hermitian else val

    def to_csr(self, max_dim: int = 2_000_000) -> sp.csr_matrix:
        """The same operator as a scipy CSR matrix (rows sorted, duplicates summed)."""
        n = self.shape[0]
        if n > max_dim:
            raise MemoryError(f"to_csr: dimension {n:,} exceeds max_dim = {max_dim:,}")
        return self.assemble(coded=False).to_scipy()

    def assemble(self, *, coded: bool = True, max_values: int = 65536) -> "SectorCSR":
        """The operator's matrix, assembled in two parallel passes over the rows (count, then fill): the peak
        is the finished matrix plus one count per row, with no COO copy and no conversion.

        With ``coded`` (real sectors only) the first pass also gathers the distinct values; when there are at
        most ``max_values`` of them (a few hundred for the built-in chains: couplings x characters x orbit-size
        ratios, plus the diagonal's bond counts) each entry stores its value's position in that table, one or
        two bytes instead of eight.
        """
        n = self.shape[0]
        if n >= 2**31 - 1:
            raise MemoryError(f"assemble: dimension {n:,} needs 64-bit column indices")
        width = self._groups[0].size + 1
        nc = int(min(max(n, 1), 1024))
        bcols = np.empty((nc, width), np.int64)
        bvals = np.empty((nc, width), self.coeff_dtype)
        coded = bool(coded) and self.coeff_dtype == np.float64
        per_chunk = int(min(max_values, 4096)) if coded else 0
        tabs = np.empty((nc, per_chunk), np.float64)
        ntabs = np.zeros(nc, np.int64)
        counts = np.zeros(n, np.int64)
        indptr = np.zeros(n + 1, np.int64)
        if n:
            with threads_for(n):
                sk.sym_csr_counts(*self._args(), bcols, bvals, counts, tabs, ntabs)
            np.cumsum(counts, out=indptr[1:])
        del counts
        table = np.zeros(0, np.float64)
        if coded and n and np.all(ntabs >= 0):
            table = np.unique(np.concatenate([tabs[c, :ntabs[c]] for c in range(nc)]))
            if table.size > max_values:
                table = np.zeros(0, np.float64)
        del tabs
        nnz = int(indptr[-1])
        indices = np.empty(nnz, np.int32)
        if table.size:
            codes = np.empty(nnz, np.uint8 if table.size <= 256 else np.uint16)
            data = np.zeros(1, self.coeff_dtype)
        else:
            codes = np.zeros(1, np.uint16)
            data = np.empty(nnz, self.coeff_dtype)
        if n:
            with threads_for(n):
                sk.sym_csr_fill(*self._args(), bcols, bvals, indptr, indices, data, table, codes)
        if table.size:
            return SectorCSR(self.shape, indptr, indices, None, codes, table)
        return SectorCSR(self.shape, indptr, indices, data, None, None)

    def stored(self, *, coded: bool = True) -> "StoredSectorMatrix":
        """The same operator with its matrix stored (CSR, int32 columns; values coded in one or two bytes
        where the sector is real, see :meth:`assemble`): faster products for nnz x 5-20 bytes."""
        return StoredSectorMatrix(self, coded=coded)

    def to_dense(self, max_dim: int = 20_000) -> np.ndarray:
        if self.shape[0] > max_dim:
            raise MemoryError(f"to_dense: dimension {self.shape[0]:,} exceeds max_dim = {max_dim:,}")
        return self.to_csr().toarray()


class StoredSectorMatrix(SymmetricOperator):
    """A :class:`SymmetricOperator` whose products use its stored CSR matrix (built once by the
    matrix-free kernel).  Trades memory (about (n_groups / 2 + 1) x dim entries, 6 bytes each for real sectors
    (int32 column, uint16 code of the value) and 20 for complex ones) for speed: the orbit scans and lookups are
    done once instead of at every product."""

    def __init__(self, op: SymmetricOperator, *, coded: bool = True):
        self.__dict__.update(op.__dict__)
        self.matrix = op.assemble(coded=coded)

    def table_bytes(self) -> int:
        return super().table_bytes() + self.matrix.nbytes

    def expectation(self, x: np.ndarray):
        """<x|A|x> through the stored matrix (one temporary vector; the matrix-free path rescans orbits)."""
        x = np.ascontiguousarray(x)
        if x.shape != (self.shape[0],):
            raise ValueError(f"expectation: vector must have shape ({self.shape[0]},), got {x.shape}")
        y = np.empty(self.shape[0], dtype=self._vec_dtype(x))
        self.fused_update(x, y)
        val = vdot(x, y)
        return val.real if self.hermitian else val

    def fused_update(self, x, y, alpha=1.0, beta=0.0, gamma=0.0):
        n = self.shape[0]
        x, scal = fused_arguments(n, self.coeff_dtype, x, y, alpha, beta, gamma)
        if n:
            with threads_for(n):
                self.matrix.fused(x, y, *scal)
        return y


class SectorCSR:
    """A stored sector matrix: CSR with int32 columns and either plain values (``data``) or one- or two-byte
    positions (``codes``) in a sorted table of its distinct real values (``table``)."""

    def __init__(self, shape, indptr, indices, data, codes, table):
        self.shape = tuple(shape)
        self.indptr, self.indices, self.data, self.codes, self.table = indptr, indices, data, codes, table

    @property
    def coded(self) -> bool:
        return self.codes is not None

    @property
    def nnz(self) -> int:
        return int(self.indptr[-1])

    @property
    def nbytes(self) -> int:
        parts = (self.indptr, self.indices, self.data, self.codes, self.table)
        return int(sum(a.nbytes for a in parts if a is not None))

    def values(self) -> np.ndarray:
        return self.table[self.codes] if self.coded else self.data

    def fused(self, x, y, alpha, beta, gamma) -> None:
        """y <- alpha (M x) + beta x + gamma y (arguments already checked by the caller)."""
        if self.coded:
            sk.csr_coded_fused(self.indptr, self.indices, self.codes, self.table, x, y, alpha, beta, gamma)
        else:
            sk.csr_fused(self.indptr, self.indices, self.data, x, y, alpha, beta, gamma)

    def to_scipy(self) -> sp.csr_matrix:
        return sp.csr_matrix((self.values(), self.indices.astype(np.int64), self.indptr), shape=self.shape)


# --------------------------------------------------------------------------- states
def _state_args(sector: SymmetricSector, complex_phase=True):
    tphase, sr, sf = sector.character_args()
    if complex_phase:
        tphase = tphase.astype(np.complex128)
    L, full, t, r, f = sector.group_args()
    return (L, full, t, r, f, float(sector.group.order), tphase, sr, sf, *sector.lookup_args())


def project_from_magnetization(sector: SymmetricSector, states, amps) -> np.ndarray:
    """Sector coordinates of P_chi sum_q amps[q] |states[q]> (complex128)."""
    states = np.ascontiguousarray(states, np.int64)
    amps = np.ascontiguousarray(amps, np.complex128)
    out = np.zeros(sector.dim, np.complex128)
    sk.project_states(*_state_args(sector), states, amps, out)
    return out


def expand_to_magnetization(sector: SymmetricSector, v: np.ndarray, states=None) -> np.ndarray:
    """Amplitudes <s|v> on magnetization-sector states ``states`` (default: all, in largeq.basis order)."""
    if states is None:
        states = sector.u1.states()
    states = np.ascontiguousarray(states, np.int64)
    out = np.empty(states.size, np.complex128)
    sk.expand_states(*_state_args(sector), states, np.ascontiguousarray(v, np.complex128), out)
    return out


@dataclass(frozen=True, eq=False)
class SectorComponent:
    """P_chi |psi> in sector coordinates, with its weight ||P_chi psi||^2."""

    sector: SymmetricSector
    vector: np.ndarray = field(repr=False)
    weight: float


def split_basis_state(bits: int, n_sites: int, *, translation: bool = True, reflection: bool = False,
                      spin_flip: bool = False, lookup: str = "block", tol: float = 1e-12) -> tuple[list[SectorComponent], str]:
    """Split the z-basis state |bits> into the sectors it touches.

    Each component is P_chi |b> = conj(chi(g')) sqrt(|S_r| / |G|) |r~> (g' b = r); the weights sum to 1
    over the characters of G.  With ``reflection`` the one-dimensional characters exist only at k = 0, pi;
    if the state has weight at other momenta the reflection is dropped for the whole split (a note says so).

    Returns
    -------
    components : list of SectorComponent (only sectors with weight > tol)
    note : str
        What group was used and why.
    """
    L = int(n_sites)
    n_up = int(bits).bit_count()
    if spin_flip and 2 * n_up != L:
        raise ValueError(f"spin_flip needs n_up = L/2; the state has n_up = {n_up} of L = {L}")
    b = np.array([bits], np.int64)

    def try_group(refl: bool):
        group = GroupSpec(L, n_up, translation=translation, reflection=refl, spin_flip=spin_flip)
        orbit_rep = sk.find_rep(np.int64(bits), np.int64(L), np.int64(group.full), translation, refl, spin_flip)[0]
        # characters compatible with the orbit of b: enumerate them from the stabiliser directly
        moms = range(L) if translation else (None,)
        comps = []
        total = 0.0
        orbits = None
        for m in moms:
            if refl and m is not None and (2 * m) % L != 0:
                continue
            for r in ((1, -1) if refl else (None,)):
                for f in ((1, -1) if spin_flip else (None,)):
                    # compatibility of this one orbit: build the tiny sector restricted to b's orbit first
                    if not _compatible(orbit_rep, L, group, m, r, f):
                        continue
                    if orbits is None:
                        orbits = orbit_representatives(group)
                    sec = symmetric_sector(L, n_up, momentum=m, reflection=r, flip=f, lookup=lookup, orbits=orbits)
                    vec = project_from_magnetization(sec, b, np.ones(1))
                    w = float(np.vdot(vec, vec).real)
                    if w > tol:
                        if sec.real:
                            assert np.max(np.abs(vec.imag)) < 1e-14
                        comps.append(SectorComponent(sec, vec, w))
                        total += w
        return comps, total

    comps, total = try_group(reflection)
    note = (f"group: {'T ' if translation else ''}{'R ' if reflection else ''}{'F' if spin_flip else ''}".strip()
            + f"; |b> = {bits:#x} touches {len(comps)} sector(s), weights sum to {total:.15f}")
    if reflection and abs(total - 1.0) > 1e-10:
        comps, total = try_group(False)
        note = (f"reflection dropped: the state has weight outside k = 0, pi (two-dimensional representations of "
                f"the dihedral group); group T{' F' if spin_flip else ''}; {len(comps)} sector(s), weights sum to {total:.15f}")
    if abs(total - 1.0) > 1e-10:
        raise RuntimeError(f"sector weights sum to {total}, not 1 (bug)")
    return comps, note


def _compatible(rep: int, L: int, group: GroupSpec, m, r, f) -> bool:
    """chi(g) = 1 for every g in the stabiliser of ``rep`` (one orbit only)."""
    for g in group.abstract().elements:
        j, p, ff = g
        if int(msym.apply_bits(g, rep, L)) == rep:
            ch = np.exp(2j * np.pi * m * j / L) if m is not None else 1.0
            ch *= (r if p else 1) * (f if ff else 1)
            if abs(ch - 1) > 1e-9:
                return False
    return True


# --------------------------------------------------------------------------- cross-sector observables
class CrossSectorDiagonal:
    """<psi|A|psi> for diagonal Pauli sums A and psi = sum over sectors (same group G) of components.

    Per orbit representative r_u the table T[u, o, (a, b)] = (1/|G|) sum_g A_o(g r_u) chi_a(g) conj(chi_b(g))
    is built once (|G| x terms operations per orbit); then

        <A_o> = sum_u [ sum_a |v_a(u)|^2 T_aa + 2 Re sum_{a<b} conj(v_a(u)) v_b(u) T_ab ],

    one pass over the sector vectors per time.  Cross terms a != b are the sector-connecting part
    (e.g. sigma^z_j from a Neel start connects k = 0 and k = pi).  Memory: orbits x observables x
    n(n+1)/2 complex numbers for n sectors.
    """

    def __init__(self, sectors: list[SymmetricSector], observables: dict[str, PauliSum]):
        if not sectors:
            raise ValueError("need at least one sector")
        g = sectors[0].group
        for s in sectors:
            if s.group != g:
                raise ValueError("all sectors must share one group (same generators and magnetization)")
        for name, a in observables.items():
            if not a.is_diagonal():
                raise ValueError(f"observable {name!r} is not diagonal in the z basis")
            if not a.is_hermitian():
                raise ValueError(f"observable {name!r} is not Hermitian")
        self.sectors = list(sectors)
        self.names = list(observables)
        self.group = g
        ureps = np.unique(np.concatenate([s.reps for s in sectors]))
        self.uidx = np.ascontiguousarray(np.stack([s.index(ureps) for s in sectors], axis=1).astype(np.int64))
        n_sec = len(sectors)
        L = g.n_sites
        n_t = L if g.translation else 1
        tph = np.ones((n_sec, n_t), np.complex128)
        for a, s in enumerate(sectors):
            tph[a] = s.tphase
        srs = np.array([float(s.reflection_parity or 1) for s in sectors])
        sfs = np.array([float(s.flip_parity or 1) for s in sectors])
        oz, oc, optr = [], [], [0]
        for name in self.names:
            a = observables[name].simplify()
            oz.extend(a.z_mask.tolist()); oc.extend(np.real(a.phase_coeff).tolist()); optr.append(len(oz))
        self.table = np.zeros((ureps.size, len(self.names), n_sec * (n_sec + 1) // 2), np.complex128)
        sk.cross_tables(ureps, np.int64(L), np.int64(g.full), g.translation, g.reflection, g.spin_flip,
                        float(g.order), tph, srs, sfs, np.array(oz, np.int64), np.array(oc, np.float64),
                        np.array(optr, np.int64), self.table)
        self.ureps = ureps

    def table_bytes(self) -> int:
        return int(self.table.nbytes + self.uidx.nbytes + self.ureps.nbytes)

    def __call__(self, vectors) -> dict[str, float]:
        vecs = tuple(np.ascontiguousarray(v, np.complex128) for v in vectors)
        if len(vecs) != len(self.sectors) or any(v.shape != (s.dim,) for v, s in zip(vecs, self.sectors)):
            raise ValueError("one vector per sector, of the sector's dimension")
        partial = np.zeros((min(256, max(1, self.uidx.shape[0])), len(self.names)))
        with threads_for(self.uidx.shape[0]):
            sk.cross_eval(self.uidx, self.table, vecs, partial)
        tot = partial.sum(axis=0)
        return {n: float(v) for n, v in zip(self.names, tot)}

    def diagonal_only(self, vectors) -> dict[str, float]:
        """The same sum without the a != b cross terms (what evaluating each sector alone would give)."""
        n = len(self.sectors)
        keep = [q for q, (a, b) in enumerate((a, b) for a in range(n) for b in range(a, n)) if a == b]
        saved = self.table
        t = np.zeros_like(saved)
        t[:, :, keep] = saved[:, :, keep]
        self.table = t
        try:
            return self(vectors)
        finally:
            self.table = saved


def _spinors(spinors, L=None) -> np.ndarray:
    sp_ = np.asarray(spinors, np.complex128)
    if sp_.ndim != 2 or sp_.shape[1] != 2 or (L is not None and sp_.shape[0] != L):
        raise ValueError(f"spinors: need shape (L, 2), got {sp_.shape}")
    nrm = np.sqrt(np.sum(np.abs(sp_) ** 2, axis=1))
    if np.any(nrm == 0):
        raise ValueError("spinors: a site has zero amplitude for both up and down")
    return sp_ / nrm[:, None]


def _element_overlaps(sp_: np.ndarray, g) -> np.ndarray:
    """c[n] = <psi|P_n g|psi> for the product state psi (P_n: projector on n up spins).

    (g psi)(s) = psi(g^-1 s) and bit k of g^-1 s, g = T^j F^f R^p, is bit (sigma(k) + j) mod L of s
    XOR f (sigma(k) = L - 1 - k with R), so g psi is the product state with spinor
    phi_m[bit] = psi_k[bit ^ f] at m = sigma(k) + j; the overlap restricted to n up spins is the
    coefficient of z^n in prod_m (conj(psi_m[0]) phi_m[0] + conj(psi_m[1]) phi_m[1] z).
    """
    L = sp_.shape[0]
    j, p, f = g
    phi = np.empty_like(sp_)
    for k in range(L):
        m = ((L - 1 - k) if p else k) + j
        row = sp_[k, ::-1] if f else sp_[k]
        phi[m % L] = row
    poly = np.ones(1, np.complex128)
    for m in range(L):
        d = np.conj(sp_[m, 0]) * phi[m, 0]
        u = np.conj(sp_[m, 1]) * phi[m, 1]
        nxt = np.zeros(poly.size + 1, np.complex128)
        nxt[:-1] += poly * d
        nxt[1:] += poly * u
        poly = nxt
    return poly


def _character(key, g, L) -> complex:
    m, r, f = key
    j, p, ff = g
    ch = np.exp(2j * np.pi * m * j / L) if m is not None else 1.0
    return complex(ch * ((r if p else 1) or 1) * ((f if ff else 1) or 1))


def _characters(L, translation, reflection, spin_flip) -> list[tuple]:
    """Keys (m, r, f) of the one-dimensional characters of the group generated by the chosen T, R, F."""
    out = []
    for m in (range(L) if translation else (None,)):
        if reflection and m is not None and (2 * m) % L != 0:
            continue
        for r in ((1, -1) if reflection else (None,)):
            for f in ((1, -1) if spin_flip else (None,)):
                out.append((m, r, f))
    return out


def product_sector_weights(spinors, *, conserve_magnetization: bool, translation: bool = True,
                           reflection: bool = False, spin_flip: bool = False) -> dict[tuple, float]:
    """||P_chi P_n psi||^2 of a product state for every sector key (n_up or None, m, r, f), without
    building any sector: (1/|G|) sum_g conj(chi(g)) <psi|P_n g|psi>, each overlap an O(L^2) polynomial
    product (:func:`_element_overlaps`).  n_up is None (full-space sectors) unless ``conserve_magnetization``.
    With ``spin_flip`` and a conserved magnetization the state must lie in n_up = L/2 (F maps n to L - n).
    """
    sp_ = _spinors(spinors)
    L = sp_.shape[0]
    group = msym.standard_group(L, translation=translation, reflection=reflection, spin_flip=spin_flip)
    ovl = {g: _element_overlaps(sp_, g) for g in group.elements}
    if spin_flip and conserve_magnetization:
        w_half = ovl[msym.IDENTITY][L // 2].real if L % 2 == 0 else 0.0
        if abs(w_half - 1.0) > 1e-12:
            raise ValueError("spin flip with a conserved magnetization needs a state with n_up = L/2 only")
    out = {}
    n_list = range(L + 1) if conserve_magnetization else (None,)
    order = len(group.elements)
    for key in _characters(L, translation, reflection, spin_flip):
        chis = {g: np.conj(_character(key, g, L)) for g in group.elements}
        for n in n_list:
            if conserve_magnetization and spin_flip and n != L // 2:
                continue
            tot = sum(chis[g] * (ovl[g][n] if n is not None else ovl[g].sum()) for g in group.elements)
            out[(n, *key)] = float((tot / order).real)
    return out


def _site_map(g, L: int) -> list[int]:
    """Site k of g^-1 s is read from site map[k] of s (g = T^j F^f R^p), see :func:`_element_overlaps`."""
    j, p, _ = g
    return [(((L - 1 - k) if p else k) + j) % L for k in range(L)]


def _fixed_counts(g, L: int) -> list[int]:
    """c[n] = number of basis states with n up spins fixed by g (exact integers, cycle polynomials).

    On a cycle of length c of the site map, a fixed state is constant (f = 0: 0 or c up spins) or
    alternates (f = 1: needs c even, two choices with c/2 up spins)."""
    mp = _site_map(g, L)
    seen = [False] * L
    poly = [1]
    for k0 in range(L):
        if seen[k0]:
            continue
        c, k = 0, k0
        while not seen[k]:
            seen[k] = True
            k = mp[k]
            c += 1
        if g[2]:
            if c % 2:
                return [0] * (L + 1)
            factor = {c // 2: 2}
        else:
            factor = {0: 1, c: 1}
        nxt = [0] * (len(poly) + c)
        for a, va in enumerate(poly):
            if va:
                for e, ve in factor.items():
                    nxt[a + e] += va * ve
        poly = nxt
    return (poly + [0] * (L + 1))[: L + 1]


def sector_dimensions(n_sites: int, keys, *, translation: bool = True, reflection: bool = False,
                      spin_flip: bool = False) -> list[int]:
    """Dimensions of the sectors ``keys`` = (n_up or None, m, r, f) without enumerating them:
    Tr(P_chi P_n) = (1/|G|) sum_g conj(chi(g)) #{n-states fixed by g} (Burnside's lemma weighted by
    the character; T, R, F permute basis states without signs)."""
    L = int(n_sites)
    group = msym.standard_group(L, translation=translation, reflection=reflection, spin_flip=spin_flip)
    fixed = {g: _fixed_counts(g, L) for g in group.elements}
    out = []
    for n, m, r, f in keys:
        tot = 0j
        for g in group.elements:
            cnt = sum(fixed[g]) if n is None else fixed[g][n]
            if cnt:
                tot += np.conj(_character((m, r, f), g, L)) * cnt
        out.append(int(round((tot / len(group.elements)).real)))
    return out


def choose_sectors(spinors, *, conserve_magnetization: bool, translation: bool = True, reflection: bool = False,
                   spin_flip: bool = False, tol: float = 1e-14) -> dict:
    """The group and the sectors a product state touches, with weights and dimensions, before any
    sector is built.  Spin flip is dropped for a conserved magnetization unless the state has
    n_up = L/2 only (F maps n to L - n); reflection is dropped when the state has weight at
    k != 0, pi (two-dimensional representations of the dihedral group).  Sectors of weight <= ``tol``
    are left out.  Returns {group: {translation, reflection, spin_flip}, sectors: [{key, weight,
    dimension}], left_out, note}."""
    sp_ = _spinors(spinors)
    L = sp_.shape[0]
    if spin_flip and conserve_magnetization:
        n_w = _element_overlaps(sp_, msym.IDENTITY).real
        if L % 2 or abs(n_w[L // 2] - 1.0) > 1e-12:
            spin_flip = False
    weights = product_sector_weights(sp_, conserve_magnetization=conserve_magnetization, translation=translation,
                                     reflection=reflection, spin_flip=spin_flip)
    dropped_r = False
    if reflection and sum(weights.values()) < 1.0 - 1e-10:
        reflection, dropped_r = False, True
        weights = product_sector_weights(sp_, conserve_magnetization=conserve_magnetization,
                                         translation=translation, reflection=False, spin_flip=spin_flip)
    keys = sorted((k for k, w in weights.items() if w > tol),
                  key=lambda k: (-1 if k[0] is None else k[0], -1 if k[1] is None else k[1], k[2] or 0, k[3] or 0))
    dims = sector_dimensions(L, keys, translation=translation, reflection=reflection, spin_flip=spin_flip)
    sectors = [{"key": k, "weight": weights[k], "dimension": d} for k, d in zip(keys, dims) if d > 0]
    left_out = float(sum(w for w in weights.values() if w <= tol))
    total = sum(s["weight"] for s in sectors)
    names = " ".join(x for x, on in (("T", translation), ("R", reflection), ("F", spin_flip)) if on)
    space = "n_up-resolved" if conserve_magnetization else "full-space"
    note = (f"group: {names}; {space} sectors; the product state touches {len(sectors)} sector(s), weights sum to "
            f"{total:.15f}" + (f" ({left_out:.1e} left out in sectors of weight <= {tol:g})" if left_out > 0 else ""))
    if dropped_r:
        note = ("reflection dropped: the state has weight outside k = 0, pi (two-dimensional representations of "
                "the dihedral group); " + note)
    return {"group": {"translation": translation, "reflection": reflection, "spin_flip": spin_flip},
            "sectors": sectors, "left_out": left_out, "note": note}


def split_product_state(spinors, *, conserve_magnetization: bool, translation: bool = True, reflection: bool = False,
                        spin_flip: bool = False, lookup: str = "block", tol: float = 1e-14
                        ) -> tuple[list[SectorComponent], str]:
    """Split a product state prod_j (spinors[j, 0] |down> + spinors[j, 1] |up>) into the sectors it touches.

    With ``conserve_magnetization`` the sectors are (n_up, character) pairs, one family per n_up the
    state touches; otherwise full-space sectors (``up_spins`` None).  Which sectors are touched, their
    weights and the group come from :func:`choose_sectors` before anything is built; each touched
    sector's component is filled by ``largeq.basis._sector_kernels.product_amplitudes`` (|G| product
    amplitudes per representative, no magnetization-sector vector).
    """
    from largeq.basis.states import _site_table

    sp_ = _spinors(spinors)
    L = sp_.shape[0]
    choice = choose_sectors(sp_, conserve_magnetization=conserve_magnetization, translation=translation,
                            reflection=reflection, spin_flip=spin_flip, tol=tol)
    reflection, spin_flip = choice["group"]["reflection"], choice["group"]["spin_flip"]
    keep = {s["key"]: s["weight"] for s in choice["sectors"]}
    left_out = choice["left_out"]
    orbits_by_n: dict = {}
    comps = []
    for key in keep:
        n, m, r, f = key
        if n not in orbits_by_n:
            orbits_by_n[n] = orbit_representatives(GroupSpec(L, n, translation=translation, reflection=reflection,
                                                             spin_flip=spin_flip))
        sec = symmetric_sector(L, n, momentum=m, reflection=r, flip=f, lookup=lookup, orbits=orbits_by_n[n])
        if sec.dim == 0:
            continue
        n_lo = sec.u1.n_lo
        amp_lo = _site_table(sp_[:, 0], sp_[:, 1], 0, n_lo)
        amp_hi = _site_table(sp_[:, 0], sp_[:, 1], n_lo, L - n_lo)
        vec = np.empty(sec.dim, np.complex128)
        L_, full, t, rr, ff = sec.group_args()
        tphase, sr, sf = sec.character_args()
        sk.product_amplitudes(sec.reps, np.sqrt(sec.stab.astype(np.float64)), L_, full, t, rr, ff,
                              float(sec.group.order), np.ascontiguousarray(tphase, np.complex128), sr, sf,
                              np.int64(n_lo), amp_lo, amp_hi, vec)
        w = float(np.vdot(vec, vec).real)
        if abs(w - keep[key]) > 1e-10:
            raise RuntimeError(f"sector {sec.label}: component weight {w} differs from the predicted {keep[key]} (bug)")
        comps.append(SectorComponent(sec, vec, w))
    total = sum(c.weight for c in comps)
    if abs(total + left_out - 1.0) > 1e-10:
        raise RuntimeError(f"sector weights sum to {total + left_out}, not 1 (bug)")
    return comps, choice["note"]


# --------------------------------------------------------------------------- general cross-sector observables
def _char_row(sector: SymmetricSector, elements) -> np.ndarray:
    tphase, sr, sf = sector.character_args()
    out = np.empty(len(elements), np.complex128)
    for q, (j, p, f) in enumerate(elements):
        out[q] = complex(tphase[j] if sector.group.translation else 1.0) * (sr if p else 1.0) * (sf if f else 1.0)
    return out


def covariant_part(A: PauliSum, elements, chi_a: np.ndarray, chi_b: np.ndarray, tol: float = 1e-13) -> PauliSum:
    """B_ab = (1/|G|) sum_h conj(chi_a(h)) chi_b(h) h A h^dagger (``elements`` = h, characters per element).

    P_a A P_b = P_a B_ab P_b and P_a B_ab = B_ab P_b, so <psi_a|A|psi_b> = <psi_a|B_ab|psi_b> with
    B_ab psi_b inside sector a.  Zero (no strings) when A connects no states of the two sectors by
    symmetry alone, e.g. a translation-invariant A between different momenta.
    """
    mapped = [msym.map_pauli(A, g) for g in elements]
    w = np.conj(chi_a) * chi_b / len(elements)
    x = np.concatenate([m.x_mask for m in mapped])
    z = np.concatenate([m.z_mask for m in mapped])
    c = np.concatenate([np.asarray(m.coeff, np.complex128) * w[q] for q, m in enumerate(mapped)])
    scale = max(float(np.max(np.abs(A.coeff), initial=0.0)), 1e-300)
    return PauliSum(A.n_sites, x, z, c).simplify(tol * scale)


class CrossSectorObservables:
    """<psi|A|psi> for any Hermitian Pauli sum A and psi = sum of sector components, matrix-free.

    <psi|A|psi> = sum_a <psi_a|B_aa|psi_a> + 2 Re sum_{a<b} <psi_a|B_ab|psi_b> with the covariant parts
    B_ab of :func:`covariant_part`; each pair costs one gather pass over sector a
    (``largeq.basis._sector_kernels.cross_pair_expect``), like one product with the Hamiltonian when
    B_ab has about as many x masks.  Pairs with B_ab = 0 (a translation-invariant A between momenta)
    or that no string of B_ab can connect (n_up differing by more than a string flips) are skipped.
    Memory: the Pauli strings of the B_ab only (no per-orbit tables, no magnetization-sector vector);
    with ``store`` each B_ab block is kept as CSR instead (about the nonzeros of the part of H with the
    same x masks), so an evaluation costs one stored product per pair instead of the orbit scans.  A
    diagonal block B_aa invariant under the group is evaluated from its sector operator's diagonal (one
    number per state, stored or not), and a stored off-diagonal invariant B_aa is a
    :class:`StoredSectorMatrix` (two-pass assembly, coded values).
    The sectors must share the generators of G; they may differ in n_up (tilted states under a
    magnetization-conserving H).
    """

    def __init__(self, sectors: list[SymmetricSector], observables: dict[str, PauliSum], *, store: bool = False):
        if not sectors:
            raise ValueError("need at least one sector")
        g0 = sectors[0].group
        flags = (g0.n_sites, g0.translation, g0.reflection, g0.spin_flip)
        for s in sectors:
            g = s.group
            if (g.n_sites, g.translation, g.reflection, g.spin_flip) != flags:
                raise ValueError("all sectors must share the generators of the group")
        self.sectors = list(sectors)
        self.names = list(observables)
        elements = g0.abstract().elements
        chis = [_char_row(s, elements) for s in sectors]
        self._nrm = [np.sqrt(s.stab.astype(np.float64)) for s in sectors]
        self._col = []
        for s in sectors:
            tphase, sr, sf = s.character_args()
            reps, nrm, mode, blk, n_lo, rank_tab, boff, lo_rank = s.lookup_args()
            self._col.append((s.group.kernel_up, np.ascontiguousarray(tphase, np.complex128), sr, sf, reps, nrm,
                              mode, blk, n_lo, rank_tab, boff, lo_rank))
        self.pairs: dict[str, list] = {}
        self._invariant_parts: dict[tuple, PauliSum] = {}
        self.direct: dict[tuple, SymmetricOperator] = {}
        self.n_strings = 0
        for name, A in observables.items():
            A = A.simplify()
            if not A.is_hermitian():
                raise ValueError(f"observable {name!r} is not Hermitian")
            lst = []
            for a in range(len(sectors)):
                for b in range(a, len(sectors)):
                    B = covariant_part(A, elements, chis[a], chis[b])
                    if len(B) == 0:
                        continue
                    if a == b and all(is_invariant(B, sectors[a].group).values()):
                        if B.is_diagonal():
                            # a diagonal invariant block is the sector operator's diagonal: one number per
                            # state, no orbit scan per evaluation
                            self.direct[(name, a)] = SymmetricOperator(B, sectors[a], check=False)
                        elif store:
                            self._invariant_parts[(name, a)] = B
                    na, nb = sectors[a].up_spins, sectors[b].up_spins
                    groups = {}
                    for x, (zz, cc) in B.groups().items():
                        pc = int(x).bit_count()
                        if na is not None and (abs(na - nb) > pc or (pc - (na - nb)) % 2):
                            continue
                        groups[x] = (zz, cc)
                    if not groups:
                        continue
                    keys = sorted(groups)
                    gptr = np.zeros(len(keys) + 1, np.int64)
                    gz, gc = [], []
                    for q, x in enumerate(keys):
                        gz.extend(np.asarray(groups[x][0]).tolist()); gc.extend(np.asarray(groups[x][1]).tolist())
                        gptr[q + 1] = len(gz)
                    self.n_strings += len(gz)
                    lst.append((a, b, np.array(keys, np.int64), gptr, np.array(gz, np.int64),
                                np.array(gc, np.complex128)))
            self.pairs[name] = lst
        self.stored = {}
        if store:
            for name, lst in self.pairs.items():
                for a, b, gx, gptr, gz, gc in lst:
                    invariant = self._invariant_parts.get((name, a)) if a == b else None
                    if invariant is not None:
                        # B_aa invariant under the group: the sector operator of B_aa (two-pass assembly,
                        # coded values) instead of a scipy CSR built from COO entries
                        self.stored[(name, a, b)] = SymmetricOperator(invariant, self.sectors[a], check=False).stored()
                    else:
                        self.stored[(name, a, b)] = self._block(a, b, gx, gptr, gz, gc)

    def _block(self, a, b, gx, gptr, gz, gc) -> sp.csr_matrix:
        """The block of B_ab (rows: sector a, columns: sector b) as CSR, real when its entries are."""
        sa, sb = self.sectors[a], self.sectors[b]
        cap = max(1, sa.dim * gx.size)
        rows = np.empty(cap, np.int64); cols = np.empty(cap, np.int64); vals = np.empty(cap, np.complex128)
        L, full, t, r, f = sa.group_args()
        e = sk.cross_pair_coo(L, full, t, r, f, sa.reps, self._nrm[a], *self._col[b], gx, gptr, gz, gc,
                              rows, cols, vals)
        v = vals[:e]
        if e and np.max(np.abs(v.imag)) == 0.0:
            v = v.real.copy()
        m = sp.coo_matrix((v, (rows[:e], cols[:e])), shape=(sa.dim, sb.dim)).tocsr()
        del rows, cols, vals
        m.sum_duplicates()
        if m.nnz < 2**31 - 1:
            m.indices = m.indices.astype(np.int32)
        return m

    def table_bytes(self) -> int:
        st = sum(m.table_bytes() - m.sector.table_bytes() if isinstance(m, StoredSectorMatrix)
                 else m.data.nbytes + m.indices.nbytes + m.indptr.nbytes for m in self.stored.values())
        st += sum(op.table_bytes() - op.sector.table_bytes() for op in self.direct.values())
        return int(sum(v.nbytes for v in self._nrm) + 24 * self.n_strings + st)

    def pair_value(self, a: int, b: int, gx, gptr, gz, gc, vecs, name=None) -> complex:
        if a == b and (name, a) in self.direct:
            return complex(self.direct[(name, a)].expectation(vecs[a]))
        m = self.stored.get((name, a, b))
        if isinstance(m, StoredSectorMatrix):
            return complex(m.expectation(vecs[a]))
        if m is not None:
            return complex(vdot(vecs[a], m @ vecs[b]))
        sa = self.sectors[a]
        partial = np.zeros(min(256, max(1, sa.dim)), np.complex128)
        L, full, t, r, f = sa.group_args()
        with threads_for(sa.dim):
            sk.cross_pair_expect(L, full, t, r, f, sa.reps, self._nrm[a], vecs[a], *self._col[b][:4],
                                 *self._col[b][4:], vecs[b], gx, gptr, gz, gc, partial)
        return complex(partial.sum())

    def __call__(self, vectors) -> dict[str, float]:
        vecs = tuple(np.ascontiguousarray(v, np.complex128) for v in vectors)
        if len(vecs) != len(self.sectors) or any(v.shape != (s.dim,) for v, s in zip(vecs, self.sectors)):
            raise ValueError("one vector per sector, of the sector's dimension")
        out = {}
        for name in self.names:
            tot = 0.0
            for a, b, gx, gptr, gz, gc in self.pairs[name]:
                v = self.pair_value(a, b, gx, gptr, gz, gc, vecs, name)
                tot += v.real if a == b else 2.0 * v.real
            out[name] = float(tot)
        return out


class _CombinedObservables:
    """Diagonal observables through per-orbit tables, the others matrix-free (one evaluator)."""

    def __init__(self, parts, names):
        self.parts = [p for p in parts if p is not None and p.names]
        self.names = list(names)

    def table_bytes(self) -> int:
        return int(sum(p.table_bytes() for p in self.parts))

    def __call__(self, vectors) -> dict[str, float]:
        out = {}
        for p in self.parts:
            out.update(p(vectors))
        return {n: out[n] for n in self.names}


def sector_observables(sectors: list[SymmetricSector], observables: dict[str, PauliSum], *, tables: bool = False,
                       store: bool = False):
    """The evaluator of <psi|A|psi> across sectors for every observable.

    ``tables`` True sends diagonal observables to :class:`CrossSectorDiagonal` (per-orbit tables:
    fastest per time, orbits x observables x n(n+1)/2 complex numbers of memory) when all sectors
    share one group; everything else (and everything by default) goes to
    :class:`CrossSectorObservables` (matrix-free, or its blocks stored as CSR with ``store``).
    """
    same = all(s.group == sectors[0].group for s in sectors)
    diag = {n: a for n, a in observables.items() if a.is_diagonal()} if (tables and same) else {}
    rest = {n: a for n, a in observables.items() if n not in diag}
    parts = [CrossSectorDiagonal(sectors, diag) if diag else None,
             CrossSectorObservables(sectors, rest, store=store) if rest else None]
    return _CombinedObservables(parts, list(observables))


def stabiliser_average(obs: PauliSum, bits: int, group: GroupSpec) -> tuple[PauliSum, bool]:
    """(1/|S_b|) sum_{g in S_b} g A g^dagger over the elements of G that fix the basis state |bits>.

    When H is G-invariant and g|b> = |b>, <A(t)> = <g A g^dagger (t)> for every g in S_b, so A and its
    average have identical relaxation curves for this start.  Returns the average and whether it differs
    from A (True: A is *equivalent*, not equal, to the averaged observable -- the output should say so).
    """
    L = group.n_sites
    terms = [msym.map_pauli(obs, g) for g in group.abstract().elements if int(msym.apply_bits(g, bits, L)) == bits]
    avg = terms[0]
    for t in terms[1:]:
        avg = avg + t
    avg = (avg * (1.0 / len(terms))).simplify()
    differs = not msym.same_operator(avg, obs)
    return avg, differs


def observables_for_start(observables: dict[str, PauliSum], bits: int, group: GroupSpec
                          ) -> tuple[dict[str, PauliSum], dict[str, str]]:
    """The observables a sector run evaluates for the z-basis start |bits>: each replaced by its
    :func:`stabiliser_average` where that differs.  The curve is the same for this start, and the average is
    often invariant under the whole group: a single bond of the Néel state becomes the mean bond, whose
    blocks are then sector operators (stored like H, with coded values) instead of blocks built entry by
    entry.  Returns (observables, {name: note} for those replaced)."""
    used, notes = {}, {}
    for name, a in observables.items():
        avg, differs = stabiliser_average(a, int(bits), group)
        used[name] = avg if differs else a
        if differs:
            notes[name] = (f"evaluated as its average over the {group_stabiliser_size(int(bits), group)} symmetry "
                           f"operations that leave the initial state unchanged ({len(avg)} Pauli strings): the "
                           f"same curve for this start and a symmetric H")
    return used, notes


def group_stabiliser_size(bits: int, group: GroupSpec) -> int:
    """How many elements of the group fix the basis state |bits>."""
    L = group.n_sites
    return sum(1 for g in group.abstract().elements if int(msym.apply_bits(g, bits, L)) == bits)


# --------------------------------------------------------------------------- starts
def split_start(H: PauliSum, start, *, translation: bool = True, reflection: bool = False, spin_flip: bool = False,
                lookup: str = "block", conserve_magnetization: bool | None = None
                ) -> tuple[list[SectorComponent], str]:
    """Sector components of a start given as a z-basis integer (``split_basis_state``, magnetization
    conserved) or as spinors of shape (L, 2) (``split_product_state``).  ``conserve_magnetization``
    None asks H."""
    L = H.n_sites
    if conserve_magnetization is None:
        conserve_magnetization = bool(H.conserves_magnetization())
    if isinstance(start, (int, np.integer)):
        if conserve_magnetization:
            n_up = int(start).bit_count()
            return split_basis_state(int(start), L, translation=translation, reflection=reflection,
                                     spin_flip=spin_flip and 2 * n_up == L, lookup=lookup)
        bits = int(start)
        start = np.zeros((L, 2), np.complex128)
        start[np.arange(L), [(bits >> j) & 1 for j in range(L)]] = 1.0
    return split_product_state(start, conserve_magnetization=conserve_magnetization, translation=translation,
                               reflection=reflection, spin_flip=spin_flip, lookup=lookup)

