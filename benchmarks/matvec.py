"""Matrix-free product against fair CSR peers on the same magnetization sector and threads.

J1-J2 XXZ ring (j2 = 0.3), zero-magnetization sector, L = 20, 22, 24, 26 (28 if it fits).
Peers, all on the same sector and the same vectors:

* ``pcsr``: a compiled (numba) row-parallel CSR product on the same threads as ours, int32
  column indices, real values; for complex vectors it reads the real and imaginary parts as
  two interleaved real columns (no conversion, no complex multiply by a real number);
* ``scipy``: scipy's CSR product (one thread); for complex vectors a *stored complex* copy
  of the matrix, so that scipy does not convert the real matrix on every product;
* ours at one thread and at all threads.

Prints a table of medians (all products of one L are timed side by side in one run) and as
its last line a JSON object for the largest L with speedup_vs_parallel_csr_real,
speedup_vs_parallel_csr_complex, speedup_vs_scipy_csr_complex, bandwidth_fraction_complex
(one vector read + one written, over the numpy copy bandwidth), memory_ratio_vs_csr.

    python benchmarks/matvec.py            # L = 20 .. 26 (28 when memory allows)
    python benchmarks/matvec.py --quick    # L = 20, 22 (about a minute)
"""

from __future__ import annotations

import argparse
import gc
import time
from math import comb

import numba
import numpy as np
import psutil
from numba import njit, prange

from _common import copy_bandwidth, emit_json, j1j2_ring, machine_line, median_time, print_table
from largeq.basis.spaces import magnetization_basis
from largeq.operators.pauli_operator import PauliOperator


@njit(parallel=True, cache=True)
def pcsr_real(indptr, indices, data, x, y):
    for i in prange(indptr.shape[0] - 1):
        acc = 0.0
        for e in range(indptr[i], indptr[i + 1]):
            acc += data[e] * x[indices[e]]
        y[i] = acc


@njit(parallel=True, cache=True)
def pcsr_pair(indptr, indices, data, x, y):
    """x, y: (n, 2) float64 views of complex vectors (real matrix)."""
    for i in prange(indptr.shape[0] - 1):
        re = 0.0
        im = 0.0
        for e in range(indptr[i], indptr[i + 1]):
            j = indices[e]
            v = data[e]
            re += v * x[j, 0]
            im += v * x[j, 1]
        y[i, 0] = re
        y[i, 1] = im


def csr_bytes(m) -> int:
    return int(m.data.nbytes + m.indices.nbytes + m.indptr.nbytes)


def one_thread(fn):
    def wrapped():
        old = numba.get_num_threads()
        numba.set_num_threads(1)
        try:
            fn()
        finally:
            numba.set_num_threads(old)
    return wrapped


def run(L: int, repeats: int, bandwidth: float) -> dict:
    basis = magnetization_basis(L, L // 2)
    op = PauliOperator(j1j2_ring(L), basis)
    rng = np.random.default_rng(1)
    n = basis.dim
    xr = rng.standard_normal(n)
    yr = np.empty_like(xr)
    xc = xr + 1j * rng.standard_normal(n)
    yc = np.empty_like(xc)
    t = time.perf_counter()
    m = op.to_csr(max_dim=10**9)
    build = time.perf_counter() - t
    m.sort_indices()
    ip, ix = m.indptr.astype(np.int64), m.indices.astype(np.int32)
    pr = np.empty_like(xr)
    pc = np.empty_like(xc)
    xcv, pcv = xc.view(np.float64).reshape(n, 2), pc.view(np.float64).reshape(n, 2)
    # correctness of every path before timing
    op.fused_update(xr, yr); op.fused_update(xc, yc)
    pcsr_real(ip, ix, m.data, xr, pr); pcsr_pair(ip, ix, m.data, xcv, pcv)
    dev = max(float(np.max(np.abs(pr - yr))), float(np.max(np.abs(pc - yc))),
              float(np.max(np.abs(m @ xc - yc))))
    # side by side: alternate the contenders in each repeat so that load changes hit all alike
    fns = {
        "ours_r": lambda: op.fused_update(xr, yr),
        "ours_c": lambda: op.fused_update(xc, yc),
        "pcsr_r": lambda: pcsr_real(ip, ix, m.data, xr, pr),
        "pcsr_c": lambda: pcsr_pair(ip, ix, m.data, xcv, pcv),
        "ours1_c": one_thread(lambda: op.fused_update(xc, yc)),
        "scipy_r": lambda: m @ xr,
    }
    samples = {k: [] for k in fns}
    for _ in range(repeats):
        for k, fn in fns.items():
            samples[k].append(median_time(fn, 1, warmup=0))
    med = {k: float(np.median(v)) for k, v in samples.items()}
    mem_csr = csr_bytes(m)
    del ip, ix
    mc = m.astype(np.complex128)  # stored complex matrix: scipy's best case for complex vectors
    m = None
    gc.collect()
    med["scipy_c"] = median_time(lambda: mc @ xc, max(3, repeats // 2))
    mc = None
    gc.collect()
    touched_r = 2 * xr.nbytes  # one input read + one output written
    touched_c = 2 * xc.nbytes
    return {
        "L": L, "dim": n, **med, "csr_build_s": build, "csr_bytes": mem_csr, "ours_table_bytes": op.table_bytes(),
        "x_pcsr_real": med["pcsr_r"] / med["ours_r"], "x_pcsr_complex": med["pcsr_c"] / med["ours_c"],
        "x_scipy_complex": med["scipy_c"] / med["ours_c"], "x_scipy_real": med["scipy_r"] / med["ours_r"],
        "x_scipy_complex_1thr": med["scipy_c"] / med["ours1_c"],
        "memory_ratio": op.table_bytes() / mem_csr,
        "bandwidth_fraction": touched_r / med["ours_r"] / bandwidth,
        "bandwidth_fraction_complex": touched_c / med["ours_c"] / bandwidth,
        "pcsr_bandwidth_fraction_complex": touched_c / med["pcsr_c"] / bandwidth,
        "max_deviation": dev,
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="L = 20, 22 only")
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--sizes", type=int, nargs="+", default=None, help="chain lengths to run (overrides the default list)")
    args = ap.parse_args()
    sizes = args.sizes or ([20, 22] if args.quick else [20, 22, 24, 26, 28])
    print(machine_line())
    bw = copy_bandwidth()
    print(f"# numpy copy bandwidth: {bw / 1e9:.2f} GB/s (read + write)")
    results = []
    for L in sizes:
        dim = comb(L, L // 2)
        csr_need = dim * 26 * 28 + 6 * dim * 16  # real + complex copy of ~26 non-zeros per row + vectors
        if csr_need > 0.8 * psutil.virtual_memory().available:
            print(f"# L = {L}: the CSR peers would need ~{csr_need / 2**30:.1f} GiB; skipped")
            continue
        results.append(run(L, args.repeats, bw))
        r = results[-1]
        print(f"# L = {L} done (max deviation between all paths = {r['max_deviation']:.1e})", flush=True)
    ms = lambda v: f"{v * 1e3:.1f}"  # noqa: E731
    rows = [(r["L"], f"{r['dim']:,}", ms(r["ours_r"]), ms(r["ours_c"]), ms(r["pcsr_r"]), ms(r["pcsr_c"]),
             ms(r["scipy_r"]), ms(r["scipy_c"]), ms(r["ours1_c"]),
             f"{r['x_pcsr_real']:.2f}", f"{r['x_pcsr_complex']:.2f}", f"{r['x_scipy_complex']:.2f}",
             f"{r['x_scipy_complex_1thr']:.2f}", f"{r['memory_ratio']:.1e}",
             f"{r['bandwidth_fraction_complex']:.3f}", f"{r['pcsr_bandwidth_fraction_complex']:.3f}")
            for r in results]
    print_table(["L", "dim", "ours_r", "ours_c", "pcsr_r", "pcsr_c", "scipy_r", "scipy_c(cplx mat)", "ours_c_1thr",
                 "x_pcsr_r", "x_pcsr_c", "x_scipy_c", "x_scipy_c_1thr", "mem_ratio", "bw_frac_c", "pcsr_bw_frac_c"],
                rows)
    print(f"# times in ms (medians of {args.repeats}); ours and pcsr on {numba.get_num_threads()} threads; "
          "x_* = peer time / our time")
    last = results[-1]
    emit_json({
        "L": last["L"],
        "speedup_vs_parallel_csr_real": round(last["x_pcsr_real"], 3),
        "speedup_vs_parallel_csr_complex": round(last["x_pcsr_complex"], 3),
        "speedup_vs_scipy_csr_complex": round(last["x_scipy_complex"], 3),
        "speedup_vs_scipy_csr_complex_one_thread": round(last["x_scipy_complex_1thr"], 3),
        "memory_ratio_vs_csr": last["memory_ratio"],
        "bandwidth_fraction": round(last["bandwidth_fraction"], 4),
        "bandwidth_fraction_complex": round(last["bandwidth_fraction_complex"], 4),
    })


if __name__ == "__main__":
    main()
