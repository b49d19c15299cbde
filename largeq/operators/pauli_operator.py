"""Matrix-free operators: a Pauli sum acting on a basis, as a scipy LinearOperator.

``PauliOperator(pauli_sum, basis)`` prepares small lookup tables once (a few MB at most,
independent of the vector length) and applies the operator through the compiled kernels of
``largeq.operators._kernels``.  No matrix is stored.  For small dimensions ``to_csr`` and ``to_dense``
assemble the same matrix explicitly (used in tests and the exact engine).
"""

from __future__ import annotations

import numba
import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import LinearOperator

from largeq.operators import _kernels as kernels
from largeq.operators.vectors import threads_for
from largeq.basis.spaces import Basis
from largeq.model.pauli import PauliSum

__all__ = ["PauliOperator", "pauli_operator", "fused_arguments"]


def _zsign(z, b):
    return 1 - 2 * (np.bitwise_count(np.asarray(z & ~b, dtype=np.int64)).astype(np.int64) & 1)


_CHUNK = 6  # strings per sign-pattern table (table size 4**_CHUNK)
_TILE_SCRATCH_MAX = 16 * 2**20  # bytes of one tile scratch array (per thread, two of them)


def _lo_pattern(zlo: np.ndarray, states: np.ndarray) -> np.ndarray:
    """Bit q set where string q's low part gives sign -1 on ``states``."""
    p = np.zeros(states.size, np.int64)
    for q, z in enumerate(zlo.tolist()):
        p |= (np.bitwise_count(z & ~states).astype(np.int64) & 1) << q
    return p


def _pattern_values(cs: np.ndarray) -> np.ndarray:
    """value[hp << Q | lp] = sum_q c_q (-1)^(bit q of hp + bit q of lp)."""
    q = cs.size
    idx = np.arange(1 << (2 * q), dtype=np.int64)
    hp, lp = idx >> q, idx & ((1 << q) - 1)
    val = np.zeros(idx.size, np.complex128)
    for i, c in enumerate(cs.tolist()):
        val += c * (1 - 2 * (((hp >> i) ^ (lp >> i)) & 1))
    return val


def _group_arrays(groups: dict, dtype):
    keys = sorted(groups)
    gx = np.array(keys, dtype=np.int64)
    ptr = [0]
    zs, cs = [], []
    for x in keys:
        z, c = groups[x]
        zs.extend(z.tolist())
        cs.extend(c.tolist())
        ptr.append(len(zs))
    return (gx, np.array(ptr, np.int64), np.array(zs, np.int64),
            np.array(cs, dtype=np.complex128).astype(dtype) if dtype == np.float64 else np.array(cs, dtype=dtype))


def fused_arguments(n: int, coeff_dtype, x, y, alpha, beta, gamma):
    """Check the vectors of ``y <- alpha A x + beta x + gamma y`` and cast x and the scalars.

    Shared by every compiled operator: x and y distinct, C-contiguous, shape (n,); y must hold
    the result dtype; complex scalars need a complex y.  Returns (x cast to y's dtype, scalars).
    """
    if x is y or np.shares_memory(x, y):
        raise ValueError("fused_update: x and y must not share memory")
    if x.shape != (n,) or y.shape != (n,):
        raise ValueError(f"fused_update: vectors must have shape ({n},), got {x.shape} and {y.shape}")
    if not (x.flags.c_contiguous and y.flags.c_contiguous):
        raise ValueError("fused_update: vectors must be C-contiguous")
    need = np.result_type(coeff_dtype, x.dtype)
    if y.dtype != need:
        raise TypeError(f"fused_update: output dtype {y.dtype} cannot hold the result ({need})")
    if x.dtype != need:
        x = x.astype(need)
    t = y.dtype.type
    scal = []
    for name, s in (("alpha", alpha), ("beta", beta), ("gamma", gamma)):
        if np.iscomplexobj(s) and not np.iscomplexobj(y) and np.imag(s) != 0:
            raise TypeError(f"fused_update: complex {name} needs a complex output vector")
        scal.append(t(np.real(s)) if not np.iscomplexobj(y) else t(s))
    return x, scal


class FusedOperator(LinearOperator):
    """What every matrix-free operator here shares: products, adjoint and result dtype, all through the
    subclass's in-place ``fused_update(x, y, alpha, beta, gamma)`` (``coeff_dtype`` and ``hermitian`` set
    by the subclass)."""

    def _vec_dtype(self, x):
        return np.result_type(self.coeff_dtype, x.dtype)

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


class PauliOperator(FusedOperator):
    """A Pauli sum on a two-level basis, applied matrix-free.

    Parameters
    ----------
    pauli : PauliSum
        The operator; strings that leave the basis (e.g. sigma^x in a magnetization sector)
        are dropped, i.e. the operator is projected onto the basis.
    basis : Basis

    Notes
    -----
    Memory: lookup tables of O(2^(L/2)) entries; a product ``y = A x`` holds only x and y.
    """

    def __init__(self, pauli: PauliSum, basis: Basis):
        if pauli.n_sites != basis.n_sites:
            raise ValueError(f"operator has {pauli.n_sites} sites but the basis has {basis.n_sites}")
        pauli = pauli.simplify()
        self.pauli = pauli
        self.basis = basis
        real = pauli.is_real()
        cdtype = np.float64 if real else np.complex128
        self.coeff_dtype = np.dtype(cdtype)
        self.hermitian = pauli.is_hermitian()
        super().__init__(dtype=cdtype, shape=(basis.dim, basis.dim))
        self._tile_cache = {}
        self._build(cdtype)
        # the tiled product (real operators) holds two (largest block, TILE_WIDTH) scratch arrays
        # per thread; bases split with very large blocks keep the block-by-block kernel
        max_block = int(np.max(np.diff(basis.lo_start))) if basis.lo_start.size > 1 else 0
        self._tiling_ok = real and max_block * kernels.TILE_WIDTH * 8 <= _TILE_SCRATCH_MAX

    # ------------------------------------------------------------------ tables
    def _build(self, cdtype):
        b = self.basis
        n_lo, n_hi = b.n_lo, b.n_hi
        lo_mask = (1 << n_lo) - 1
        hi_mask = ((1 << b.n_sites) - 1) ^ lo_mask
        groups = self.pauli.groups()
        real = cdtype == np.float64
        los = b.lo_list  # position -> low part
        his = np.arange(1 << n_hi, dtype=np.int64)
        diag_lo = np.zeros(los.size, dtype=np.complex128)
        diag_hi = np.zeros(his.size, dtype=np.complex128)
        cross_diag, lo_groups, hi_groups, cross = [], {}, {}, []
        for x, (zs, cs) in groups.items():
            zunion = int(np.bitwise_or.reduce(zs)) if zs.size else 0
            if x == 0:
                for z, c in zip(zs.tolist(), cs.tolist()):
                    if z & hi_mask == 0:
                        diag_lo += c * _zsign(z, los)
                    elif z & lo_mask == 0:
                        diag_hi += c * _zsign(z >> n_lo, his)
                    else:
                        cross_diag.append((z, c))
            elif (x | zunion) & hi_mask == 0:
                lo_groups[x] = (zs, cs)
            elif (x | zunion) & lo_mask == 0:
                hi_groups[x] = (zs, cs)
            else:
                for i in range(0, zs.size, _CHUNK):
                    cross.append((x, zs[i:i + _CHUNK], cs[i:i + _CHUNK]))
        cast = (lambda a: np.ascontiguousarray(np.real(a), dtype=np.float64)) if real else (
            lambda a: np.ascontiguousarray(a, dtype=np.complex128))
        self._diag = (cast(diag_lo), cast(diag_hi))
        # low-site groups: sparse matrix over the low part; row = position of the target
        rows, cols, vals = [], [], []
        pos = np.arange(los.size, dtype=np.int64)
        for x, (zs, cs) in lo_groups.items():
            src = los ^ x
            coef = np.zeros(los.size, dtype=np.complex128)
            for z, c in zip(zs.tolist(), cs.tolist()):
                coef += c * _zsign(z, src)
            ok = np.abs(coef) > 0
            if b.is_sector:
                ok &= np.bitwise_count(src) == np.bitwise_count(los)
            rows.append(pos[ok]); cols.append(b.lo_rank[src[ok]]); vals.append(coef[ok])
        self._lo = self._csr(los.size, rows, cols, vals, cast)
        # high-site groups: block axpys; row = target high part
        rows, cols, vals = [], [], []
        for x, (zs, cs) in hi_groups.items():
            src = his ^ (x >> n_lo)
            coef = np.zeros(his.size, dtype=np.complex128)
            for z, c in zip(zs.tolist(), cs.tolist()):
                coef += c * _zsign(z >> n_lo, src)
            ok = (np.abs(coef) > 0) & (b.block_offset >= 0) & (b.block_offset[src] >= 0)
            ok &= b.block_lo_up[src] == b.block_lo_up
            rows.append(his[ok]); cols.append(src[ok]); vals.append(coef[ok])
        self._hi = self._csr(his.size, rows, cols, vals, cast)
        # diagonal strings across the cut, in chunks of at most _CHUNK strings
        zhi, ptr, vptr, pats, vtab = [], [0], [0], [], []
        for i in range(0, len(cross_diag), _CHUNK):
            chunk = cross_diag[i:i + _CHUNK]
            zs = np.array([z for z, _ in chunk], np.int64)
            cs = np.array([c for _, c in chunk], np.complex128)
            zhi.extend((zs >> n_lo).tolist()); ptr.append(len(zhi))
            pats.append(_lo_pattern(zs & lo_mask, los))
            vtab.append(_pattern_values(cs)); vptr.append(vptr[-1] + vtab[-1].size)
        self._cross_diag = (np.array(zhi, np.int64), np.array(ptr, np.int64), np.array(vptr[:-1], np.int64),
                            np.array(pats, np.int8).reshape(len(pats), los.size),
                            cast(np.concatenate(vtab) if vtab else np.zeros(0)))
        # off-diagonal groups across the cut
        gxh, gzhi, gptr, gvptr, gpat, grank, gdpop, gval, gpat_width = [], [], [0], [0], [], [], [], [], []
        pc_lo = np.bitwise_count(los).astype(np.int64)
        for x, zs, cs in cross:
            xl = x & lo_mask
            src_lo = los ^ xl
            gxh.append(x >> n_lo)
            gzhi.extend((zs >> n_lo).tolist()); gptr.append(len(gzhi))
            gpat.append(_lo_pattern(zs & lo_mask, src_lo))
            grank.append(b.lo_rank[src_lo])
            gdpop.append(np.bitwise_count(src_lo).astype(np.int64) - pc_lo)
            gval.append(_pattern_values(cs)); gvptr.append(gvptr[-1] + gval[-1].size)
            gpat_width.append(zs.size)
        ng = len(cross)
        # entries of each group, per low class n and per change D of the low part's up spins,
        # kept only where the term can be non-zero: a block (class n) whose source block has
        # n + D low up spins loops over exactly its valid entries, without tests
        n_classes = b.lo_start.size - 1
        nd = 2 * n_lo + 1
        seg_ptr = np.zeros(ng * n_classes * nd + 1, np.int64)
        seg_k, seg_rank, seg_pat = [], [], []
        count = 0
        for g in range(ng):
            vals = gval[g].reshape(-1, 1 << gpat_width[g]) if gval else None
            live = np.any(np.abs(vals) > 0, axis=0)  # lo patterns that are non-zero for some hi pattern
            for n in range(n_classes):
                s0, s1 = b.lo_start[n], b.lo_start[n + 1]
                d = gdpop[g][s0:s1] if b.is_sector else np.zeros(s1 - s0, np.int64)
                pats = gpat[g][s0:s1]
                keep = live[pats]
                for dv in range(-n_lo, n_lo + 1):
                    sel = np.nonzero(keep & (d == dv))[0]
                    seg_k.append(sel); seg_rank.append(grank[g][s0:s1][sel]); seg_pat.append(pats[sel])
                    count += sel.size
                    seg_ptr[(g * n_classes + n) * nd + dv + n_lo + 1] = count
        self._cross = (np.array(gxh, np.int64), np.array(gzhi, np.int64), np.array(gptr, np.int64),
                       np.array(gvptr[:-1], np.int64), seg_ptr,
                       np.concatenate(seg_k).astype(np.int32) if seg_k else np.zeros(0, np.int32),
                       np.concatenate(seg_rank).astype(np.int32) if seg_rank else np.zeros(0, np.int32),
                       np.concatenate(seg_pat).astype(np.int8) if seg_pat else np.zeros(0, np.int8),
                       cast(np.concatenate(gval) if gval else np.zeros(0)))
        self.counts = {
            "low_groups": len(lo_groups),
            "high_groups": len(hi_groups),
            "cross_groups": len(cross),
            "cross_diagonal_terms": len(cross_diag),
        }

    @staticmethod
    def _csr(n, rows, cols, vals, cast):
        if rows:
            r = np.concatenate(rows); c = np.concatenate(cols); v = np.concatenate(vals)
        else:
            r = np.zeros(0, np.int64); c = np.zeros(0, np.int64); v = np.zeros(0, np.complex128)
        order = np.argsort(r, kind="stable")
        r, c, v = r[order], c[order], v[order]
        ptr = np.zeros(n + 1, np.int64)
        np.add.at(ptr, r + 1, 1)
        ptr = np.cumsum(ptr)
        return ptr, c.astype(np.int64), cast(v)

    def _args(self):
        b = self.basis
        return (b.is_sector, b.n_lo, b.block_offset, b.block_lo_up, b.lo_start,
                self._diag[0], self._diag[1], *self._cross_diag,
                *self._lo, *self._hi, *self._cross)

    def table_bytes(self) -> int:
        """Memory held by this operator's tables (the basis tables included)."""
        arrays = [*self._lo, *self._hi, *self._cross, *self._diag, *self._cross_diag]
        return int(sum(a.nbytes for a in arrays)) + self.basis.table_bytes()

    # ------------------------------------------------------------------ products
    def _tile_args(self, m: int):
        """Tiles of blocks for m real columns (see ``kernels.tiled_kernel``) and thread scratch."""
        key = (m, numba.get_num_threads())
        cached = self._tile_cache.get(key)
        if cached is not None:
            return cached
        b = self.basis
        per = kernels.TILE_WIDTH // m
        his = np.nonzero(b.block_offset >= 0)[0]
        cls = b.block_lo_up[his]
        tiles = []
        for n in np.unique(cls).tolist():
            hs = his[cls == n]
            pad = (-hs.size) % per
            hs = np.concatenate([hs, np.full(pad, -1, np.int64)])
            tiles.append(hs.reshape(-1, per))
        tiles = np.concatenate(tiles) if tiles else np.zeros((0, per), np.int64)
        # tiles in the order of their first block: the blocks whose input the high-site terms read
        # (hi ^ mask) were read shortly before, and are still in cache
        tiles = np.ascontiguousarray(tiles[np.argsort(tiles[:, 0], kind="stable")])
        max_size = int(np.max(np.diff(b.lo_start))) if b.lo_start.size > 1 else 0
        scratch = np.empty((numba.get_num_threads(), 2, max(max_size, 1), kernels.TILE_WIDTH))
        self._tile_cache[key] = (tiles, scratch)
        return tiles, scratch

    def _tiled(self, xf, yf, m, scal):
        """The tiled product on m real columns; xf, yf: flat float64 views of (dim, m) arrays."""
        b = self.basis
        tiles, scratch = self._tile_args(m)
        kernels.tiled_kernels[m](b.n_lo, b.block_offset, b.block_lo_up, b.lo_start,
                                 self._diag[0], self._diag[1], *self._cross_diag,
                                 *self._lo, *self._hi, *self._cross,
                                 tiles, scratch, xf.reshape(-1, m), yf.reshape(-1, m), xf, yf, *scal)

    def fused_update(self, x, y, alpha=1.0, beta=0.0, gamma=0.0):
        """In place ``y <- alpha * (A x) + beta * x + gamma * y``; x and y distinct 1-d arrays."""
        x, scal = fused_arguments(self.shape[0], self.coeff_dtype, x, y, alpha, beta, gamma)
        with threads_for(self.shape[0]):
            if self._tiling_ok and all(np.imag(s) == 0 for s in scal):
                m = 2 if np.iscomplexobj(y) else 1
                self._tiled(x.view(np.float64), y.view(np.float64), m, [float(np.real(s)) for s in scal])
            else:
                kernels.fused_kernel(*self._args(), x, y, *scal)
        return y

    def fused_update_block(self, X, Y, alpha=1.0, beta=0.0, gamma=0.0):
        """``Y <- alpha * (A X) + beta * X + gamma * Y`` for R vectors at once (columns of (dim, R) arrays).

        X and Y: distinct C-contiguous arrays of shape (dim, R) (row i holds entry i of every vector).
        For a real operator and real scalars every index of the operator is read once per R
        vectors (two real columns per complex vector); otherwise the columns are done one by one.
        """
        n = self.shape[0]
        if X.ndim != 2 or X.shape != Y.shape or X.shape[0] != n:
            raise ValueError(f"fused_update_block: need two arrays of shape ({n}, R), got {X.shape} and {Y.shape}")
        if X is Y or np.shares_memory(X, Y):
            raise ValueError("fused_update_block: X and Y must not share memory")
        if not (X.flags.c_contiguous and Y.flags.c_contiguous):
            raise ValueError("fused_update_block: arrays must be C-contiguous")
        R = X.shape[1]
        need = np.result_type(self.coeff_dtype, X.dtype)
        if Y.dtype != need:
            raise TypeError(f"fused_update_block: output dtype {Y.dtype} cannot hold the result ({need})")
        if X.dtype != need:
            X = X.astype(need)
        m = R * (2 if np.iscomplexobj(Y) else 1)
        real_scal = all(np.imag(s) == 0 for s in (alpha, beta, gamma))
        if self._tiling_ok and real_scal and kernels.TILE_WIDTH % m == 0:
            scal = [float(np.real(s)) for s in (alpha, beta, gamma)]
            with threads_for(n):
                self._tiled(X.reshape(-1).view(np.float64), Y.reshape(-1).view(np.float64), m, scal)
            return Y
        for j in range(R):
            yj = np.ascontiguousarray(Y[:, j])
            self.fused_update(np.ascontiguousarray(X[:, j]), yj, alpha, beta, gamma)
            Y[:, j] = yj
        return Y

    def expectation(self, x: np.ndarray) -> complex:
        """<x|A|x> for a (not necessarily normalised) vector x, without temporaries of size dim."""
        x = np.ascontiguousarray(x)
        if x.shape != (self.shape[0],):
            raise ValueError(f"expectation: vector must have shape ({self.shape[0]},), got {x.shape}")
        need = self._vec_dtype(x)
        if x.dtype != need:
            x = x.astype(need)
        partial = np.zeros(self.basis.block_offset.shape[0], dtype=np.complex128)
        with threads_for(self.shape[0]):
            kernels.expect_kernel(*self._args(), x, partial)
        val = complex(partial.sum())
        return val.real if self.hermitian else val

    # ------------------------------------------------------------------ explicit matrices
    def to_csr(self, max_dim: int = 5_000_000) -> sp.csr_matrix:
        """Assemble the same operator as a CSR matrix (small dimensions; a generic, independent code path).

        Column indices are int32 when the dimension allows; values are real for real operators.
        """
        b = self.basis
        if b.dim > max_dim:
            raise MemoryError(f"to_csr: dimension {b.dim:,} exceeds max_dim = {max_dim:,}")
        states = b.states()
        gx, gptr, gz, gc = _group_arrays(self.pauli.groups(), np.complex128)
        if self.coeff_dtype == np.float64:
            gc = np.ascontiguousarray(gc.real)
        if gc.size == 0:
            return sp.csr_matrix(self.shape, dtype=self.coeff_dtype)
        args = (b.n_lo, b.is_sector, -1 if b.up_spins is None else b.up_spins, b.block_offset, b.lo_rank, states,
                gx, gptr, gz, gc)
        counts = np.empty(b.dim, np.int64)
        kernels.csr_count_kernel(*args, counts)
        indptr = np.zeros(b.dim + 1, np.int64)
        np.cumsum(counts, out=indptr[1:])
        del counts
        nnz = int(indptr[-1])
        idx_dtype = np.int32 if max(nnz, b.dim) < 2**31 - 1 else np.int64
        indices = np.empty(nnz, idx_dtype)
        data = np.empty(nnz, self.coeff_dtype)
        kernels.csr_fill_kernel(*args, indptr, indices, data)
        if idx_dtype == np.int32:
            indptr = indptr.astype(np.int32)
        m = sp.csr_matrix((data, indices, indptr), shape=self.shape)
        m.has_canonical_format = False
        return m

    def to_dense(self, max_dim: int = 20_000) -> np.ndarray:
        if self.basis.dim > max_dim:
            raise MemoryError(f"to_dense: dimension {self.basis.dim:,} exceeds max_dim = {max_dim:,}")
        return self.to_csr().toarray()


def pauli_operator(pauli: PauliSum, basis: Basis) -> PauliOperator:
    return PauliOperator(pauli, basis)
