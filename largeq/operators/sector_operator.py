"""Operators on symmetry sectors, splitting of states into sectors, cross-sector observables.

* :class:`SymmetricOperator` -- a G-invariant Pauli sum (the Hamiltonian, a translation-invariant
  observable) on one :class:`~largeq.basis.sectors.SymmetricSector`, matrix-free, with the same
  ``fused_update`` / ``expectation`` / ``to_csr`` protocol as :class:`largeq.operators.PauliOperator`.
* :func:`split_basis_state` -- the components P_chi |b> of a z-basis product state in every sector
  it touches (weights |S_r| / |G| summing to one).
* :class:`CrossSectorDiagonal` -- <psi|A|psi> = sum_{s, s'} <psi_s|A|psi_s'> for diagonal (z-basis)
  observables A that need not commute with G (sigma^z_0, staggered magnetization), from per-orbit
  tables built once; a time step then costs one pass over the sector vectors.
* :func:`evolve_split` -- evolve every component with :func:`largeq.engines.propagate.evolve` and
  evaluate observables on the sum.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import LinearOperator

from largeq.basis import _sector_kernels as sk
from largeq.operators.pauli_operator import fused_arguments
from largeq.model import symmetry as msym
from largeq.model.pauli import PauliSum
from largeq.basis.sectors import GroupSpec, SymmetricSector, orbit_representatives, symmetric_sector
from largeq.operators.vectors import threads_for, vdot

__all__ = ["SymmetricOperator", "StoredSectorMatrix", "is_invariant", "split_basis_state", "SectorComponent", "CrossSectorDiagonal",
           "stabiliser_average", "expand_to_magnetization", "project_from_magnetization"]


# --------------------------------------------------------------------------- invariance
def is_invariant(ps: PauliSum, group: GroupSpec) -> dict[str, bool]:
    """Whether g A g^dagger = A for each generator of ``group`` (checked exactly on the Pauli sum by
    ``largeq.model.symmetry.commutes``, the same check that finds the symmetries of H)."""
    gens = {"translation": (1 % ps.n_sites, 0, 0), "reflection": (0, 1, 0), "spin_flip": (0, 0, 1)}
    on = {"translation": group.translation, "reflection": group.reflection, "spin_flip": group.spin_flip}
    return {name: msym.commutes(ps, g) for name, g in gens.items() if on[name]}


# --------------------------------------------------------------------------- operator
class SymmetricOperator(LinearOperator):
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
        return (L, full, np.int64(s.up_spins), t, r, f, tphase, sr, sf, *s.lookup_args(), self._diag, *self._groups)

    def table_bytes(self) -> int:
        return int(self._diag.nbytes + sum(a.nbytes for a in self._groups)) + self.sector.table_bytes()

    def _vec_dtype(self, x):
        return np.result_type(self.coeff_dtype, x.dtype)

    def fused_update(self, x, y, alpha=1.0, beta=0.0, gamma=0.0):
        """In place ``y <- alpha * (A x) + beta * x + gamma * y``; x and y distinct 1-d arrays."""
        n = self.shape[0]
        x, scal = fused_arguments(n, self.coeff_dtype, x, y, alpha, beta, gamma)
        if n == 0:
            return y
        with threads_for(n):
            sk.sym_fused(*self._args(), x, y, *scal)
        return y

    def _matvec(self, x):
        x = np.ascontiguousarray(np.asarray(x).reshape(-1))
        y = np.empty(self.shape[0], dtype=self._vec_dtype(x))
        return self.fused_update(x, y, 1.0, 0.0, 0.0)

    def _matmat(self, X):
        return np.column_stack([self._matvec(X[:, j]) for j in range(X.shape[1])])

    def _adjoint(self):
        if self.hermitian:
            return self
        raise NotImplementedError("adjoint of a non-Hermitian Pauli sum is not provided")

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
        """The same operator as a CSR matrix (duplicates summed)."""
        n = self.shape[0]
        if n > max_dim:
            raise MemoryError(f"to_csr: dimension {n:,} exceeds max_dim = {max_dim:,}")
        cap = n * (self._groups[0].size + 1)
        rows = np.empty(cap, np.int64); cols = np.empty(cap, np.int64); vals = np.empty(cap, self.coeff_dtype)
        e = sk.sym_coo(*self._args(), rows, cols, vals)
        m = sp.coo_matrix((vals[:e], (rows[:e], cols[:e])), shape=self.shape).tocsr()
        m.sum_duplicates()
        return m

    def stored(self) -> "StoredSectorMatrix":
        """The same operator with its matrix stored (CSR, int32 columns): faster products, nnz x 12-24 bytes."""
        return StoredSectorMatrix(self)

    def to_dense(self, max_dim: int = 20_000) -> np.ndarray:
        if self.shape[0] > max_dim:
            raise MemoryError(f"to_dense: dimension {self.shape[0]:,} exceeds max_dim = {max_dim:,}")
        return self.to_csr().toarray()


class StoredSectorMatrix(SymmetricOperator):
    """A :class:`SymmetricOperator` whose products use its stored CSR matrix (built once by the
    matrix-free kernel).  Trades memory (about (n_groups + 1) x dim x 12 bytes for real sectors)
    for speed: the orbit scans and lookups are done once instead of at every product."""

    def __init__(self, op: SymmetricOperator):
        self.__dict__.update(op.__dict__)
        m = op.to_csr(max_dim=1 << 31)
        idx = m.indices.astype(np.int32) if m.shape[0] < 2**31 - 1 else m.indices
        self._csr = (m.indptr.astype(np.int64), np.ascontiguousarray(idx), np.ascontiguousarray(m.data))

    def table_bytes(self) -> int:
        return super().table_bytes() + int(sum(a.nbytes for a in self._csr))

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
                sk.csr_fused(*self._csr, x, y, *scal)
        return y


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
