"""Neel quench of the J1-J2 XXZ ring (j2 = 0.3) in symmetry sectors vs. the magnetization sector.

Staggered magnetization, t = 0 .. 20 (201 times).  Each size runs in its own subprocess (peak memory
from ru_maxrss).  Also measures the representative lookup methods (one matvec per method).

    python benchmarks/symmetric.py --quick        # L = 16, 20 (under a minute)
    python benchmarks/symmetric.py --sizes 24     # any sizes; the magnetization-sector run up to --u1-max

Last line: JSON with seconds_L32, peak_gib_L32, speedup_vs_u1_L24 (null where not run).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

from _common import emit_json, j1j2_ring, machine_line, median_time, peak_rss_bytes, print_table  # noqa: E402


def _observable(L):
    from largeq.model.pauli import PauliSum

    return PauliSum(L, np.zeros(L, np.int64), np.array([1 << j for j in range(L)]),
                    np.array([(-1.0) ** j for j in range(L)]))


#: output times per Chebyshev expansion of the main command's sector path (largeq.workflows.relax)
RELAX_SECTOR_BLOCK = 8


def run_symmetric(L: int, n_times: int) -> dict:
    from largeq.engines.sector_evolution import evolve_split

    H = j1j2_ring(L)
    neel = sum(1 << j for j in range(1, L, 2))
    times = np.linspace(0.0, 20.0, n_times)
    t0 = time.perf_counter()
    res = evolve_split(H, neel, times, {"staggered": _observable(L)}, reflection=True, spin_flip=True,
                       block=RELAX_SECTOR_BLOCK)
    wall = time.perf_counter() - t0
    return {"L": L, "mode": "sectors", "seconds": wall, "peak_bytes": peak_rss_bytes(),
            "dims": [s["dimension"] for s in res["sectors"]], "final": float(res["curves"]["staggered"][-1]),
            "curve": res["curves"]["staggered"].tolist()}


def run_u1(L: int, n_times: int) -> dict:
    from largeq.basis.spaces import magnetization_basis
    from largeq.engines.propagate import evolve
    from largeq.operators.pauli_operator import PauliOperator
    from largeq.basis.states import basis_state

    H = j1j2_ring(L)
    neel = sum(1 << j for j in range(1, L, 2))
    times = np.linspace(0.0, 20.0, n_times)
    t0 = time.perf_counter()
    b = magnetization_basis(L, L // 2)
    op = PauliOperator(H, b)
    obs = PauliOperator(_observable(L), b)
    curve = np.zeros(n_times)

    def out(i, t, psi):
        curve[i] = obs.expectation(psi)
    evolve(op, basis_state(b, neel), times, on_output=out)
    wall = time.perf_counter() - t0
    return {"L": L, "mode": "u1", "seconds": wall, "peak_bytes": peak_rss_bytes(), "dims": [b.dim],
            "final": float(curve[-1]), "curve": curve.tolist()}


def run_lookup(L: int) -> dict:
    """One matvec per lookup method in the k = 0, R = +, F = + sector, and the magnetization-sector matvec."""
    from largeq.basis.spaces import magnetization_basis
    from largeq.operators.pauli_operator import PauliOperator
    from largeq.basis.sectors import GroupSpec, orbit_representatives, symmetric_sector
    from largeq.operators.sector_operator import SymmetricOperator

    H = j1j2_ring(L)
    out = {"L": L}
    t0 = time.perf_counter()
    orbits = orbit_representatives(GroupSpec(L, L // 2, True, True, True))
    out["enumerate_s"] = time.perf_counter() - t0
    rng = np.random.default_rng(1)
    for method in ("bisect", "block", "rank"):
        sec = symmetric_sector(L, L // 2, momentum=0, reflection=1, flip=1, lookup=method, orbits=orbits)
        op = SymmetricOperator(H, sec)
        x = rng.standard_normal(sec.dim) + 1j * rng.standard_normal(sec.dim)
        y = np.empty_like(x)
        out[f"matvec_{method}_s"] = median_time(lambda: op.fused_update(x, y), repeats=5)
        out[f"table_{method}_bytes"] = sec.table_bytes()
        out["dim"] = sec.dim
    b = magnetization_basis(L, L // 2)
    op = PauliOperator(H, b)
    x = rng.standard_normal(b.dim) + 1j * rng.standard_normal(b.dim)
    y = np.empty_like(x)
    out["matvec_u1_s"] = median_time(lambda: op.fused_update(x, y), repeats=5)
    out["u1_dim"] = b.dim
    return out


def _child(args) -> None:
    if args.child == "lookup":
        print(json.dumps(run_lookup(args.L)))
    elif args.child == "sectors":
        print(json.dumps(run_symmetric(args.L, args.n_times)))
    else:
        print(json.dumps(run_u1(args.L, args.n_times)))


def _spawn(kind: str, L: int, n_times: int) -> dict:
    cmd = [sys.executable, os.path.abspath(__file__), "--child", kind, "--L", str(L), "--n-times", str(n_times)]
    p = subprocess.run(cmd, capture_output=True, text=True)
    if p.returncode != 0:
        raise RuntimeError(f"{kind} L={L} failed:\n{p.stderr[-3000:]}")
    return json.loads(p.stdout.strip().splitlines()[-1])


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="L = 16 and 20 only")
    ap.add_argument("--sizes", type=int, nargs="*", default=None)
    ap.add_argument("--u1-max", type=int, default=24, help="largest L for the magnetization-sector comparison")
    ap.add_argument("--n-times", type=int, default=201)
    ap.add_argument("--child", default=None)
    ap.add_argument("--L", type=int, default=0)
    args = ap.parse_args(argv)
    if args.child:
        _child(args)
        return
    sizes = args.sizes or ([16, 20] if args.quick else [24, 28, 30, 32])
    print(machine_line())
    # lookup methods at the smallest size run
    lk = _spawn("lookup", sizes[0] if args.quick else min(sizes[0], 24), 2)
    print(f"# lookup, L = {lk['L']}, sector dim {lk['dim']:,} (k=0, R=+, F=+), one matvec (median of 5):")
    print_table(["method", "matvec_s", "ns/state", "table_MiB"],
                [[m, f"{lk[f'matvec_{m}_s']:.4f}", f"{1e9 * lk[f'matvec_{m}_s'] / lk['dim']:.0f}",
                  f"{lk[f'table_{m}_bytes'] / 2**20:.1f}"] for m in ("bisect", "block", "rank")]
                + [["u1 (dim %d)" % lk["u1_dim"], f"{lk['matvec_u1_s']:.4f}",
                    f"{1e9 * lk['matvec_u1_s'] / lk['u1_dim']:.0f}", "-"]])
    print(f"# orbit enumeration: {lk['enumerate_s']:.2f} s")
    rows, res = [], {}
    for L in sizes:
        s = _spawn("sectors", L, args.n_times)
        u = _spawn("u1", L, args.n_times) if L <= args.u1_max else None
        diff = max(abs(a - b) for a, b in zip(s["curve"], u["curve"])) if u else None
        res[L] = (s, u)
        rows.append([L, "+".join(str(d) for d in s["dims"]), f"{s['seconds']:.1f}", f"{s['peak_bytes'] / 2**30:.2f}",
                     f"{u['seconds']:.1f}" if u else "-", f"{u['peak_bytes'] / 2**30:.2f}" if u else "-",
                     f"{u['seconds'] / s['seconds']:.1f}" if u else "-", f"{diff:.1e}" if diff is not None else "-"])
    print_table(["L", "sector dims", "sectors_s", "sectors_GiB", "u1_s", "u1_GiB", "speedup", "max|diff|"], rows)
    s32 = res.get(32, (None, None))[0]
    s24, u24 = res.get(24, (None, None))
    emit_json({
        "seconds_L32": s32["seconds"] if s32 else None,
        "peak_gib_L32": s32["peak_bytes"] / 2**30 if s32 else None,
        "speedup_vs_u1_L24": (u24["seconds"] / s24["seconds"]) if (s24 and u24) else None,
        "lookup": {k: v for k, v in lk.items()},
        "sizes": {str(L): {"sectors_s": s["seconds"], "sectors_peak_gib": s["peak_bytes"] / 2**30,
                           "u1_s": u["seconds"] if u else None,
                           "u1_peak_gib": u["peak_bytes"] / 2**30 if u else None} for L, (s, u) in res.items()},
    })


if __name__ == "__main__":
    main()
