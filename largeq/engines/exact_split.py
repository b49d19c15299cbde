"""Exact quench analysis of a state split over symmetry sectors, with memory bounded by the sectors.

Same quantities as :func:`largeq.engines.exact.quench_sectors` (d_eff, <A>_inf, sigma_A^2 with degenerate
gaps, D_G), but never forms a (sum_s D_s)^2 array: the level matrix M_EE' = <psi_E|A|psi_E'> is computed
tile by tile (sector pair by sector pair, column chunks) and reduced on the fly:

* psi_E = P_E psi is one vector per level; inside sector s the columns Y_s = V_s diag(c_s), summed over
  eigenvectors of one level, give M restricted to sectors (s, r) as Y_s^dagger A_sr Y_r;
* a level with eigenvectors in several sectors (degenerate across sectors: grouped, as the eigenspace of
  the full H) gets its whole row of M accumulated separately (few such levels in practice);
* gaps are grouped in slabs of the gap axis (a compiled pass counts them, a second collects and sorts one
  slab at a time), so D_G and the degenerate-gap corrections need O(slab) memory, not O(levels^2).

sigma_A^2 = sum_{E != E'} |M_EE'|^2 + 2 sum_{gap clusters G > 0} (|sum_{E'-E=G} M_EE'|^2 - sum |M_EE'|^2)
(the second sum vanishes without degenerate gaps; Short & Farrelly, New J. Phys. 14, 013063 (2012)).
"""

from __future__ import annotations

from typing import Mapping, Sequence

import numpy as np
import scipy.sparse
from numba import njit

from largeq.engines.exact import OCCUPATION_FLOOR, ExactQuench, ObservableQuench, Spectrum, joint_levels

__all__ = ["quench_split", "gap_clusters", "split_memory_bytes"]

#: Gaps collected and sorted at once (values + two indices: about 16 bytes each).
SLAB_GAPS = 20_000_000


def split_memory_bytes(dims: Sequence[int], complex_valued: bool, chunk: int = 2048) -> int:
    """Peak memory forecast of diagonalizing every sector and running ``quench_split`` (bytes).

    Kept: every sector's eigenvectors (sum D_s^2); the largest diagonalization adds its input matrix
    (D^2); one tile chunk (2 x D x chunk) and the per-vector arrays are small.
    """
    item = 16 if complex_valued else 8
    dims = [int(d) for d in dims]
    if not dims:
        return 0
    dmax = max(dims)
    return int(item * (sum(d * d for d in dims) + dmax * dmax + 3 * dmax * min(chunk, dmax)) + 64 * sum(dims))


# ------------------------------------------------------------------------------------------------ gaps
@njit(cache=True)
def _gap_histogram(e, nb, gmax):
    h = np.zeros(nb + 1, np.int64)
    n = e.size
    for k in range(n):
        for l in range(k + 1, n):
            b = int((e[l] - e[k]) / gmax * nb)
            if b > nb:
                b = nb
            h[b] += 1
    return h


@njit(cache=True)
def _collect(e, lo, hi, cap):
    n = e.size
    g = np.empty(cap, np.float64)
    ks = np.empty(cap, np.int32)
    ls = np.empty(cap, np.int32)
    c = 0
    for k in range(n):
        a = np.searchsorted(e, e[k] + lo, side="left")
        b = np.searchsorted(e, e[k] + hi, side="left")
        if a < k + 1:
            a = k + 1
        for l in range(a, b):
            if c < cap:
                g[c] = e[l] - e[k]
                ks[c] = k
                ls[c] = l
            c += 1
    return g[:min(c, cap)], ks[:min(c, cap)], ls[:min(c, cap)], c


def gap_clusters(e: np.ndarray, tol: float, *, slab: int = SLAB_GAPS):
    """Clusters of equal positive gaps E_l - E_k (k < l, consecutive gaps within ``tol`` chained).

    Parameters
    ----------
    e : ndarray
        Sorted (ascending) level energies.
    tol : float
    slab : int
        Most gaps held at once.

    Returns
    -------
    d_g : int
        Largest cluster size (>= 1).
    n_degenerate : int
        Number of clusters with more than one pair.
    pairs : ndarray (m, 3) of int64
        (k, l, cluster id) for every pair in a cluster of size > 1.
    """
    e = np.ascontiguousarray(e, np.float64)
    n = e.size
    if n < 2:
        return 1, 0, np.zeros((0, 3), np.int64)
    gmax = float(e[-1] - e[0])
    total = n * (n - 1) // 2
    nb = int(min(max(64, 8 * total // max(slab, 1)), 1 << 22))
    hist = _gap_histogram(e, nb, gmax)
    margin = max(1000.0 * tol, 1e-300)
    # slabs of consecutive bins with at most `slab` gaps (a single bin may exceed it; it is one slab)
    edges = [0]
    acc = 0
    for b in range(nb + 1):
        if acc + hist[b] > slab and b > edges[-1]:
            edges.append(b)
            acc = 0
        acc += hist[b]
    edges.append(nb + 1)
    width = gmax / nb
    d_g, n_deg, cid = 1, 0, 0
    out = []
    for i in range(len(edges) - 1):
        ga = edges[i] * width
        gb = edges[i + 1] * width if edges[i + 1] <= nb else np.inf
        lo, hi = max(ga - margin, 0.0), (gb + margin if np.isfinite(gb) else gmax + 1.0 + margin)
        cap = int(hist[max(edges[i] - 1, 0): edges[i + 1] + 1].sum()) + 16
        while True:
            g, ks, ls, c = _collect(e, lo, hi, cap)
            if c <= cap:
                break
            cap = c
        if g.size == 0:
            continue
        order = np.argsort(g, kind="stable")
        gs = g[order]
        starts = np.flatnonzero(np.concatenate([[True], np.diff(gs) > tol]))
        sizes = np.diff(np.append(starts, gs.size))
        first = gs[starts]
        mine = (first >= ga) & (first < gb)
        sz = sizes[mine]
        if sz.size:
            d_g = max(d_g, int(sz.max()))
        big = np.flatnonzero(mine & (sizes > 1))
        n_deg += int(big.size)
        for s in big:
            idx = order[starts[s]: starts[s] + sizes[s]]
            out.append(np.column_stack([ks[idx].astype(np.int64), ls[idx].astype(np.int64),
                                        np.full(idx.size, cid, np.int64)]))
            cid += 1
    pairs = np.concatenate(out) if out else np.zeros((0, 3), np.int64)
    return d_g, n_deg, pairs


# ------------------------------------------------------------------------------------------------ main
def _block(blocks, s, r):
    """A_sr (or A_rs^dagger); None when both are missing or zero."""
    if (s, r) in blocks:
        b = blocks[(s, r)]
    elif (r, s) in blocks:
        b = blocks[(r, s)]
        b = b.conj().T
    else:
        return None
    if scipy.sparse.issparse(b):
        b = b.tocsr()
        if b.nnz == 0 or float(abs(b).max()) == 0.0:
            return None
    return b


def quench_split(
    sectors: Sequence[tuple[Spectrum, np.ndarray]],
    observables: Mapping[str, Mapping[tuple[int, int], object]] | None = None,
    *,
    degeneracy_tol: float = 1e-9,
    gap_tol: float | None = None,
    chunk: int = 2048,
    consume: bool = False,
    keep_level_matrices: bool = False,
) -> ExactQuench:
    """Exact quench analysis of psi = sum_s psi_s over sectors with H = direct sum H_s (see module docstring).

    Parameters
    ----------
    sectors : sequence of (Spectrum, ndarray)
        Each sector's spectrum and the state's component there; sum_s ||psi_s||^2 = 1 (to 1e-8).
    observables : mapping name -> mapping (s, s') -> matrix
        Hermitian observable as sector blocks A_{ss'} (ndarray or sparse); a missing (s', s) next to a
        given (s, s') is its conjugate transpose; missing pairs are zero.
    degeneracy_tol, gap_tol
        As in ``quench_sectors``.
    chunk : int
        Columns per tile chunk (memory 2 x D x chunk).
    consume : bool
        Overwrite the spectra's eigenvector arrays in place (saves one D^2 copy per sector).
    keep_level_matrices : bool
        Also keep the full level matrices (small sizes only; enables ``ExactQuench.curve``).

    Returns
    -------
    ExactQuench
        ``observables[name].a_min/a_max/norm`` are NaN (not computed).
    """
    if len(sectors) == 0:
        raise ValueError("sectors must hold at least one (Spectrum, psi) pair, got none")
    observables = dict(observables or {})
    lv = joint_levels(sectors, degeneracy_tol, gap_tol)
    dims, offsets, e_all, gap_tol = lv.dims, lv.offsets, lv.energies, lv.gap_tol
    n_sec = len(sectors)
    order, mult, level_e = lv.order, lv.mult, lv.level_e
    p_m, p_level, ipr, e_mean, e_var = lv.p_m, lv.p_level, lv.ipr, lv.e_mean, lv.e_var
    n_lev = level_e.size

    # level of each eigenvector (global index), occupied levels renumbered 0..n_occ-1
    lev_of = np.empty(e_all.size, np.int64)
    lev_of[order] = np.repeat(np.arange(n_lev), mult)
    occ = np.flatnonzero(p_level > OCCUPATION_FLOOR)
    occ_id = np.full(n_lev, -1, np.int64)
    occ_id[occ] = np.arange(occ.size)
    n_occ = occ.size
    sec_of = np.repeat(np.arange(n_sec), dims)
    lo_sec = np.full(n_lev, n_sec, np.int64)
    hi_sec = np.full(n_lev, -1, np.int64)
    np.minimum.at(lo_sec, lev_of, sec_of)
    np.maximum.at(hi_sec, lev_of, sec_of)
    multi_lev = occ[(lo_sec[occ] != hi_sec[occ])]
    is_multi = np.zeros(n_occ, bool)
    is_multi[occ_id[multi_lev]] = True
    multi_pos = np.full(n_occ, -1, np.int64)
    multi_pos[is_multi] = np.arange(int(is_multi.sum()))
    n_multi = int(is_multi.sum())

    # per-sector level columns Y_s = V_s diag(c_s) summed within a level, occupied levels only
    cols, col_lev = [], []
    for s, (spec, _) in enumerate(sectors):
        cs = lv.coeffs[offsets[s]:offsets[s + 1]]
        if np.iscomplexobj(spec.vectors) or np.max(np.abs(cs.imag), initial=0.0) > 0:
            v = spec.vectors.astype(np.complex128, copy=not consume)
            v *= cs[None, :]
        else:
            v = spec.vectors if consume else spec.vectors.copy()
            v *= cs.real[None, :]
        ids = occ_id[lev_of[offsets[s]:offsets[s + 1]]]
        keep = np.flatnonzero(ids >= 0)
        ids_k = ids[keep]
        uniq, first, inv = np.unique(ids_k, return_index=True, return_inverse=True)
        if uniq.size == keep.size == v.shape[1]:
            y = v  # every eigenvector its own occupied level: no copy
        elif uniq.size == keep.size:
            y = v[:, keep]
        else:  # several eigenvectors of one level in this sector: sum their columns
            y = np.zeros((v.shape[0], uniq.size), v.dtype)
            np.add.at(y.T, inv, v[:, keep].T)
        del v
        cols.append(y)
        col_lev.append(uniq)
    col_pos = []
    for s in range(n_sec):
        p = np.full(n_occ, -1, np.int64)
        p[col_lev[s]] = np.arange(col_lev[s].size)
        col_pos.append(p)
    home = np.full(n_occ, -1, np.int64)
    for s in range(n_sec):
        home[col_lev[s]] = s

    # gap clusters among occupied levels
    e_occ = level_e[occ]
    d_g, n_deg, pairs = gap_clusters(e_occ, float(gap_tol))

    results, level_mats = {}, {}
    for name, blocks in observables.items():
        if not isinstance(blocks, Mapping):
            raise ValueError(f"observables[{name!r}] must map (s, s') sector pairs to blocks")
        initial = 0.0 + 0j
        equil = 0.0
        sumsq = 0.0
        R = np.zeros((n_multi, n_occ), np.complex128) if n_multi else None
        pair_vals = np.zeros(pairs.shape[0], np.complex128)
        full_m = np.zeros((n_occ, n_occ), np.complex128) if keep_level_matrices else None
        pk, pl = (pairs[:, 0], pairs[:, 1]) if pairs.size else (np.zeros(0, np.int64), np.zeros(0, np.int64))
        single_pair = ~(is_multi[pk] | is_multi[pl]) if pairs.size else np.zeros(0, bool)
        for s in range(n_sec):
            for r in range(s, n_sec):
                b = _block(blocks, s, r)
                if b is None:
                    continue
                if b.shape != (dims[s], dims[r]):
                    raise ValueError(f"observable block {name!r}[({s}, {r})] must have shape ({dims[s]}, {dims[r]}), got {b.shape}")
                ys, yr = cols[s], cols[r]
                lv_s, lv_r = col_lev[s], col_lev[r]
                row_single = ~is_multi[lv_s]
                # degenerate-gap pairs read from this tile: (k in s, l in r) or (l in s, k in r) -> conj
                sel_d = np.flatnonzero(single_pair & (home[pk] == s) & (home[pl] == r)) if pairs.size else []
                sel_m = np.flatnonzero(single_pair & (home[pl] == s) & (home[pk] == r)) if (pairs.size and s != r) else []
                for j0 in range(0, yr.shape[1], chunk):
                    j1 = min(j0 + chunk, yr.shape[1])
                    z = b @ yr[:, j0:j1]
                    z = np.asarray(z)
                    # (n_s, j1 - j0): contributions to M[lv_s, lv_r[j0:j1]]; no conjugate copy of ys
                    t = ys.T @ z if not np.iscomplexobj(ys) else (z.conj().T @ ys).conj().T
                    del z
                    cl = lv_r[j0:j1]
                    col_single = ~is_multi[cl]
                    tot = t.sum()
                    initial += tot if s == r else 2.0 * tot.real
                    ts = t[np.ix_(row_single, col_single)] if not (row_single.all() and col_single.all()) else t
                    sq = float(np.vdot(ts, ts).real)
                    if s == r:
                        # diagonal entries: same level as row and column
                        rr = np.flatnonzero((lv_s >= cl[0]) & (lv_s <= cl[-1]))
                        cpos = col_pos[r][lv_s[rr]] - j0
                        ok = (cpos >= 0) & (cpos < j1 - j0) & row_single[rr]
                        dvals = t[rr[ok], cpos[ok]]
                        equil += float(np.sum(dvals.real))
                        sq -= float(np.sum(np.abs(dvals) ** 2))
                        sumsq += sq
                    else:
                        sumsq += 2.0 * sq
                    if n_multi:
                        mrows = np.flatnonzero(~row_single)
                        if mrows.size:
                            R[multi_pos[lv_s[mrows]][:, None], cl[None, :]] += t[mrows, :]
                        if s != r:
                            mcols = np.flatnonzero(~col_single)
                            if mcols.size:
                                R[multi_pos[cl[mcols]][:, None], lv_s[None, :]] += t[:, mcols].conj().T
                    if len(sel_d):
                        cpos = col_pos[r][pl[sel_d]] - j0
                        ok = (cpos >= 0) & (cpos < j1 - j0)
                        idx = sel_d[ok]
                        pair_vals[idx] = t[col_pos[s][pk[idx]], cpos[ok]]
                    if len(sel_m):
                        cpos = col_pos[r][pk[sel_m]] - j0
                        ok = (cpos >= 0) & (cpos < j1 - j0)
                        idx = sel_m[ok]
                        pair_vals[idx] = np.conj(t[col_pos[s][pl[idx]], cpos[ok]])
                    if full_m is not None:
                        full_m[np.ix_(lv_s, cl)] += t
                        if s != r:
                            full_m[np.ix_(cl, lv_s)] += t.conj().T
                    del t
        if n_multi:
            mi = np.flatnonzero(is_multi)
            diag = R[multi_pos[mi], mi]
            equil += float(np.sum(diag.real))
            rowsq = np.sum(np.abs(R) ** 2, axis=1)
            sumsq += float(np.sum(rowsq) - np.sum(np.abs(diag) ** 2))  # E multi, all E' != E
            sumsq += float(np.sum(np.abs(R[:, ~is_multi]) ** 2))       # E single, E' multi (Hermitian mirror)
            if pairs.size:
                mp = ~single_pair
                km, lm = pk[mp], pl[mp]
                vals = np.where(is_multi[km], R[np.maximum(multi_pos[km], 0), lm],
                                np.conj(R[np.maximum(multi_pos[lm], 0), km]))
                pair_vals[mp] = vals
        # pairs in tiles where A has no matrix elements keep M_kl = 0
        variance = sumsq
        if pairs.size:
            cidx = pairs[:, 2]
            ncl = int(cidx.max()) + 1
            csum = np.zeros(ncl, np.complex128)
            np.add.at(csum, cidx, pair_vals)
            csq = np.zeros(ncl)
            np.add.at(csq, cidx, np.abs(pair_vals) ** 2)
            variance += 2.0 * float(np.sum(np.abs(csum) ** 2 - csq))
        results[name] = ObservableQuench(
            name=name, initial=float(np.real(initial)), equilibrium=equil, variance=max(variance, 0.0),
            variance_nondegenerate=sumsq, a_min=float("nan"), a_max=float("nan"), norm=float("nan"))
        if full_m is not None:
            m = np.zeros((n_lev, n_lev), np.complex128)
            m[np.ix_(occ, occ)] = full_m
            level_mats[name] = m
    return ExactQuench(
        level_energies=level_e, level_weights=p_level, level_multiplicity=mult.astype(int), weights=p_m,
        ipr=ipr, d_eff=1.0 / ipr, energy_mean=e_mean, energy_variance=e_var, gap_degeneracy=max(int(d_g), 1),
        n_degenerate_gaps=int(n_deg), observables=results, degeneracy_tol=float(degeneracy_tol),
        gap_tol=float(gap_tol), _level_matrices=level_mats)
