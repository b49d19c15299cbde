"""Relaxation curve: largeq's propagation against scipy's expm_multiply on the same sector.

Néel quench of the J1-J2 XXZ ring (j2 = 0.3, delta = 1), staggered magnetization on a grid
t = 0 .. t_max with 201 output times (dt = 0.1), zero-magnetization sector.  Each method runs in
its own subprocess so that its peak memory (VmHWM) is its own.  The peer is
scipy.sparse.linalg.expm_multiply applied output step by output step to the complex CSR matrix
-iH of the same sector (its natural use; asking it for all 201 vectors at once holds them all).

    python benchmarks/evolve.py --quick             # L = 20, 22 (under a minute of our time)
    python benchmarks/evolve.py                     # L = 20, 22, 24, 26, 28 (ours); peer up to --peer-max-L
    python benchmarks/evolve.py --sizes 28 --no-peer

The last line is a JSON object with speedup_vs_expm_multiply, memory_ratio_vs_expm_multiply
(peak memory ratio, ours / theirs) and max_abs_deviation for the largest L where both ran, and
seconds_L28 when L = 28 was run.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent


def child(method: str, L: int, t_max: float, points: int, out: str, block: int) -> None:
    sys.path.insert(0, str(HERE))
    from _common import j1j2_ring, peak_rss_bytes
    from largeq.basis.spaces import magnetization_basis
    from largeq.operators.pauli_operator import PauliOperator
    from largeq.model.pauli import PauliSum
    from largeq.basis.states import basis_state

    times = np.linspace(0.0, t_max, points)
    basis = magnetization_basis(L, L // 2)
    H = PauliOperator(j1j2_ring(L), basis)
    stag = np.zeros(L)
    stag[:] = [(-1) ** j / L for j in range(L)]
    zs = PauliSum(L, np.zeros(L, np.int64), 1 << np.arange(L, dtype=np.int64), stag)
    A = PauliOperator(zs, basis)
    neel = sum(1 << j for j in range(0, L, 2))
    psi = basis_state(basis, neel)
    curve = np.zeros(points)
    t0 = time.perf_counter()
    if method == "ours":
        from largeq.engines.propagate import evolve

        def record(i, t, v):
            curve[i] = A.expectation(v)

        stats = evolve(H, psi, times, tol=1e-10, block=block, on_output=record)
        extra = {"matvecs": stats.matvecs, "block": block}
    else:
        from scipy.sparse.linalg import expm_multiply

        tb = time.perf_counter()
        M = (-1j * H.to_csr(max_dim=10**9)).tocsr()
        build = time.perf_counter() - tb
        curve[0] = A.expectation(psi)
        v = psi
        for i in range(1, points):
            dt = times[i] - times[i - 1]
            v = expm_multiply(M * dt, v, traceA=0.0)  # Tr(H) = 0 for this ring
            curve[i] = A.expectation(v)
        extra = {"csr_build_s": build}
    wall = time.perf_counter() - t0
    np.save(out, curve)
    print(json.dumps({"wall": wall, "peak": peak_rss_bytes(), **extra}))


def run_child(method, L, t_max, points, block) -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        out = str(Path(tmp) / "curve.npy")
        r = subprocess.run([sys.executable, __file__, "--child", method, str(L), str(t_max), str(points), out,
                            str(block)], capture_output=True, text=True)
        if r.returncode != 0:
            raise RuntimeError(f"{method} L={L} failed:\n{r.stderr[-2000:]}")
        info = json.loads(r.stdout.strip().splitlines()[-1])
        info["curve"] = np.load(out)
    return info


def main() -> None:
    if len(sys.argv) > 1 and sys.argv[1] == "--child":
        _, _, method, L, t_max, points, out, block = sys.argv
        child(method, int(L), float(t_max), int(points), out, int(block))
        return
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="L = 20, 22")
    ap.add_argument("--sizes", type=int, nargs="+", default=None)
    ap.add_argument("--t-max", type=float, default=20.0)
    ap.add_argument("--points", type=int, default=201)
    ap.add_argument("--block", type=int, default=8, help="output times per Chebyshev expansion")
    ap.add_argument("--peer-max-L", type=int, default=22,
                    help="largest L for the expm_multiply peer (it needs ~20 min for the full grid at L = 24)")
    ap.add_argument("--peer-t-max", type=float, default=None,
                    help="run both methods on a shorter grid (same dt) for the comparison at large L")
    ap.add_argument("--no-peer", action="store_true")
    args = ap.parse_args()
    sys.path.insert(0, str(HERE))
    from _common import emit_json, machine_line, print_table

    sizes = args.sizes or ([20, 22] if args.quick else [20, 22, 24, 26, 28])
    print(machine_line())
    rows, result = [], {}
    for L in sizes:
        ours = run_child("ours", L, args.t_max, args.points, args.block)
        row = {"L": L, "ours_s": ours["wall"], "ours_peak": ours["peak"], "matvecs": ours["matvecs"]}
        if L == 28:
            result["seconds_L28"] = round(ours["wall"], 1)
            result["peak_gib_L28"] = round(ours["peak"] / 2**30, 2)
        if not args.no_peer and L <= args.peer_max_L:
            t_cmp = args.peer_t_max or args.t_max
            n_cmp = int(round(t_cmp / (args.t_max / (args.points - 1)))) + 1
            mine = ours if t_cmp == args.t_max else run_child("ours", L, t_cmp, n_cmp, args.block)
            peer = run_child("scipy", L, t_cmp, n_cmp, args.block)
            dev = float(np.max(np.abs(mine["curve"] - peer["curve"])))
            row.update(peer_s=peer["wall"], peer_peak=peer["peak"], speedup=peer["wall"] / mine["wall"],
                       mem_ratio=mine["peak"] / peer["peak"], dev=dev, t_cmp=t_cmp, csr_build_s=peer["csr_build_s"])
            result.update(L=L, speedup_vs_expm_multiply=round(row["speedup"], 2),
                          memory_ratio_vs_expm_multiply=round(row["mem_ratio"], 3), max_abs_deviation=dev,
                          compared_t_max=t_cmp)
        rows.append(row)
        print(f"# L = {L} done", flush=True)
    fmt = lambda v, f: ("-" if v is None else format(v, f))  # noqa: E731
    print_table(["L", "ours_s", "ours_peak_GiB", "matvecs", "peer_t_max", "ours_s(cmp)", "peer_s", "speedup",
                 "peer_peak_GiB", "mem_ratio", "max_dev"],
                [(r["L"], fmt(r["ours_s"], ".1f"), fmt(r["ours_peak"] / 2**30, ".2f"), r["matvecs"],
                  fmt(r.get("t_cmp"), "g"), "-" if "t_cmp" not in r else fmt(r["peer_s"] / r["speedup"], ".1f"),
                  fmt(r.get("peer_s"), ".1f"), fmt(r.get("speedup"), ".1f"),
                  fmt(r.get("peer_peak", 0) / 2**30 if "peer_peak" in r else None, ".2f"),
                  fmt(r.get("mem_ratio"), ".3f"), fmt(r.get("dev"), ".1e")) for r in rows])
    emit_json(result)


if __name__ == "__main__":
    main()
