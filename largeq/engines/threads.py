"""One thread policy for the two thread pools a run uses (docs/threads.md).

Compiled kernels (numba's parallel loops: products, vector updates, sector kernels) and BLAS/LAPACK
(dense diagonalizations, dense products) each size their pool to the number of cores.  Run together,
or one while the other's idle workers still spin, they oversubscribe the cores.  The policy:

* while compiled kernels run (time evolution, KPM, Lanczos bounds): BLAS is held to one thread;
* while dense linear algebra runs (exact diagonalization, thermal values): numba's parallel loops are held
  to one thread, and BLAS to one thread as well unless the caller names a matrix of at least
  ``SMALL_DENSE_DIM`` states (many small symmetry blocks: splitting each one costs more than it gains; on the
  2-core development machine with other jobs running, the exact part of ``relax xx_neel`` took 105 s with
  BLAS on all cores and 12 s on one, see docs/safety.md).

Both are context managers that restore the previous settings on exit.  An explicit environment setting
(OPENBLAS_NUM_THREADS, OMP_NUM_THREADS, NUMBA_NUM_THREADS) still bounds the pools from above.
"""

from __future__ import annotations

from contextlib import contextmanager

__all__ = ["compiled_kernels", "dense_linear_algebra", "SMALL_DENSE_DIM"]

#: dense matrices below this dimension are diagonalized with one BLAS thread (common practice)
SMALL_DENSE_DIM = 1000


@contextmanager
def compiled_kernels():
    """numba kernels on all cores; BLAS/LAPACK limited to one thread meanwhile."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        yield


@contextmanager
def dense_linear_algebra(dimension: int | None = None):
    """numba held to one thread; BLAS/LAPACK on all cores only for a matrix of ``dimension`` >= ``SMALL_DENSE_DIM``,
    on one thread otherwise (also when the dimension is not known: many small symmetry blocks)."""
    import numba
    from threadpoolctl import threadpool_limits

    old = numba.get_num_threads()
    numba.set_num_threads(1)
    try:
        if dimension is None or dimension < SMALL_DENSE_DIM:
            with threadpool_limits(limits=1, user_api="blas"):
                yield
        else:
            yield
    finally:
        numba.set_num_threads(old)
