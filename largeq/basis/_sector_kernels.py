"""Compiled (numba) kernels for symmetry-adapted bases (momentum, reflection, spin flip).

Group elements are written g = T^j F^f R^p (apply R first, then F, then T^j) with

* T: translation, bit i -> bit i + 1 (mod L) (a cyclic left rotation of the L-bit word);
* R: reflection, bit i -> bit L - 1 - i;
* F: spin flip, b -> b XOR (2^L - 1).

``n_up`` = -1 marks a sector of the full space (no magnetization test on the strings).

A sector is a one-dimensional character chi(T^j F^f R^p) = e^{i k j} sF^f sR^p, passed to the
kernels as a phase table ``tphase[j] = e^{i k j}`` and the two parities ``sr``, ``sf``.

Representatives are the smallest integers of their orbits.  The smallest rotation of an L-bit
word puts a longest cyclic run of zeros at the top bits, so only rotations that align such a
run are compared (the run starts are found with ``m &= rotr(m, 1)`` iterations, one per unit of
run length): about 5-10 candidate tests instead of L for half filling.

Lookup of a representative's position (``mode``):

* 0 -- binary search in the sorted list of representatives;
* 1 -- a start table over the high half of the bits (``blk[h]`` = first representative with
  ``rep >> n_lo == h``) followed by a binary search inside that block;
* 2 -- a table indexed by the magnetization-sector rank (``largeq.basis`` two-level index),
  one int32 per magnetization-sector state: O(1), but 4 bytes x C(L, n_up) of memory.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from largeq.basis._bits import popcount, zsign

_CHUNKS = 256

__all__ = [
    "reverse_bits", "rotl", "min_rotation", "min_rotation_naive", "find_rep", "count_reps", "fill_reps",
    "stabilisers", "lookup", "diag_values", "sym_fused", "sym_expect", "sym_csr_counts", "sym_csr_fill", "csr_coded_fused", "project_states",
    "expand_states", "cross_tables", "cross_eval", "cross_pair_expect", "product_amplitudes",
]


@njit(inline="always", cache=True)
def reverse_bits(b, L):
    """Reverse the lowest L bits of b (L <= 62)."""
    v = b
    v = ((v >> 1) & 0x5555555555555555) | ((v & 0x5555555555555555) << 1)
    v = ((v >> 2) & 0x3333333333333333) | ((v & 0x3333333333333333) << 2)
    v = ((v >> 4) & 0x0F0F0F0F0F0F0F0F) | ((v & 0x0F0F0F0F0F0F0F0F) << 4)
    v = ((v >> 8) & 0x00FF00FF00FF00FF) | ((v & 0x00FF00FF00FF00FF) << 8)
    v = ((v >> 16) & 0x0000FFFF0000FFFF) | ((v & 0x0000FFFF0000FFFF) << 16)
    v = ((v >> 32) & 0xFFFFFFFF) | (v << 32)
    return (v >> (64 - L)) & ((np.int64(1) << L) - 1)


@njit(inline="always", cache=True)
def rotl(b, j, L, full):
    """T^j b: bit i -> bit i + j (mod L), 0 <= j < L."""
    return ((b << j) | (b >> (L - j))) & full


@njit(cache=True)
def min_rotation_naive(s, L, full):
    best = s
    bj = 0
    for j in range(1, L):
        v = rotl(s, j, L, full)
        if v < best:
            best = v
            bj = j
    return best, bj


@njit(inline="always", cache=True)
def min_rotation(s, L, full):
    """(min_j T^j s, j) using the longest cyclic zero run (see module docstring)."""
    if s == 0 or s == full:
        return s, 0
    m = (~s) & full  # bit p set: a zero run of length >= run starts at p
    run = 1
    while True:
        nm = m & (((m >> 1) | (m << (L - 1))) & full)
        if nm == 0:
            break
        m = nm
        run += 1
    best = np.int64(-1)
    bj = 0
    while m != 0:
        low = m & (-m)
        p = popcount(low - 1)
        m ^= low
        j = (2 * L - run - p) % L
        v = rotl(s, j, L, full)
        if best < 0 or v < best:
            best = v
            bj = j
    return best, bj


@njit(inline="always", cache=True)
def find_rep(b, L, full, use_t, use_r, use_f):
    """Representative r of b and the element g' = T^j F^f R^p with g' b = r: (r, j, f, p)."""
    best = np.int64(-1)
    bj = 0
    bf = 0
    bp = 0
    for p in range(2 if use_r else 1):
        s1 = reverse_bits(b, L) if p == 1 else b
        for f in range(2 if use_f else 1):
            s = ((~s1) & full) if f == 1 else s1
            if use_t:
                v, j = min_rotation(s, L, full)
            else:
                v = s
                j = 0
            if best < 0 or v < best:
                best = v
                bj = j
                bf = f
                bp = p
    return best, bj, bf, bp


@njit(inline="always", cache=True)
def _bisect(reps, lo, hi, r):
    while lo < hi:
        mid = (lo + hi) >> 1
        v = reps[mid]
        if v < r:
            lo = mid + 1
        elif v > r:
            hi = mid
        else:
            return mid
    return -1


@njit(inline="always", cache=True)
def lookup(r, mode, reps, blk, n_lo, rank_tab, boff, lo_rank):
    """Position of representative r in ``reps`` or -1 (see module docstring for ``mode``)."""
    if mode == 0:
        return _bisect(reps, 0, reps.shape[0], r)
    if mode == 1:
        h = r >> n_lo
        return _bisect(reps, blk[h], blk[h + 1], r)
    lo = r & ((np.int64(1) << n_lo) - 1)
    return np.int64(rank_tab[boff[r >> n_lo] + lo_rank[lo]])


# --------------------------------------------------------------------------- enumeration
@njit(parallel=True, cache=True)
def count_reps(L, full, use_t, use_r, use_f, n_lo, boff, lo_up, lo_start, lo_list, counts):
    """counts[hi] <- number of representatives in magnetization block hi."""
    for hi in prange(boff.shape[0]):
        c = 0
        if boff[hi] >= 0:
            n = lo_up[hi]
            for q in range(lo_start[n], lo_start[n + 1]):
                s = (np.int64(hi) << n_lo) | lo_list[q]
                r, j, f, p = find_rep(s, L, full, use_t, use_r, use_f)
                if r == s:
                    c += 1
        counts[hi] = c


@njit(parallel=True, cache=True)
def fill_reps(L, full, use_t, use_r, use_f, n_lo, boff, lo_up, lo_start, lo_list, starts, out):
    """out[starts[hi]:...] <- the representatives of block hi, ascending."""
    for hi in prange(boff.shape[0]):
        if boff[hi] < 0:
            continue
        c = starts[hi]
        n = lo_up[hi]
        for q in range(lo_start[n], lo_start[n + 1]):
            s = (np.int64(hi) << n_lo) | lo_list[q]
            r, j, f, p = find_rep(s, L, full, use_t, use_r, use_f)
            if r == s:
                out[c] = s
                c += 1


@njit(parallel=True, cache=True)
def stabilisers(reps, L, full, use_t, use_r, use_f, tphase, sr, sf, stab, ok):
    """stab[i] <- |S_r| (elements g with g r = r); ok[i] <- chi(g) == 1 on all of S_r."""
    n_t = L if use_t else 1
    for i in prange(reps.shape[0]):
        r = reps[i]
        cnt = 0
        good = True
        for p in range(2 if use_r else 1):
            s1 = reverse_bits(r, L) if p == 1 else r
            for f in range(2 if use_f else 1):
                s = ((~s1) & full) if f == 1 else s1
                for j in range(n_t):
                    if rotl(s, j, L, full) == r:
                        cnt += 1
                        ch = tphase[j] * (sr if p == 1 else 1.0) * (sf if f == 1 else 1.0)
                        if abs(ch - 1.0) > 1e-9:
                            good = False
        stab[i] = cnt
        ok[i] = good


# --------------------------------------------------------------------------- operator
@njit(parallel=True, cache=True)
def diag_values(reps, dz, dc, out):
    """out[i] <- sum_q dc[q] (-1)^{popcount(dz[q] & ~r_i)} (the diagonal strings on representative i)."""
    for i in prange(reps.shape[0]):
        r = reps[i]
        acc = dc[0] * 0
        for q in range(dz.shape[0]):
            acc += dc[q] * zsign(dz[q], r)
        out[i] = acc


@njit(inline="always", cache=True)
def _entry(r, g, L, full, n_up, use_t, use_r, use_f, tphase, sr, sf, reps, mode, blk, n_lo, rank_tab, boff, lo_rank,
           gx, gptr, gz, gc):
    """The entry of flip group g in the row of representative r: (column, <r|A|b> chi(g')) with b = r ^ x_mask
    and g' b its representative; column -1 when b leaves the sector or the strings cancel.  The caller
    multiplies by the norm ratio sqrt(|S_r(b)| / |S_r|)."""
    zero = gc[0] * tphase[0] * 0
    b = r ^ gx[g]
    if n_up >= 0 and popcount(b) != n_up:
        return -1, zero
    c = gc[0] * 0
    for q in range(gptr[g], gptr[g + 1]):
        c += gc[q] * zsign(gz[q], b)
    if c == 0:
        return -1, zero
    rb, j, f, p = find_rep(b, L, full, use_t, use_r, use_f)
    idx = lookup(rb, mode, reps, blk, n_lo, rank_tab, boff, lo_rank)
    if idx < 0:
        return -1, zero
    ch = tphase[j]
    if p == 1:
        ch = ch * sr
    if f == 1:
        ch = ch * sf
    return idx, c * ch


@njit(inline="always", cache=True)
def _row(i, L, full, n_up, use_t, use_r, use_f, tphase, sr, sf, reps, nrm, mode, blk, n_lo, rank_tab, boff, lo_rank,
         diag, gx, gptr, gz, gc, x):
    """(A x)_i = sum_b <r_i|A|b> chi(g') sqrt(|S_r(b)| / |S_r_i|) x[idx(r(b))], b = r_i ^ x_mask."""
    r = reps[i]
    acc = diag[i] * x[i]
    inv = 1.0 / nrm[i]
    for g in range(gx.shape[0]):
        idx, v = _entry(r, g, L, full, n_up, use_t, use_r, use_f, tphase, sr, sf, reps, mode, blk, n_lo, rank_tab,
                        boff, lo_rank, gx, gptr, gz, gc)
        if idx >= 0:
            acc += v * (nrm[idx] * inv) * x[idx]
    return acc


@njit(parallel=True, cache=True)
def sym_fused(L, full, n_up, use_t, use_r, use_f, tphase, sr, sf, reps, nrm, mode, blk, n_lo, rank_tab, boff, lo_rank,
              diag, gx, gptr, gz, gc, x, y, alpha, beta, gamma):
    """y <- alpha (A x) + beta x + gamma y (gather form: each output entry written once)."""
    for i in prange(reps.shape[0]):
        acc = _row(i, L, full, n_up, use_t, use_r, use_f, tphase, sr, sf, reps, nrm, mode, blk, n_lo, rank_tab, boff,
                   lo_rank, diag, gx, gptr, gz, gc, x)
        if gamma == 0:
            y[i] = alpha * acc + beta * x[i]
        else:
            y[i] = alpha * acc + beta * x[i] + gamma * y[i]


@njit(parallel=True, cache=True)
def sym_expect(L, full, n_up, use_t, use_r, use_f, tphase, sr, sf, reps, nrm, mode, blk, n_lo, rank_tab, boff, lo_rank,
               diag, gx, gptr, gz, gc, x, partial):
    """partial[c] <- sum over chunk c of conj(x_i) (A x)_i (fixed chunks: thread-count independent)."""
    n = reps.shape[0]
    nc = partial.shape[0]
    for c in prange(nc):
        s = 0j
        for i in range(c * n // nc, (c + 1) * n // nc):
            acc = _row(i, L, full, n_up, use_t, use_r, use_f, tphase, sr, sf, reps, nrm, mode, blk, n_lo, rank_tab,
                       boff, lo_rank, diag, gx, gptr, gz, gc, x)
            s += np.conj(x[i]) * acc
        partial[c] = s


@njit(inline="always", cache=True)
def _row_unique(i, L, full, n_up, use_t, use_r, use_f, tphase, sr, sf, reps, nrm, mode, blk, n_lo, rank_tab, boff,
                lo_rank, diag, gx, gptr, gz, gc, cols, vals):
    """Row i of the sector operator into ``cols``/``vals`` (length >= n_groups + 1): sorted by column,
    duplicates summed, exact zeros dropped (the diagonal is kept).  Returns the number of entries."""
    r = reps[i]
    cols[0] = i
    vals[0] = diag[i]
    m = 1
    inv = 1.0 / nrm[i]
    for g in range(gx.shape[0]):
        idx, v0 = _entry(r, g, L, full, n_up, use_t, use_r, use_f, tphase, sr, sf, reps, mode, blk, n_lo, rank_tab,
                         boff, lo_rank, gx, gptr, gz, gc)
        if idx < 0:
            continue
        v = v0 * (nrm[idx] * inv)
        # insertion into the sorted row (rows hold at most n_groups + 1 entries)
        k = m
        while k > 0 and cols[k - 1] > idx:
            k -= 1
        if k > 0 and cols[k - 1] == idx:
            vals[k - 1] += v
            continue
        for q in range(m, k, -1):
            cols[q] = cols[q - 1]
            vals[q] = vals[q - 1]
        cols[k] = idx
        vals[k] = v
        m += 1
    # drop entries that cancelled exactly (keep the diagonal so every row has one entry)
    w = 0
    for q in range(m):
        if vals[q] != 0 or cols[q] == i:
            cols[w] = cols[q]
            vals[w] = vals[q]
            w += 1
    return w


@njit(inline="always", cache=True)
def _lower_bound(tab, nt, v):
    """First position in the sorted ``tab[:nt]`` whose value is not below v."""
    lo = 0
    hi = nt
    while lo < hi:
        mid = (lo + hi) >> 1
        if tab[mid] < v:
            lo = mid + 1
        else:
            hi = mid
    return lo


@njit(inline="always", cache=True)
def _collect_value(tab, nt, v):
    """Insert v into the sorted ``tab[:nt]`` unless present; returns the new count, or -1 when ``tab`` is full."""
    lo = _lower_bound(tab, nt, v)
    if lo < nt and tab[lo] == v:
        return nt
    if nt == tab.shape[0]:
        return -1
    for q in range(nt, lo, -1):
        tab[q] = tab[q - 1]
    tab[lo] = v
    return nt + 1


@njit(parallel=True, cache=True)
def sym_csr_counts(L, full, n_up, use_t, use_r, use_f, tphase, sr, sf, reps, nrm, mode, blk, n_lo, rank_tab, boff,
                   lo_rank, diag, gx, gptr, gz, gc, bcols, bvals, counts, tabs, ntabs):
    """counts[i] <- entries of row i (first pass of the CSR assembly); ``bcols``/``bvals`` are per-chunk
    scratch rows of shape (n_chunks, n_groups + 1).  With ``tabs`` of shape (n_chunks, K) (real entries only)
    each chunk also gathers its distinct values, sorted, into ``tabs[c, :ntabs[c]]`` (ntabs[c] = -1: more
    than K); pass ``tabs`` with K = 0 to skip."""
    n = reps.shape[0]
    nc = bcols.shape[0]
    collect = tabs.shape[1] > 0
    for c in prange(nc):
        nt = 0
        for i in range(c * n // nc, (c + 1) * n // nc):
            m = _row_unique(i, L, full, n_up, use_t, use_r, use_f, tphase, sr, sf, reps, nrm, mode, blk,
                            n_lo, rank_tab, boff, lo_rank, diag, gx, gptr, gz, gc, bcols[c], bvals[c])
            counts[i] = m
            if collect and nt >= 0:
                for q in range(m):
                    nt = _collect_value(tabs[c], nt, bvals[c, q].real)
                    if nt < 0:
                        break
        if collect:
            ntabs[c] = nt


@njit(parallel=True, cache=True)
def sym_csr_fill(L, full, n_up, use_t, use_r, use_f, tphase, sr, sf, reps, nrm, mode, blk, n_lo, rank_tab, boff,
                 lo_rank, diag, gx, gptr, gz, gc, bcols, bvals, indptr, indices, data, table, codes):
    """Second pass: the rows into a CSR matrix whose ``indptr`` came from :func:`sym_csr_counts`.  With an
    empty ``table`` the values go to ``data``; otherwise each value is stored as its position in the sorted
    ``table`` (``codes``, uint8 or uint16) and ``data`` is not touched."""
    n = reps.shape[0]
    nc = bcols.shape[0]
    nt = table.shape[0]
    for c in prange(nc):
        for i in range(c * n // nc, (c + 1) * n // nc):
            m = _row_unique(i, L, full, n_up, use_t, use_r, use_f, tphase, sr, sf, reps, nrm, mode, blk, n_lo,
                            rank_tab, boff, lo_rank, diag, gx, gptr, gz, gc, bcols[c], bvals[c])
            e0 = indptr[i]
            for q in range(m):
                indices[e0 + q] = bcols[c, q]
                if nt == 0:
                    data[e0 + q] = bvals[c, q]
                else:
                    codes[e0 + q] = _lower_bound(table, nt, bvals[c, q].real)


# --------------------------------------------------------------------------- states
@njit(cache=True)
def project_states(L, full, use_t, use_r, use_f, g_size, tphase, sr, sf, reps, nrm, mode, blk, n_lo, rank_tab, boff,
                   lo_rank, states, amps, out):
    """out <- P_chi applied to sum_s amps[s] |states[s]>, in sector coordinates.

    <r~|s> = conj(chi(g')) sqrt(|S_r| / |G|) with g' s = r.
    """
    for q in range(states.shape[0]):
        r, j, f, p = find_rep(states[q], L, full, use_t, use_r, use_f)
        idx = lookup(r, mode, reps, blk, n_lo, rank_tab, boff, lo_rank)
        if idx < 0:
            continue
        ch = tphase[j]
        if p == 1:
            ch = ch * sr
        if f == 1:
            ch = ch * sf
        out[idx] += np.conj(ch) * (nrm[idx] / np.sqrt(g_size)) * amps[q]


@njit(parallel=True, cache=True)
def expand_states(L, full, use_t, use_r, use_f, g_size, tphase, sr, sf, reps, nrm, mode, blk, n_lo, rank_tab, boff,
                  lo_rank, states, v, out):
    """out[q] <- <states[q]|v> for a sector vector v: chi(g') sqrt(|S_r| / |G|) v[idx(r)], g' s = r."""
    for q in prange(states.shape[0]):
        r, j, f, p = find_rep(states[q], L, full, use_t, use_r, use_f)
        idx = lookup(r, mode, reps, blk, n_lo, rank_tab, boff, lo_rank)
        if idx < 0:
            out[q] = 0
            continue
        ch = tphase[j]
        if p == 1:
            ch = ch * sr
        if f == 1:
            ch = ch * sf
        out[q] = ch * (nrm[idx] / np.sqrt(g_size)) * v[idx]


# --------------------------------------------------------------------------- cross-sector diagonal observables
@njit(parallel=True, cache=True)
def cross_tables(ureps, L, full, use_t, use_r, use_f, g_size, tph, srs, sfs, oz, oc, optr, table):
    """table[u, o, q] = (1/|G|) sum_g A_o(g r_u) conj(chi_a(g)) chi_b(g), q running over pairs a <= b.

    With the sector amplitudes a_s = v_s[idx_s(r_u)] this gives
    <psi|A_o|psi> = sum_u sum_{a<=b} w_ab Re/complex(conj(a_a) a_b table[u, o, q]) (see ``cross_eval``),
    because the amplitude of g r on the magnetization sector is sum_s conj(chi_s(g)) sqrt(|S_r|/|G|) a_s
    and each orbit state is visited |S_r| times.
    """
    n_sec = tph.shape[0]
    n_obs = optr.shape[0] - 1
    n_t = L if use_t else 1
    for u in prange(ureps.shape[0]):
        r = ureps[u]
        loc = np.zeros((n_obs, table.shape[2]), np.complex128)
        chis_l = np.empty(n_sec, np.complex128)
        for p in range(2 if use_r else 1):
            s1 = reverse_bits(r, L) if p == 1 else r
            for f in range(2 if use_f else 1):
                s2 = ((~s1) & full) if f == 1 else s1
                for j in range(n_t):
                    s = rotl(s2, j, L, full)
                    for a in range(n_sec):
                        ch = tph[a, j]
                        if p == 1:
                            ch = ch * srs[a]
                        if f == 1:
                            ch = ch * sfs[a]
                        chis_l[a] = ch
                    for o in range(n_obs):
                        val = 0.0
                        for q in range(optr[o], optr[o + 1]):
                            val += oc[q] * zsign(oz[q], s)
                        if val == 0.0:
                            continue
                        qq = 0
                        for a in range(n_sec):
                            for b2 in range(a, n_sec):
                                loc[o, qq] += val * chis_l[a] * np.conj(chis_l[b2])
                                qq += 1
        for o in range(n_obs):
            for qq in range(table.shape[2]):
                table[u, o, qq] = loc[o, qq] / g_size


@njit(parallel=True, cache=True)
def cross_eval(uidx, table, vecs, partial):
    """partial[c, o] <- chunk c of sum_u sum_a |a_a|^2 T_aa + 2 Re sum_{a<b} conj(a_a) a_b T_ab."""
    n_u = uidx.shape[0]
    n_sec = uidx.shape[1]
    n_obs = table.shape[1]
    nc = partial.shape[0]
    for c in prange(nc):
        amp = np.zeros(n_sec, np.complex128)
        acc = np.zeros(n_obs)
        for u in range(c * n_u // nc, (c + 1) * n_u // nc):
            for a in range(n_sec):
                k = uidx[u, a]
                amp[a] = vecs[a][k] if k >= 0 else 0j
            for o in range(n_obs):
                qq = 0
                for a in range(n_sec):
                    for b in range(a, n_sec):
                        t = np.conj(amp[a]) * amp[b] * table[u, o, qq]
                        if a == b:
                            acc[o] += t.real
                        else:
                            acc[o] += 2.0 * t.real
                        qq += 1
        for o in range(n_obs):
            partial[c, o] = acc[o]


@njit(parallel=True, cache=True)
def csr_fused(indptr, indices, data, x, y, alpha, beta, gamma):
    """y <- alpha (M x) + beta x + gamma y for a stored CSR matrix M (row-parallel)."""
    for i in prange(indptr.shape[0] - 1):
        acc = data[0] * x[0] * 0
        for e in range(indptr[i], indptr[i + 1]):
            acc += data[e] * x[indices[e]]
        if gamma == 0:
            y[i] = alpha * acc + beta * x[i]
        else:
            y[i] = alpha * acc + beta * x[i] + gamma * y[i]


@njit(parallel=True, cache=True)
def csr_coded_fused(indptr, indices, codes, table, x, y, alpha, beta, gamma):
    """y <- alpha (M x) + beta x + gamma y for a CSR matrix whose values are ``table[codes]`` (a few hundred
    distinct real values: 2 bytes an entry instead of 8, so less memory traffic per product)."""
    for i in prange(indptr.shape[0] - 1):
        acc = table[0] * x[0] * 0
        for e in range(indptr[i], indptr[i + 1]):
            acc += table[codes[e]] * x[indices[e]]
        if gamma == 0:
            y[i] = alpha * acc + beta * x[i]
        else:
            y[i] = alpha * acc + beta * x[i] + gamma * y[i]


# --------------------------------------------------------------------------- general observables across sectors
@njit(parallel=True, cache=True)
def cross_pair_expect(L, full, use_t, use_r, use_f, reps_a, nrm_a, x_a, n_up_b, tphase_b, sr_b, sf_b, reps_b, nrm_b,
                      mode, blk_b, n_lo_b, rank_tab_b, boff_b, lo_rank_b, x_b, gx, gptr, gz, gc, partial):
    """partial[c] <- chunk c of sum_i conj(x_a[i]) (B x_b)_i for a Pauli sum B mapping sector b into sector a.

    Row i of sector a: (B x_b)_i = <r_i|B|psi_b> / sqrt(|S_r_i| / |G|) (valid when P_a B = B P_b), and
    <s|psi_b> = chi_b(g') sqrt(|S_r| / |G|) x_b[idx_b(r)] with g' s = r, so the row is the gather of
    ``_row`` with the row taken from sector a and the column looked up in sector b.  All x masks,
    the diagonal (x = 0) included, go through the same loop.  Complex128 arguments throughout.
    """
    n = reps_a.shape[0]
    nc = partial.shape[0]
    for c in prange(nc):
        s = 0j
        for i in range(c * n // nc, (c + 1) * n // nc):
            xa = x_a[i]
            if xa == 0:
                continue
            r = reps_a[i]
            acc = 0j
            for g in range(gx.shape[0]):
                idx, v = _entry(r, g, L, full, n_up_b, use_t, use_r, use_f, tphase_b, sr_b, sf_b, reps_b, mode,
                                blk_b, n_lo_b, rank_tab_b, boff_b, lo_rank_b, gx, gptr, gz, gc)
                if idx >= 0:
                    acc += v * nrm_b[idx] * x_b[idx]
            s += np.conj(xa) * acc / nrm_a[i]
        partial[c] = s


@njit(parallel=True, cache=True)
def product_amplitudes(reps, nrm, L, full, use_t, use_r, use_f, g_size, tphase, sr, sf, n_lo, amp_lo, amp_hi, out):
    """out[i] <- <r~_i|psi> for a product state psi(s) = amp_hi[s >> n_lo] amp_lo[s & (2^n_lo - 1)].

    <r~|psi> = <r|P_chi|psi> / sqrt(|S_r| / |G|) = (1 / sqrt(|G| |S_r|)) sum_g chi(g) psi(g r)
    (sum over g = T^j F^f R^p; conj(chi(g^-1)) = chi(g) for a one-dimensional unitary character).
    """
    n_t = L if use_t else 1
    mask = (np.int64(1) << n_lo) - 1
    scale = 1.0 / np.sqrt(g_size)
    for i in prange(reps.shape[0]):
        r = reps[i]
        acc = 0j
        for p in range(2 if use_r else 1):
            s1 = reverse_bits(r, L) if p == 1 else r
            for f in range(2 if use_f else 1):
                s2 = ((~s1) & full) if f == 1 else s1
                for j in range(n_t):
                    s = rotl(s2, j, L, full) if j > 0 else s2
                    ch = tphase[j]
                    if p == 1:
                        ch = ch * sr
                    if f == 1:
                        ch = ch * sf
                    acc += ch * amp_hi[s >> n_lo] * amp_lo[s & mask]
        out[i] = acc * scale / nrm[i]


@njit(cache=True)
def cross_pair_coo(L, full, use_t, use_r, use_f, reps_a, nrm_a, n_up_b, tphase_b, sr_b, sf_b, reps_b, nrm_b, mode,
                   blk_b, n_lo_b, rank_tab_b, boff_b, lo_rank_b, gx, gptr, gz, gc, rows, cols, vals):
    """Entries (i, idx, value) of the block of B from sector b into sector a (same gather as
    ``cross_pair_expect``); returns how many were written."""
    e = 0
    for i in range(reps_a.shape[0]):
        r = reps_a[i]
        for g in range(gx.shape[0]):
            idx, v = _entry(r, g, L, full, n_up_b, use_t, use_r, use_f, tphase_b, sr_b, sf_b, reps_b, mode, blk_b,
                            n_lo_b, rank_tab_b, boff_b, lo_rank_b, gx, gptr, gz, gc)
            if idx < 0:
                continue
            rows[e] = i
            cols[e] = idx
            vals[e] = v * nrm_b[idx] / nrm_a[i]
            e += 1
    return e
