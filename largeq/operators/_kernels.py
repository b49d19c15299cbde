"""Compiled (numba) kernels for Pauli-sum operators on two-level bases.

The work is split by where a term acts (see ``largeq.basis`` for the block layout):

* diagonal terms on low sites -> a table over the low part; on high sites -> a table over
  the high part;
* off-diagonal groups on low sites only -> a small sparse matrix over the low part, applied
  inside each block (the block of the input vector stays in cache);
* off-diagonal groups on high sites only -> whole contiguous blocks are combined
  (``y[block(hi)] += c * x[block(hi ^ x_mask)]``, a streaming axpy);
* the few terms that straddle the cut (diagonal or not) -> their value depends on a handful
  of sign bits on each side: the low side's pattern and the source rank are tabulated per
  low state, the high side's pattern once per block, and the value is read from a small
  table indexed by the two patterns.

All per-low-state tables are indexed by the *position* of the low part in ``lo_list``, so
the loop over a block reads every table sequentially.  Every output block is written by
exactly one iteration of the outer loop, so it runs in parallel without atomics.

Real operators use ``tiled_kernels`` (end of this file): the same tables applied to real
columns (a complex vector as two, several vectors at once), the low-site terms on transposed
tiles of blocks.
"""

from __future__ import annotations

import numpy as np
import numba
from numba import njit, prange

from largeq.basis._bits import popcount, zsign

_CHUNKS = 256  # work units of the parallel loop (each holds its own small scratch arrays)

__all__ = ["fused_kernel", "tiled_kernels", "TILE_WIDTH", "expect_kernel", "csr_count_kernel", "csr_fill_kernel", "popcount", "zsign"]


@njit(inline="always", cache=True)
def _pattern(zmasks, q0, q1, state):
    """Bit q set when string q (z mask zmasks[q0 + q]) gives sign -1 on ``state``."""
    p = 0
    for q in range(q0, q1):
        p |= (popcount(zmasks[q] & ~state) & 1) << (q - q0)
    return p


@njit(inline="always", cache=True)
def _block_setup(hi, sector, offset, lo_up, cd_zhi, cd_ptr, cd_vptr, g_xh, g_zhi, g_ptr, g_vptr, cd_base, g_so, g_d, g_base):
    n_cd = cd_ptr.shape[0] - 1
    for c in range(n_cd):
        q0 = cd_ptr[c]
        q1 = cd_ptr[c + 1]
        cd_base[c] = cd_vptr[c] + (_pattern(cd_zhi, q0, q1, hi) << (q1 - q0))
    n_g = g_xh.shape[0]
    for g in range(n_g):
        shi = hi ^ g_xh[g]
        so = offset[shi]
        g_so[g] = so
        if so < 0:
            continue
        g_d[g] = lo_up[shi] - lo_up[hi]
        q0 = g_ptr[g]
        q1 = g_ptr[g + 1]
        g_base[g] = g_vptr[g] + (_pattern(g_zhi, q0, q1, shi) << (q1 - q0))


@njit(parallel=True, cache=True)
def fused_kernel(sector, n_lo, offset, lo_up, lo_start,
                 diag_lo, diag_hi, cd_zhi, cd_ptr, cd_vptr, cd_pat, cd_val,
                 lo_ptr, lo_col, lo_val,
                 hi_ptr, hi_src, hi_val,
                 g_xh, g_zhi, g_ptr, g_vptr, seg_ptr, seg_k, seg_rank, seg_pat, g_val,
                 x, y, alpha, beta, gamma):
    """y <- alpha * (A x) + beta * x + gamma * y  (x and y distinct, same basis)."""
    n_hi_states = offset.shape[0]
    n_cd = cd_ptr.shape[0] - 1
    n_g = g_xh.shape[0]
    n_classes = lo_start.shape[0] - 1
    nd = 2 * n_lo + 1
    n_chunks = min(n_hi_states, _CHUNKS)
    for ch in prange(n_chunks):
        cd_base = np.empty(n_cd, np.int64)
        g_so = np.empty(n_g, np.int64)
        g_d = np.empty(n_g, np.int64)
        g_base = np.empty(n_g, np.int64)
        for hi in range(ch * n_hi_states // n_chunks, (ch + 1) * n_hi_states // n_chunks):
            off = offset[hi]
            if off < 0:
                continue
            _block_setup(hi, sector, offset, lo_up, cd_zhi, cd_ptr, cd_vptr, g_xh, g_zhi, g_ptr, g_vptr,
                         cd_base, g_so, g_d, g_base)
            n = lo_up[hi]
            s0 = lo_start[n]
            size = lo_start[n + 1] - s0
            dh = diag_hi[hi]
            for k in range(size):
                pos = s0 + k
                d = dh + diag_lo[pos]
                for c in range(n_cd):
                    d += cd_val[cd_base[c] + cd_pat[c, pos]]
                acc = d * x[off + k]
                for e in range(lo_ptr[pos], lo_ptr[pos + 1]):
                    acc += lo_val[e] * x[off + lo_col[e]]
                if gamma == 0:
                    y[off + k] = beta * x[off + k] + alpha * acc
                else:
                    y[off + k] = gamma * y[off + k] + beta * x[off + k] + alpha * acc
            for g in range(n_g):
                so = g_so[g]
                if so < 0:
                    continue
                q = (g * n_classes + n) * nd + g_d[g] + n_lo
                if q < (g * n_classes + n) * nd or q >= (g * n_classes + n + 1) * nd:
                    continue
                gb = g_base[g]
                for e in range(seg_ptr[q], seg_ptr[q + 1]):
                    y[off + seg_k[e]] += alpha * g_val[gb + seg_pat[e]] * x[so + seg_rank[e]]
            for e in range(hi_ptr[hi], hi_ptr[hi + 1]):
                so = offset[hi_src[e]]
                c = alpha * hi_val[e]
                for k in range(size):
                    y[off + k] += c * x[so + k]


@njit(parallel=True, cache=True)
def expect_kernel(sector, n_lo, offset, lo_up, lo_start,
                  diag_lo, diag_hi, cd_zhi, cd_ptr, cd_vptr, cd_pat, cd_val,
                  lo_ptr, lo_col, lo_val,
                  hi_ptr, hi_src, hi_val,
                  g_xh, g_zhi, g_ptr, g_vptr, seg_ptr, seg_k, seg_rank, seg_pat, g_val,
                  x, partial):
    """partial[hi] <- sum over block hi of conj(x_b) (A x)_b; the caller sums ``partial``."""
    n_hi_states = offset.shape[0]
    n_cd = cd_ptr.shape[0] - 1
    n_g = g_xh.shape[0]
    n_classes = lo_start.shape[0] - 1
    nd = 2 * n_lo + 1
    n_chunks = min(n_hi_states, _CHUNKS)
    for ch in prange(n_chunks):
        cd_base = np.empty(n_cd, np.int64)
        g_so = np.empty(n_g, np.int64)
        g_d = np.empty(n_g, np.int64)
        g_base = np.empty(n_g, np.int64)
        for hi in range(ch * n_hi_states // n_chunks, (ch + 1) * n_hi_states // n_chunks):
            off = offset[hi]
            if off < 0:
                continue
            _block_setup(hi, sector, offset, lo_up, cd_zhi, cd_ptr, cd_vptr, g_xh, g_zhi, g_ptr, g_vptr,
                         cd_base, g_so, g_d, g_base)
            n = lo_up[hi]
            s0 = lo_start[n]
            size = lo_start[n + 1] - s0
            dh = diag_hi[hi]
            tot = 0j
            for k in range(size):
                pos = s0 + k
                d = dh + diag_lo[pos]
                for c in range(n_cd):
                    d += cd_val[cd_base[c] + cd_pat[c, pos]]
                acc = d * x[off + k]
                for e in range(lo_ptr[pos], lo_ptr[pos + 1]):
                    acc += lo_val[e] * x[off + lo_col[e]]
                tot += np.conj(x[off + k]) * acc
            for g in range(n_g):
                so = g_so[g]
                if so < 0:
                    continue
                q = (g * n_classes + n) * nd + g_d[g] + n_lo
                if q < (g * n_classes + n) * nd or q >= (g * n_classes + n + 1) * nd:
                    continue
                gb = g_base[g]
                for e in range(seg_ptr[q], seg_ptr[q + 1]):
                    tot += np.conj(x[off + seg_k[e]]) * g_val[gb + seg_pat[e]] * x[so + seg_rank[e]]
            for e in range(hi_ptr[hi], hi_ptr[hi + 1]):
                so = offset[hi_src[e]]
                s = 0j
                for k in range(size):
                    s += np.conj(x[off + k]) * x[so + k]
                tot += hi_val[e] * s
            partial[hi] = tot


@njit(inline="always", cache=True)
def _element(b, up_spins, sector, n_lo, offset, lo_rank, gx, gptr, gz, gc, g):
    """Column and value of the group-g matrix element in row b; column -1 when it vanishes."""
    src = b ^ gx[g]
    if sector and popcount(src) != up_spins:
        return -1, gc[0] * 0
    so = offset[src >> n_lo]
    if so < 0:
        return -1, gc[0] * 0
    q0 = gptr[g]
    c = gc[q0] * zsign(gz[q0], src)
    for q in range(q0 + 1, gptr[g + 1]):
        c += gc[q] * zsign(gz[q], src)
    if c == 0:
        return -1, c
    return so + lo_rank[src & ((1 << n_lo) - 1)], c


@njit(parallel=True, cache=True)
def csr_count_kernel(n_lo, sector, up_spins, offset, lo_rank, states, gx, gptr, gz, gc, counts):
    """Non-zeros per row of a Pauli sum grouped by x_mask (generic per-state gather).

    This is the plain reference path (one rank lookup per state and group) used to assemble
    CSR matrices; it shares no tables with the fast kernels above.
    """
    for i in prange(states.shape[0]):
        n = 0
        for g in range(gx.shape[0]):
            col, _ = _element(states[i], up_spins, sector, n_lo, offset, lo_rank, gx, gptr, gz, gc, g)
            if col >= 0:
                n += 1
        counts[i] = n


@njit(parallel=True, cache=True)
def csr_fill_kernel(n_lo, sector, up_spins, offset, lo_rank, states, gx, gptr, gz, gc, indptr, indices, data):
    for i in prange(states.shape[0]):
        k = indptr[i]
        for g in range(gx.shape[0]):
            col, c = _element(states[i], up_spins, sector, n_lo, offset, lo_rank, gx, gptr, gz, gc, g)
            if col >= 0:
                indices[k] = col
                data[k] = c
                k += 1


# ---------------------------------------------------------------------------------------------
# Real operators on real columns: tiles of blocks, several vectors per pass
# ---------------------------------------------------------------------------------------------
#
# For a real operator the product acts on real numbers only: a complex vector is two real
# columns (its float64 view, shape (dim, 2)), a set of R real vectors is R columns.  The
# vectors are passed flat, row-major: entry (i, j) of column j is ``xf[i * m + j]``.
#
# Blocks of the same low class share the low-site matrix.  A *tile* is up to T = TILE_WIDTH // m
# blocks of one class; it is copied, transposed, into a scratch array ``Xt[k, w]`` (k = rank
# inside the class, w = t * m + j for block t of the tile and column j), so that every non-zero
# of the low-site matrix, once its index and value are loaded, updates TILE_WIDTH contiguous
# numbers instead of one.  The diagonal part is applied in the same sweep.  A second parallel
# pass then adds the high-site and straddling terms block by block in the order of the vector
# (the input blocks they read follow each other in memory), with the index work shared by the
# m columns.

TILE_WIDTH = 16  # lanes of a tile row; _low_row is written out for 16

# Indexing note: numba wraps negative indices around, which turns ``x[base + i]`` with an
# unknown ``base`` into a select per element and stops vectorization.  Inside the hot loops
# every array is a view indexed by loop counters only (``xs = x[so:so + size]``; ``xs[i]``),
# and rows picked by a table entry are a separate leading index (``Xt[col, w]``), so the
# wrap test is done once per row and the loops over i and w are plain strided loads.


@njit(inline="always", cache=True, fastmath={"contract"})
def _low_row(yr, Xt, lo_ptr, lo_col, lo_val, pos, alpha):
    """yr += alpha * sum_e lo_val[e] * Xt[lo_col[e]] over row pos (16 lanes, TILE_WIDTH).

    The 16 running sums are written out as scalars so that they stay in registers: with the
    sums in ``yr`` itself, every non-zero would wait for the previous one's store.
    """
    a0 = yr[0]
    a1 = yr[1]
    a2 = yr[2]
    a3 = yr[3]
    a4 = yr[4]
    a5 = yr[5]
    a6 = yr[6]
    a7 = yr[7]
    a8 = yr[8]
    a9 = yr[9]
    a10 = yr[10]
    a11 = yr[11]
    a12 = yr[12]
    a13 = yr[13]
    a14 = yr[14]
    a15 = yr[15]
    for e in range(lo_ptr[pos], lo_ptr[pos + 1]):
        v = alpha * lo_val[e]
        xc = Xt[lo_col[e]]
        a0 += v * xc[0]
        a1 += v * xc[1]
        a2 += v * xc[2]
        a3 += v * xc[3]
        a4 += v * xc[4]
        a5 += v * xc[5]
        a6 += v * xc[6]
        a7 += v * xc[7]
        a8 += v * xc[8]
        a9 += v * xc[9]
        a10 += v * xc[10]
        a11 += v * xc[11]
        a12 += v * xc[12]
        a13 += v * xc[13]
        a14 += v * xc[14]
        a15 += v * xc[15]
    yr[0] = a0
    yr[1] = a1
    yr[2] = a2
    yr[3] = a3
    yr[4] = a4
    yr[5] = a5
    yr[6] = a6
    yr[7] = a7
    yr[8] = a8
    yr[9] = a9
    yr[10] = a10
    yr[11] = a11
    yr[12] = a12
    yr[13] = a13
    yr[14] = a14
    yr[15] = a15


def _make_tiled_kernel(m):
    @njit(parallel=True, cache=True, fastmath={"contract"})
    def tiled_kernel(n_lo, offset, lo_up, lo_start,
                     diag_lo, diag_hi, cd_zhi, cd_ptr, cd_vptr, cd_pat, cd_val,
                     lo_ptr, lo_col, lo_val,
                     hi_ptr, hi_src, hi_val,
                     g_xh, g_zhi, g_ptr, g_vptr, seg_ptr, seg_k, seg_rank, seg_pat, g_val,
                     tiles, scratch, x, y, xf, yf, alpha, beta, gamma):
        """y <- alpha * (A x) + beta * x + gamma * y on m real columns (x, y: (dim, m), real A;
        xf, yf: the same memory as flat arrays).

        ``tiles[i]``: the high parts of tile i's blocks (all of one low class; -1 pads),
        ``tiles.shape[1] * m == TILE_WIDTH``; ``scratch``: (threads, 2, max class size, TILE_WIDTH).
        """
        W = TILE_WIDTH
        T = W // m
        n_cd = cd_ptr.shape[0] - 1
        n_g = g_xh.shape[0]
        n_classes = lo_start.shape[0] - 1
        nd = 2 * n_lo + 1
        n_tiles = tiles.shape[0]
        # pass 1: diagonal and low-site terms, tile by tile
        for ti in prange(n_tiles):
            tid = numba.get_thread_id()
            Xt = scratch[tid, 0]
            Yt = scratch[tid, 1]
            cd_base = np.empty((T, max(n_cd, 1)), np.int64)
            dh = np.zeros(T)
            n = lo_up[tiles[ti, 0]]
            s0 = lo_start[n]
            size = lo_start[n + 1] - s0
            # gather the tile, transposed (row k of the tile takes entry k of every block)
            offs = np.empty(T, np.int64)
            for t in range(T):
                hi = tiles[ti, t]
                if hi < 0:
                    offs[t] = -1
                    for c in range(n_cd):
                        cd_base[t, c] = cd_vptr[c]
                    continue
                offs[t] = offset[hi] * m
                dh[t] = diag_hi[hi]
                for c in range(n_cd):
                    q0 = cd_ptr[c]
                    q1 = cd_ptr[c + 1]
                    cd_base[t, c] = cd_vptr[c] + (_pattern(cd_zhi, q0, q1, hi) << (q1 - q0))
            for k in range(size):
                xr = Xt[k]
                for t in range(T):
                    o = offs[t]
                    if o < 0:
                        for j in range(m):
                            xr[t * m + j] = 0.0
                    else:
                        xs = xf[o + k * m:o + k * m + m]
                        for j in range(m):
                            xr[t * m + j] = xs[j]
            for k in range(size):
                pos = s0 + k
                dl = diag_lo[pos]
                yr = Yt[k]
                xr = Xt[k]
                for t in range(T):
                    d = dh[t] + dl
                    for c in range(n_cd):
                        d += cd_val[cd_base[t, c] + cd_pat[c, pos]]
                    f = beta + alpha * d
                    for j in range(m):
                        yr[t * m + j] = f * xr[t * m + j]
                _low_row(yr, Xt, lo_ptr, lo_col, lo_val, pos, alpha)
            # scatter
            for k in range(size):
                yr = Yt[k]
                for t in range(T):
                    o = offs[t]
                    if o < 0:
                        continue
                    ys = yf[o + k * m:o + k * m + m]
                    if gamma == 0:
                        for j in range(m):
                            ys[j] = yr[t * m + j]
                    else:
                        for j in range(m):
                            ys[j] = gamma * ys[j] + yr[t * m + j]
        # pass 2: the high-site and straddling terms, block by block in the order of the vector
        # (the input blocks they read follow each other in memory: hardware prefetch keeps up)
        n_hi_states = offset.shape[0]
        n_chunks = min(n_hi_states, 256)
        for ch in prange(n_chunks):
            cdb = np.empty(max(n_cd, 1), np.int64)
            g_so = np.empty(n_g, np.int64)
            g_d = np.empty(n_g, np.int64)
            g_base = np.empty(n_g, np.int64)
            for hi in range(ch * n_hi_states // n_chunks, (ch + 1) * n_hi_states // n_chunks):
                off = offset[hi]
                if off < 0:
                    continue
                n = lo_up[hi]
                size = lo_start[n + 1] - lo_start[n]
                ys = y[off:off + size]
                yflat = yf[off * m:(off + size) * m]
                for e in range(hi_ptr[hi], hi_ptr[hi + 1]):
                    so = offset[hi_src[e]]
                    xflat = xf[so * m:(so + size) * m]
                    c = alpha * hi_val[e]
                    for i in range(size * m):
                        yflat[i] += c * xflat[i]
                if n_g == 0:
                    continue
                _block_setup(hi, True, offset, lo_up, cd_zhi, cd_ptr, cd_vptr, g_xh, g_zhi, g_ptr, g_vptr,
                             cdb, g_so, g_d, g_base)
                for g in range(n_g):
                    so = g_so[g]
                    if so < 0:
                        continue
                    q = (g * n_classes + n) * nd + g_d[g] + n_lo
                    if q < (g * n_classes + n) * nd or q >= (g * n_classes + n + 1) * nd:
                        continue
                    gb = g_base[g]
                    xs = xf[so * m:]
                    for e in range(seg_ptr[q], seg_ptr[q + 1]):
                        c = alpha * g_val[gb + seg_pat[e]]
                        a = seg_k[e] * m
                        r = seg_rank[e] * m
                        for j in range(m):
                            yflat[a + j] += c * xs[r + j]

    return tiled_kernel


#: one compiled kernel per column count m (a compile-time constant: the loops over j unroll)
tiled_kernels = {m: _make_tiled_kernel(m) for m in (1, 2, 4, 8, 16)}
