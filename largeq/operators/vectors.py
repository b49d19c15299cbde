"""Level-1 vector operations for full-size state vectors (compiled, thread-count aware).

BLAS level-1 calls (numpy.vdot, scipy's axpy) start their own thread pool, which fights with
numba's pool on a small machine: on a loaded 2-core node a 13k-element vdot was measured at
16 ms instead of 4 us.  These kernels use numba's pool only for vectors long enough to
benefit and run single-threaded otherwise.  Reductions sum fixed-size chunks in a fixed
order, so results do not depend on the thread count (a resumed run reproduces the
uninterrupted one bit for bit).
"""

from __future__ import annotations

from contextlib import contextmanager

import numba
import numpy as np
from numba import njit, prange

__all__ = ["PARALLEL_MIN", "threads_for", "vdot", "norm", "axpy", "scale", "accumulate_pair", "column_vdots"]

#: vectors shorter than this are processed by one thread (fork/join costs more than it saves)
PARALLEL_MIN = 1 << 16
_CHUNK = 1 << 13


@contextmanager
def threads_for(n: int):
    """Use numba's full thread pool for length ``n`` only when n >= PARALLEL_MIN."""
    if n >= PARALLEL_MIN:
        yield
        return
    old = numba.get_num_threads()
    numba.set_num_threads(1)
    try:
        yield
    finally:
        numba.set_num_threads(old)


@njit(parallel=True, cache=True)
def _vdot_chunks(x, y, out):
    n = x.shape[0]
    for c in prange(out.shape[0]):
        s = 0j
        for i in range(c * _CHUNK, min(n, (c + 1) * _CHUNK)):
            s += np.conj(x[i]) * y[i]
        out[c] = s


@njit(parallel=True, cache=True)
def _column_vdots_chunks(a, b, out):
    n = a.shape[0]
    for c in prange(out.shape[0]):
        for i in range(c * _CHUNK, min(n, (c + 1) * _CHUNK)):
            ar = a[i]
            br = b[i]
            for j in range(a.shape[1]):
                out[c, j] += np.conj(ar[j]) * br[j]


@njit(parallel=True, cache=True)
def _axpy(a, x, y):
    for i in prange(x.shape[0]):
        y[i] += a * x[i]


@njit(parallel=True, cache=True)
def _accumulate_pair(outs, a, u, b, v, overwrite):
    n = u.shape[0]
    n_chunks = (n + _CHUNK - 1) // _CHUNK
    for c in prange(n_chunks):
        lo = c * _CHUNK
        hi = min(n, lo + _CHUNK)
        for k in range(outs.shape[0]):
            ak = a[k]
            bk = b[k]
            if overwrite:
                for i in range(lo, hi):
                    outs[k, i] = ak * u[i] + bk * v[i]
            else:
                for i in range(lo, hi):
                    outs[k, i] += ak * u[i] + bk * v[i]


@njit(parallel=True, cache=True)
def _scale(a, x):
    for i in prange(x.shape[0]):
        x[i] *= a


def vdot(x: np.ndarray, y: np.ndarray) -> complex:
    """sum_i conj(x_i) y_i (complex), thread-count independent."""
    if x.shape != y.shape or x.ndim != 1:
        raise ValueError(f"vdot: need two 1-d vectors of equal length, got {x.shape} and {y.shape}")
    if not (x.flags.c_contiguous and y.flags.c_contiguous) or x.dtype.kind not in "fc" or y.dtype.kind not in "fc":
        return complex(np.vdot(x, y))
    out = np.empty((x.shape[0] + _CHUNK - 1) // _CHUNK, np.complex128)
    with threads_for(x.shape[0]):
        _vdot_chunks(x, y, out)
    return complex(out.sum())


def norm(x: np.ndarray) -> float:
    """Euclidean norm ||x||."""
    return float(np.sqrt(vdot(x, x).real))


def axpy(a, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """In place y <- y + a x (no temporaries)."""
    if x.shape != y.shape:
        raise ValueError(f"axpy: shapes differ: {x.shape} and {y.shape}")
    if np.iscomplexobj(a) and not np.iscomplexobj(y):
        if np.imag(a) != 0:
            raise TypeError("axpy: complex factor needs a complex output vector")
        a = np.real(a)
    a = y.dtype.type(a)
    if x.dtype != y.dtype:
        x = x.astype(y.dtype)
    with threads_for(x.shape[0]):
        _axpy(a, x, y)
    return y


def scale(a, x: np.ndarray) -> np.ndarray:
    """In place x <- a x."""
    a = x.dtype.type(a)
    with threads_for(x.shape[0]):
        _scale(a, x)
    return x


def accumulate_pair(outs: np.ndarray, a, u: np.ndarray, b, v: np.ndarray, overwrite: bool = False) -> np.ndarray:
    """In place ``outs[k] <- outs[k] + a[k] u + b[k] v`` for every row k, in one pass over u and v.

    With ``overwrite`` the old content of ``outs`` is ignored: ``outs[k] <- a[k] u + b[k] v``.
    ``outs``: C-contiguous (K, n) array; ``a``, ``b``: K factors; u, v: vectors of length n.
    Each chunk of u and v is read once for all K rows (instead of once per row and vector).
    """
    if outs.ndim != 2 or not outs.flags.c_contiguous:
        raise ValueError("accumulate_pair: outs must be a C-contiguous 2-d array")
    n = outs.shape[1]
    if u.shape != (n,) or v.shape != (n,):
        raise ValueError(f"accumulate_pair: u and v must have shape ({n},), got {u.shape} and {v.shape}")
    a = np.ascontiguousarray(a, dtype=outs.dtype).reshape(-1)
    b = np.ascontiguousarray(b, dtype=outs.dtype).reshape(-1)
    if a.size != outs.shape[0] or b.size != outs.shape[0]:
        raise ValueError("accumulate_pair: need one factor a[k] and b[k] per row")
    u = np.ascontiguousarray(u, dtype=outs.dtype)
    v = np.ascontiguousarray(v, dtype=outs.dtype)
    with threads_for(n):
        _accumulate_pair(outs, a, u, b, v, bool(overwrite))
    return outs


def column_vdots(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``sum_i conj(a[i, j]) b[i, j]`` for every column j of two (n, R) arrays, in one pass.

    Complex results of shape (R,); summed in fixed chunks like :func:`vdot` (independent of the
    thread count), so column j equals ``vdot(a[:, j], b[:, j])`` up to rounding.
    """
    if a.shape != b.shape or a.ndim != 2:
        raise ValueError(f"column_vdots: need two 2-d arrays of equal shape, got {a.shape} and {b.shape}")
    a = np.ascontiguousarray(a)
    b = np.ascontiguousarray(b)
    out = np.zeros(((a.shape[0] + _CHUNK - 1) // _CHUNK, a.shape[1]), np.complex128)
    with threads_for(a.size):
        _column_vdots_chunks(a, b, out)
    return out.sum(axis=0)
