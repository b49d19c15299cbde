"""Full (dense) diagonalization of one or a few symmetry sectors, and the exact quench analysis.

Everything here is exact up to floating-point rounding and meant for sectors of dimension up to a
few thousand (hard limit ``MAX_DENSE_DIM``).  It is the reference that the large-L estimators are
checked against.

Quench quantities (hbar = 1, energies in the Hamiltonian's units, time in inverse energy units):

* eigenspaces: levels closer than ``degeneracy_tol`` (chained) form one eigenspace E with projector P_E;
* weights p_E = ||P_E psi||^2, d_eff = 1 / sum_E p_E^2;
* with psi_E = P_E psi:  <A(t)> = sum_{E,E'} <psi_E|A|psi_E'> e^{i(E-E')t};
* diagonal ensemble <A>_inf = sum_E <psi_E|A|psi_E>;
* infinite-time variance sigma_A^2 = sum_{G != 0} |sum_{(E,E'): E-E'=G} <psi_E|A|psi_E'>|^2, the gaps G
  grouped to ``gap_tol`` (default near rounding level, see ``quench_sectors``); D_G = the largest number of occupied level pairs sharing one nonzero gap.

Several sectors (``quench_sectors``): a state split as psi = sum_s psi_s over sectors s with
H = direct sum of H_s.  Levels of all sectors are merged (equal energies in different sectors form one
eigenspace of the full H), and an observable is given as blocks A_{ss'} (sector s' basis -> sector s
basis).  Missing blocks are zero; a missing (s', s) block next to a given (s, s') block is taken as
the conjugate transpose (observables are Hermitian).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np
import scipy.linalg
import scipy.sparse
import scipy.sparse.linalg

from largeq.constants import MAX_DENSE_DIM

__all__ = [
    "MAX_DENSE_DIM",
    "Spectrum",
    "ObservableQuench",
    "ExactQuench",
    "dense_memory_bytes",
    "diagonalize",
    "quench_exact",
    "quench_sectors",
]

#: Default gap tolerance relative to max(1, max |E|): ~4500 machine epsilons, well above the rounding of exact
#: degenerate gaps (~1e-14 relative in the tests), small enough that accidental coincidences stay rare at D ~ 2000.
GAP_TOL_REL = 1e-12

#: Levels whose weight p_E is at or below this are ignored for gaps and D_G (they carry no amplitude).
OCCUPATION_FLOOR = 1e-14


def dense_memory_bytes(dim: int, complex_valued: bool = True) -> int:
    """Rough peak memory of a dense Hermitian diagonalization: about 3 D x D arrays (bytes)."""
    item = 16 if complex_valued else 8
    return int(3 * dim * dim * item)


@dataclass(frozen=True)
class Spectrum:
    """Eigen-decomposition H = V diag(E) V^dagger of one sector.

    Attributes
    ----------
    energies : ndarray, shape (D,)
        Eigenvalues in ascending order (energy units).
    vectors : ndarray, shape (D, D)
        Orthonormal eigenvectors as columns, in the sector's basis.
    """

    energies: np.ndarray
    vectors: np.ndarray

    @property
    def dim(self) -> int:
        """Sector dimension D."""
        return int(self.energies.shape[0])


def _materialize(matrix) -> np.ndarray:
    """Dense copy of a dense array, scipy sparse matrix or LinearOperator."""
    if isinstance(matrix, np.ndarray):
        return np.array(matrix)
    if scipy.sparse.issparse(matrix):
        return matrix.toarray()
    if isinstance(matrix, scipy.sparse.linalg.LinearOperator) or hasattr(matrix, "matmat"):
        n = matrix.shape[1]
        dtype = np.dtype(getattr(matrix, "dtype", np.complex128) or np.complex128)
        out = np.empty(matrix.shape, dtype=np.result_type(dtype, np.float64))
        block = 256
        for start in range(0, n, block):
            stop = min(n, start + block)
            eye = np.zeros((n, stop - start), dtype=out.dtype)
            eye[np.arange(start, stop), np.arange(stop - start)] = 1.0
            out[:, start:stop] = matrix.matmat(eye) if hasattr(matrix, "matmat") else matrix @ eye
        return out
    return np.array(matrix)


def _check_dim(dim: int, name: str, complex_valued: bool = True, limit: int | None = None) -> None:
    limit = MAX_DENSE_DIM if limit is None else int(limit)
    if dim > limit:
        gib = dense_memory_bytes(dim, complex_valued) / 2**30
        raise ValueError(
            f"{name} has dimension {dim}, above the dense limit {limit}; "
            f"full diagonalization would need about {gib:.1f} GiB and O(D^3) time. "
            "Use a smaller sector or the Chebyshev / KPM engines."
        )


def diagonalize(matrix, max_dim: int | None = None) -> Spectrum:
    """Dense eigen-decomposition of one Hermitian sector, H = V diag(E) V^dagger (energy units).

    Parameters
    ----------
    matrix : ndarray, scipy sparse matrix or LinearOperator, shape (D, D)
        Hermitian sector Hamiltonian; a LinearOperator is materialised column block by block.
        D must not exceed ``max_dim`` (default ``MAX_DENSE_DIM``).
    max_dim : int, optional
        Raise the dense limit (the caller has checked memory).

    Returns
    -------
    Spectrum
        Ascending energies and orthonormal eigenvectors (columns).

    Raises
    ------
    ValueError
        If the matrix is not square, too large, or not Hermitian (to 1e-10 relative).
    """
    shape = getattr(matrix, "shape", None)
    if shape is None or len(shape) != 2 or shape[0] != shape[1]:
        raise ValueError(f"matrix must be square 2-d, got shape {shape}")
    dtype = np.dtype(getattr(matrix, "dtype", np.complex128) or np.complex128)
    _check_dim(int(shape[0]), "matrix", np.iscomplexobj(np.empty(0, dtype)), max_dim)
    h = _materialize(matrix)
    if not np.all(np.isfinite(h)):
        raise ValueError("matrix contains NaN or infinite entries")
    scale = max(float(np.max(np.abs(h))) if h.size else 0.0, 1e-300)
    asym = float(np.max(np.abs(h - h.conj().T))) if h.size else 0.0
    if asym > 1e-10 * scale:
        raise ValueError(
            f"matrix is not Hermitian: max |H - H^dagger| = {asym:.3e} (max |H| = {scale:.3e}); "
            "allowed relative asymmetry is 1e-10"
        )
    if np.iscomplexobj(h) and float(np.max(np.abs(h.imag))) == 0.0:
        h = h.real
    h = 0.5 * (h + h.conj().T)
    energies, vectors = scipy.linalg.eigh(h, overwrite_a=True, check_finite=False)
    return Spectrum(energies=energies, vectors=vectors)


@dataclass(frozen=True)
class ObservableQuench:
    """Exact infinite-time statistics of one observable A (units of A).

    Attributes
    ----------
    name : str
    initial : float
        <psi|A|psi>.
    equilibrium : float
        Diagonal-ensemble value <A>_inf = sum_E <psi_E|A|psi_E>.
    variance : float
        Exact infinite-time variance sigma_A^2 = sum_{G != 0} |sum_{E-E'=G} <psi_E|A|psi_E'>|^2.
    variance_nondegenerate : float
        The non-degenerate-gap formula sum_{E != E'} |<psi_E|A|psi_E'>|^2 (equals ``variance`` when no
        two occupied level pairs share a gap; shown for comparison).
    a_min, a_max : float
        Smallest and largest eigenvalue of A restricted to the sector(s) (NaN if not computed).
    norm : float
        Operator norm ||A|| = max(|a_min|, |a_max|) on the sector(s) (NaN if not computed).
    """

    name: str
    initial: float
    equilibrium: float
    variance: float
    variance_nondegenerate: float
    a_min: float
    a_max: float
    norm: float


@dataclass(frozen=True)
class ExactQuench:
    """Exact quench analysis from full diagonalization (hbar = 1).

    Attributes
    ----------
    level_energies : ndarray, shape (n_levels,)
        Distinct energies (mean of each degeneracy cluster), ascending.
    level_weights : ndarray
        p_E = ||P_E psi||^2 (dimensionless, sums to 1).
    level_multiplicity : ndarray of int
        Number of eigenvectors in each eigenspace (summed over sectors).
    weights : ndarray
        Per-eigenvector weights p_m = |c_m|^2 in merged ascending-energy order.
    ipr : float
        sum_E p_E^2 (= infinite-time average of the survival probability).
    d_eff : float
        1 / ipr.
    energy_mean, energy_variance : float
        <H> and <H^2> - <H>^2 (energy units, energy units squared).
    gap_degeneracy : int
        D_G: largest number of occupied level pairs (E, E') sharing one nonzero gap E - E' (>= 1).
    n_degenerate_gaps : int
        Number of distinct positive gaps shared by more than one occupied pair.
    observables : dict[str, ObservableQuench]
    degeneracy_tol, gap_tol : float
        Tolerances used for grouping levels and gaps (energy units).
    """

    level_energies: np.ndarray
    level_weights: np.ndarray
    level_multiplicity: np.ndarray
    weights: np.ndarray
    ipr: float
    d_eff: float
    energy_mean: float
    energy_variance: float
    gap_degeneracy: int
    n_degenerate_gaps: int
    observables: dict
    degeneracy_tol: float
    gap_tol: float
    _level_matrices: dict = field(repr=False, compare=False, default_factory=dict)

    def curve(self, times, name: str | None = None):
        """Exact <A(t)> = sum_{E,E'} <psi_E|A|psi_E'> e^{i(E-E')t} on a time grid (units of A).

        Parameters
        ----------
        times : array_like
            Times (inverse energy units).
        name : str, optional
            One observable; by default all of them.

        Returns
        -------
        ndarray or dict[str, ndarray]
        """
        t = np.asarray(times, dtype=float).reshape(-1)
        names = list(self._level_matrices) if name is None else [name]
        for n in names:
            if n not in self._level_matrices:
                raise ValueError(f"name must be one of {sorted(self._level_matrices)}, got {n!r}")
        out = {n: np.empty(t.shape[0]) for n in names}
        e = self.level_energies
        chunk = max(1, int(2_000_000 // max(1, e.shape[0])))
        for s in range(0, t.shape[0], chunk):
            ph = np.exp(-1j * np.outer(t[s : s + chunk], e))  # (T, n) : e^{-iEt}
            for n in names:
                m = self._level_matrices[n]
                out[n][s : s + chunk] = np.real(np.sum((ph.conj() @ m) * ph, axis=1))
        return out[names[0]] if name is not None else out

    def survival(self, times) -> np.ndarray:
        """Survival probability |<psi|e^{-iHt}|psi>|^2 = |sum_E p_E e^{-iEt}|^2 (dimensionless)."""
        t = np.asarray(times, dtype=float).reshape(-1)
        out = np.empty(t.shape[0])
        chunk = max(1, int(2_000_000 // max(1, self.level_energies.shape[0])))
        for s in range(0, t.shape[0], chunk):
            amp = np.exp(-1j * np.outer(t[s : s + chunk], self.level_energies)) @ self.level_weights
            out[s : s + chunk] = np.abs(amp) ** 2
        return out

    def max_gaps_in_window(self, eps: float) -> int:
        """N(eps): largest number of occupied level pairs with gaps in one interval of width eps.

        Short & Farrelly, New J. Phys. 14, 013063 (2012) use N(eps) in the finite-time bound;
        pairs (E, E') with E != E' (both signs of the gap), levels with p_E > OCCUPATION_FLOOR.
        """
        if not (eps > 0):
            raise ValueError(f"eps must be > 0 (energy units), got {eps}")
        e = self.level_energies[self.level_weights > OCCUPATION_FLOOR]
        k, l = np.triu_indices(e.shape[0], 1)
        pos = e[l] - e[k]
        g = np.sort(np.concatenate([-pos, pos]))
        if g.size == 0:
            return 0
        # a window [x, x + eps] placed at a gap: count gaps within it; symmetric for negative gaps
        hi = np.searchsorted(g, g + eps, side="right")
        return int(np.max(hi - np.arange(g.size)))


def _as_matrix(a, rows: int, cols: int, name: str):
    shape = getattr(a, "shape", None)
    if shape is None or tuple(shape) != (rows, cols):
        raise ValueError(f"observable block {name} must have shape ({rows}, {cols}), got {shape}")
    return a


def _group_levels(energies: np.ndarray, tol: float) -> np.ndarray:
    """Start indices of clusters of sorted energies, consecutive values within tol chained."""
    if energies.size == 0:
        return np.zeros(0, dtype=int)
    new = np.concatenate([[True], np.diff(energies) > tol])
    return np.flatnonzero(new)


@dataclass(frozen=True)
class JointLevels:
    """The eigenstates of several sectors joined: the state's coefficients, energies sorted, levels grouped
    (equal within ``degeneracy_tol`` across sectors) with their weights p_E, IPR = sum_E p_E^2, mean and
    variance of the energy, and the gap tolerance in force."""

    dims: list
    offsets: list
    coeffs: np.ndarray
    energies: np.ndarray
    order: np.ndarray
    e_sorted: np.ndarray
    starts: np.ndarray
    mult: np.ndarray
    level_e: np.ndarray
    p_m: np.ndarray
    p_level: np.ndarray
    ipr: float
    e_mean: float
    e_var: float
    gap_tol: float


def joint_levels(sectors, degeneracy_tol: float, gap_tol: float | None) -> JointLevels:
    """Join (Spectrum, psi) pairs of several sectors into one level list (see :class:`JointLevels`);
    the state must be normalised over all sectors together."""
    dims, offsets, coeffs, energies = [], [0], [], []
    for s, (spec, psi) in enumerate(sectors):
        if not isinstance(spec, Spectrum):
            raise ValueError(f"sectors[{s}][0] must be a Spectrum, got {type(spec).__name__}")
        psi = np.asarray(psi).reshape(-1)
        if psi.shape[0] != spec.dim:
            raise ValueError(f"sectors[{s}]: psi has length {psi.shape[0]}, the spectrum has dimension {spec.dim}")
        dims.append(spec.dim)
        offsets.append(offsets[-1] + spec.dim)
        coeffs.append(spec.vectors.conj().T @ psi)
        energies.append(spec.energies)
    c = np.concatenate(coeffs)
    e_all = np.concatenate(energies).astype(float)
    norm2 = float(np.sum(np.abs(c) ** 2))
    if abs(norm2 - 1.0) > 1e-8:
        raise ValueError(f"the state must be normalised over all sectors: sum ||psi_s||^2 = {norm2:.12g}, expected 1")
    if gap_tol is None:
        gap_tol = GAP_TOL_REL * max(1.0, float(np.max(np.abs(e_all))) if e_all.size else 1.0)
    order = np.argsort(e_all, kind="stable")
    e_sorted = e_all[order]
    starts = _group_levels(e_sorted, float(degeneracy_tol))
    mult = np.diff(np.append(starts, e_sorted.size))
    level_e = np.add.reduceat(e_sorted, starts) / mult
    p_m = np.abs(c[order]) ** 2
    p_level = np.add.reduceat(p_m, starts)
    e_mean = float(np.sum(p_m * e_sorted))
    return JointLevels(dims, offsets, c, e_all, order, e_sorted, starts, mult, level_e, p_m, p_level,
                       float(np.sum(p_level**2)), e_mean, float(max(np.sum(p_m * (e_sorted - e_mean) ** 2), 0.0)),
                       float(gap_tol))


def quench_sectors(
    sectors: Sequence[tuple[Spectrum, np.ndarray]],
    observables: Mapping[str, Mapping[tuple[int, int], object]] | None = None,
    *,
    degeneracy_tol: float = 1e-9,
    gap_tol: float | None = None,
    observable_extremes: bool = True,
) -> ExactQuench:
    """Exact quench analysis of a state split over sectors, psi = sum_s psi_s, H = direct sum H_s.

    sum_E p_E^2 with p_E = ||P_E psi||^2 over the merged levels of all sectors; <A>_inf, sigma_A^2 as in
    the module docstring, with A given as sector blocks A_{ss'}.

    Parameters
    ----------
    sectors : sequence of (Spectrum, ndarray)
        Each sector's spectrum and the state's component psi_s in that sector's basis. The total norm
        sum_s ||psi_s||^2 must be 1 (to 1e-8).
    observables : mapping name -> mapping (s, s') -> matrix, optional
        Hermitian observable as blocks of shape (D_s, D_s') (ndarray, sparse matrix or LinearOperator).
        Missing blocks are zero; a missing (s', s) next to a given (s, s') is the conjugate transpose.
    degeneracy_tol : float
        Levels closer than this (energy units, chained) form one eigenspace.
    gap_tol : float, optional
        Gaps closer than this count as equal (energy units); default GAP_TOL_REL * max(1, max |E|). It is kept
        near rounding level on purpose: among the ~D^2/2 gaps of a chaotic sector, about
        (D^2/2)^2 * gap_tol / (gap range) pairs coincide by accident (birthday effect; measured for the mixed-field
        Ising reflection-even sector, D = 2080: 32 shared gaps at gap_tol = 1e-10, 4 at the default 2e-11), which would report D_G = 2 for gaps no finite time can resolve. sigma_A^2 is
        insensitive to this choice; D_G is not.
    observable_extremes : bool
        Compute the extreme eigenvalues of each observable on the sector(s) (an extra O(D^3)).

    Returns
    -------
    ExactQuench
    """
    if not isinstance(degeneracy_tol, (int, float)) or not (degeneracy_tol >= 0):
        raise ValueError(f"degeneracy_tol must be a number >= 0 (energy units), got {degeneracy_tol!r}")
    if gap_tol is not None and not (isinstance(gap_tol, (int, float)) and gap_tol >= 0):
        raise ValueError(f"gap_tol must be >= 0 (energy units), got {gap_tol!r}")
    if len(sectors) == 0:
        raise ValueError("sectors must hold at least one (Spectrum, psi) pair, got none")
    observables = dict(observables or {})

    lv = joint_levels(sectors, degeneracy_tol, gap_tol)
    dims, offsets, c = lv.dims, lv.offsets, lv.coeffs.astype(np.complex128)
    total = offsets[-1]
    gap_tol = lv.gap_tol
    order, starts, mult, level_e = lv.order, lv.starts, lv.mult, lv.level_e
    p_m, p_level, ipr, e_mean, e_var = lv.p_m, lv.p_level, lv.ipr, lv.e_mean, lv.e_var

    # gap clusters among occupied levels, positive gaps only (negative ones are their mirror images)
    occ = np.flatnonzero(p_level > OCCUPATION_FLOOR)
    k_idx, l_idx = np.triu_indices(occ.size, 1)  # k < l in level order -> gap E_l - E_k > 0
    gaps = level_e[occ[l_idx]] - level_e[occ[k_idx]]
    gorder = np.argsort(gaps, kind="stable")
    gstarts = _group_levels(gaps[gorder], gap_tol)
    gsizes = np.diff(np.append(gstarts, gaps.size))
    d_g = int(gsizes.max()) if gsizes.size else 1
    n_deg_gaps = int(np.sum(gsizes > 1))

    results, level_mats = {}, {}
    for name, blocks in observables.items():
        if not isinstance(blocks, Mapping):
            raise ValueError(
                f"observables[{name!r}] must map (s, s') sector pairs to blocks, got {type(blocks).__name__}; "
                "use quench_exact for a single sector"
            )
        full = np.zeros((total, total), dtype=np.complex128)  # V^dagger A V, block by block
        given = set()
        for key, blk in blocks.items():
            if not (isinstance(key, tuple) and len(key) == 2 and all(0 <= int(i) < len(sectors) for i in key)):
                raise ValueError(f"observables[{name!r}] key must be a pair of sector indices < {len(sectors)}, got {key!r}")
            s, r = int(key[0]), int(key[1])
            _as_matrix(blk, dims[s], dims[r], f"{name!r}[{key}]")
            vs, vr = sectors[s][0].vectors, sectors[r][0].vectors
            av = blk @ vr if not isinstance(blk, np.ndarray) else blk @ vr
            full[offsets[s] : offsets[s + 1], offsets[r] : offsets[r + 1]] = vs.conj().T @ np.asarray(av)
            given.add((s, r))
        for s, r in list(given):
            if (r, s) not in given:
                full[offsets[r] : offsets[r + 1], offsets[s] : offsets[s + 1]] = (
                    full[offsets[s] : offsets[s + 1], offsets[r] : offsets[r + 1]].conj().T
                )
        scale = max(float(np.max(np.abs(full))) if full.size else 0.0, 1e-300)
        asym = float(np.max(np.abs(full - full.conj().T))) if full.size else 0.0
        if asym > 1e-8 * scale:
            raise ValueError(f"observable {name!r} is not Hermitian: max |A - A^dagger| = {asym:.3e} in the eigenbasis")
        if observable_extremes:
            ev = scipy.linalg.eigvalsh(0.5 * (full + full.conj().T), check_finite=False)
            a_min, a_max = float(ev[0]), float(ev[-1])
            a_norm = max(abs(a_min), abs(a_max))
        else:
            a_min = a_max = a_norm = float("nan")
        identity_order = bool(np.all(order == np.arange(total)))
        b = full if identity_order else full[np.ix_(order, order)]
        del full
        w = c[order].conj()[:, None] * b * c[order][None, :]  # c_m^* B_mn c_n
        del b
        m_lev = np.add.reduceat(np.add.reduceat(w, starts, axis=0), starts, axis=1)
        diag = np.real(np.diag(m_lev))
        off = m_lev[np.ix_(occ, occ)][k_idx, l_idx]  # <psi_E|A|psi_E'> with E < E'
        sums = np.add.reduceat(off[gorder], gstarts) if off.size else np.zeros(0)
        variance = float(2.0 * np.sum(np.abs(sums) ** 2))
        var_nd = float(np.sum(np.abs(m_lev) ** 2) - np.sum(np.abs(np.diag(m_lev)) ** 2))
        results[name] = ObservableQuench(
            name=name,
            initial=float(np.real(np.sum(m_lev))),
            equilibrium=float(np.sum(diag)),
            variance=variance,
            variance_nondegenerate=var_nd,
            a_min=a_min,
            a_max=a_max,
            norm=a_norm,
        )
        level_mats[name] = m_lev

    return ExactQuench(
        level_energies=level_e,
        level_weights=p_level,
        level_multiplicity=mult.astype(int),
        weights=p_m,
        ipr=ipr,
        d_eff=1.0 / ipr,
        energy_mean=e_mean,
        energy_variance=e_var,
        gap_degeneracy=max(d_g, 1),
        n_degenerate_gaps=n_deg_gaps,
        observables=results,
        degeneracy_tol=float(degeneracy_tol),
        gap_tol=gap_tol,
        _level_matrices=level_mats,
    )


def quench_exact(
    spectrum: Spectrum,
    psi: np.ndarray,
    observables: Mapping[str, object] | None = None,
    *,
    degeneracy_tol: float = 1e-9,
    gap_tol: float | None = None,
    observable_extremes: bool = True,
) -> ExactQuench:
    """Exact quench analysis in one sector: p_E, d_eff = 1/sum p_E^2, <A>_inf, sigma_A^2, D_G.

    Parameters
    ----------
    spectrum : Spectrum
        From ``diagonalize``.
    psi : ndarray, shape (D,)
        Normalised initial state in the sector's basis.
    observables : mapping name -> matrix (D, D), optional
        Hermitian observables (ndarray, sparse matrix or LinearOperator).
    degeneracy_tol, gap_tol, observable_extremes
        See ``quench_sectors``.

    Returns
    -------
    ExactQuench
    """
    blocks = {name: {(0, 0): a} for name, a in (observables or {}).items()}
    return quench_sectors(
        [(spectrum, psi)],
        blocks,
        degeneracy_tol=degeneracy_tol,
        gap_tol=gap_tol,
        observable_extremes=observable_extremes,
    )
