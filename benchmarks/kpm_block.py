"""Chebyshev moments of several random vectors at once against one at a time.

J1-J2 XXZ ring (j2 = 0.3), zero-magnetization sector.  For each vector dtype (real, complex)
and each R, the moments of R random vectors are computed in one recursion
(``chebyshev_moments_block``) and one by one (``chebyshev_moments``), side by side, and the
time per vector is compared.  Last line: a JSON object with the per-vector speedup for each
(dtype, R) at the largest L and the largest moment deviation.

    python benchmarks/kpm_block.py --sizes 22 --moments 200
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np

from _common import emit_json, j1j2_ring, machine_line, print_table
from largeq.basis import magnetization_basis
from largeq.engines.bounds import spectral_bounds
from largeq.engines.kpm import chebyshev_moments, chebyshev_moments_block
from largeq.operators.pauli_operator import PauliOperator


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--sizes", type=int, nargs="+", default=[20, 22])
    ap.add_argument("--moments", type=int, default=200)
    ap.add_argument("--vectors", type=int, nargs="+", default=[2, 4, 8])
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    print(machine_line())
    rows, result = [], {}
    for L in args.sizes:
        b = magnetization_basis(L, L // 2)
        op = PauliOperator(j1j2_ring(L), b)
        bounds = spectral_bounds(op)
        rng = np.random.default_rng(0)
        for dtype in (float, complex):
            for R in args.vectors:
                V = rng.standard_normal((b.dim, R))
                if dtype is complex:
                    V = V + 1j * rng.standard_normal((b.dim, R))
                cols = [np.ascontiguousarray(V[:, r]) for r in range(R)]
                t_blk, t_one = [], []
                for _ in range(args.repeats):  # alternate the two so that load changes hit both
                    t = time.perf_counter()
                    mb = chebyshev_moments_block(op, V, args.moments, bounds)
                    t_blk.append(time.perf_counter() - t)
                    t = time.perf_counter()
                    mo = np.array([chebyshev_moments(op, c, args.moments, bounds) for c in cols])
                    t_one.append(time.perf_counter() - t)
                dev = float(np.max(np.abs(mb - mo)) / b.dim)
                blk, one = statistics.median(t_blk) / R, statistics.median(t_one) / R
                kind = "real" if dtype is float else "complex"
                rows.append((L, kind, R, f"{one:.2f}", f"{blk:.2f}", f"{one / blk:.2f}", f"{dev:.1e}"))
                result[f"speedup_per_vector_{kind}_R{R}"] = round(one / blk, 3)
                result["max_moment_deviation_over_dim"] = max(result.get("max_moment_deviation_over_dim", 0.0), dev)
                print(f"# L = {L} {kind} R = {R} done", flush=True)
        result["L"] = L
        result["moments"] = args.moments
    print_table(["L", "vectors", "R", "one_at_a_time_s_per_vec", "R_at_once_s_per_vec", "speedup", "max_dev/D"], rows)
    emit_json(result)


if __name__ == "__main__":
    main()
