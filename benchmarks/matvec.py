"""Matrix-free product against scipy CSR on the same magnetization sector.

J1-J2 XXZ ring (j2 = 0.3), zero-magnetization sector, L = 20, 22, 24, 26 (28 if it fits).
Prints a table of medians and ratios measured side by side in one run, and as its last line
a JSON object with speedup_vs_csr, memory_ratio_vs_csr and bandwidth_fraction for the largest L.

    python benchmarks/matvec.py            # L = 20 .. 26 (28 when memory allows)
    python benchmarks/matvec.py --quick    # L = 20, 22 (under a minute)
"""

from __future__ import annotations

import argparse
import gc
import time
from math import comb

import numpy as np
import psutil

from _common import copy_bandwidth, emit_json, j1j2_ring, machine_line, median_time, print_table
from largeq.basis.spaces import magnetization_basis
from largeq.operators.pauli_operator import PauliOperator


def csr_bytes(m) -> int:
    return int(m.data.nbytes + m.indices.nbytes + m.indptr.nbytes)


def run(L: int, repeats: int, bandwidth: float) -> dict:
    basis = magnetization_basis(L, L // 2)
    op = PauliOperator(j1j2_ring(L), basis)
    rng = np.random.default_rng(1)
    xr = rng.standard_normal(basis.dim)
    yr = np.empty_like(xr)
    xc = xr + 1j * rng.standard_normal(basis.dim)
    yc = np.empty_like(xc)
    ours_r = median_time(lambda: op.fused_update(xr, yr), repeats)
    ours_c = median_time(lambda: op.fused_update(xc, yc), repeats)
    t = time.perf_counter()
    m = op.to_csr(max_dim=10**9)
    build = time.perf_counter() - t
    csr_r = median_time(lambda: m @ xr, repeats)
    csr_c = median_time(lambda: m @ xc, max(3, repeats // 2))
    dev = float(np.max(np.abs(m @ xr - yr)))
    mem_csr = csr_bytes(m)
    m = None  # free the CSR matrix before the next size
    gc.collect()
    touched_r = 2 * xr.nbytes  # one input read + one output written
    touched_c = 2 * xc.nbytes
    return {
        "L": L, "dim": basis.dim, "nnz_per_row": None,
        "ours_real_s": ours_r, "csr_real_s": csr_r, "ours_complex_s": ours_c, "csr_complex_s": csr_c,
        "csr_build_s": build, "csr_bytes": mem_csr, "ours_table_bytes": op.table_bytes(),
        "speedup_real": csr_r / ours_r, "speedup_complex": csr_c / ours_c,
        "memory_ratio": op.table_bytes() / mem_csr,
        "bandwidth_fraction": touched_r / ours_r / bandwidth,
        "bandwidth_fraction_complex": touched_c / ours_c / bandwidth,
        "csr_bandwidth_fraction": touched_r / csr_r / bandwidth,
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
        csr_need = dim * 26 * 12 + 4 * dim * 16  # ~26 non-zeros per row (int32 + float64) + vectors
        if csr_need > 0.8 * psutil.virtual_memory().available:
            print(f"# L = {L}: CSR would need ~{csr_need / 2**30:.1f} GiB; skipped")
            continue
        results.append(run(L, args.repeats, bw))
        r = results[-1]
        print(f"# L = {L} done (max |ours - csr| = {r['max_deviation']:.1e})", flush=True)
    rows = [(r["L"], f"{r['dim']:,}", f"{r['ours_real_s'] * 1e3:.1f}", f"{r['csr_real_s'] * 1e3:.1f}",
             f"{r['speedup_real']:.2f}", f"{r['ours_complex_s'] * 1e3:.1f}", f"{r['csr_complex_s'] * 1e3:.1f}",
             f"{r['speedup_complex']:.2f}", f"{r['csr_build_s']:.1f}", f"{r['csr_bytes'] / 2**20:.0f}",
             f"{r['ours_table_bytes'] / 2**20:.2f}", f"{r['memory_ratio']:.1e}", f"{r['bandwidth_fraction']:.3f}",
             f"{r['csr_bandwidth_fraction']:.3f}") for r in results]
    print_table(["L", "dim", "ours_ms", "csr_ms", "x_real", "ours_c_ms", "csr_c_ms", "x_cplx", "csr_build_s",
                 "csr_MiB", "ours_MiB", "mem_ratio", "bw_frac", "csr_bw_frac"], rows)
    last = results[-1]
    emit_json({
        "L": last["L"],
        "speedup_vs_csr": round(last["speedup_real"], 3),
        "speedup_vs_csr_complex": round(last["speedup_complex"], 3),
        "memory_ratio_vs_csr": last["memory_ratio"],
        "bandwidth_fraction": round(last["bandwidth_fraction"], 4),
        "bandwidth_fraction_complex": round(last["bandwidth_fraction_complex"], 4),
        "csr_bandwidth_fraction": round(last["csr_bandwidth_fraction"], 4),
    })


if __name__ == "__main__":
    main()
