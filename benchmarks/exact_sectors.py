"""Exact equilibration of the Neel quench in the J1-J2 ring (built-in example ``neel_j1j2``) block by block.

d_eff, <A>_inf and sigma_A^2 of the demo's four observables by dense diagonalization of the symmetry
blocks the Neel state touches (``largeq.analysis.equilibration.exact_equilibration``, level statistics
off).  Each size runs in its own subprocess: wall time and peak resident memory (VmHWM) per size.

    python benchmarks/exact_sectors.py               # L = 16, 18, 20
    python benchmarks/exact_sectors.py --with-22     # also L = 22 (tens of minutes on 2 cores)
    python benchmarks/exact_sectors.py --sizes 20    # any sizes

Last line: JSON {"L": {"seconds": ..., "peak_gib": ..., "d_eff": ..., "blocks": [...]}}.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

from _common import emit_json, machine_line, peak_rss_bytes, print_table  # noqa: E402


def run_one(L: int, max_dim: int) -> dict:
    from largeq.analysis.equilibration import exact_equilibration, exact_plan
    from largeq.cli import builtin_examples
    from largeq.operators.problem import build_problem
    from largeq.scenario.spec import load_scenario

    t0 = time.perf_counter()
    scenario = load_scenario(builtin_examples()["neel_j1j2"]).with_length(L)
    problem = build_problem(scenario)
    plan = exact_plan(problem)
    t_plan = time.perf_counter() - t0
    ex = exact_equilibration(problem, max_dim=max_dim, level_statistics=False, plan=plan)
    seconds = time.perf_counter() - t0
    return {"L": L, "seconds": seconds, "plan_seconds": t_plan, "peak_gib": peak_rss_bytes() / 2**30,
            "forecast_gib": plan.memory_bytes / 2**30, "d_eff": ex.d_eff, "blocks": list(ex.block_dims),
            "basis_dim": ex.basis_dim,
            "observables": {n: {"equilibrium": o.equilibrium, "variance": o.variance}
                            for n, o in ex.observables.items()}}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="*", default=None)
    ap.add_argument("--with-22", action="store_true", help="add L = 22")
    ap.add_argument("--max-dim", type=int, default=30000)
    ap.add_argument("--one", type=int, default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.one is not None:
        print(json.dumps(run_one(args.one, args.max_dim)))
        return
    sizes = args.sizes or ([16, 18, 20] + ([22] if args.with_22 else []))
    print(machine_line())
    rows, out = [], {}
    for L in sizes:
        p = subprocess.run([sys.executable, __file__, "--one", str(L), "--max-dim", str(args.max_dim)],
                           capture_output=True, text=True)
        if p.returncode != 0:
            print(p.stderr[-2000:])
            rows.append((L, "failed", "", "", "", ""))
            continue
        r = json.loads(p.stdout.strip().splitlines()[-1])
        out[str(L)] = r
        rows.append((L, f"{r['basis_dim']:,}", "+".join(f"{d:,}" for d in r["blocks"]), f"{r['seconds']:.1f}",
                     f"{r['peak_gib']:.2f} (forecast {r['forecast_gib']:.2f})", f"{r['d_eff']:.6g}"))
        for n, o in r["observables"].items():
            print(f"  L = {L}: {n}: <A>_inf = {o['equilibrium']:.8g}, sigma^2 = {o['variance']:.4g}")
        print_table(["L", "basis dim", "blocks", "wall s", "peak GiB", "d_eff"], rows)
    emit_json(out)


if __name__ == "__main__":
    main()
