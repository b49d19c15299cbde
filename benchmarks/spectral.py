"""KPM spectra (``largeq spectra``) against dense diagonalization, wall time and peak memory.

J1-J2 Heisenberg ring (j2 = 0.3, the built-in ``neel_j1j2`` scenario), zero-magnetization sector,
Neel start: the LDOS of the Neel state and the DOS from 1024 moments and R = 4 random vectors,
end to end through ``run_spectra`` (bounds, LDOS, DOS, files).  Dense reference:
numpy.linalg.eigvalsh of the dense sector matrix, at the sizes where it fits in memory.
Every measurement runs in its own subprocess so that each peak resident memory (VmHWM)
is that size's alone.

    python benchmarks/spectral.py            # KPM at L = 20, 22, 24, 26; dense at L = 12, 14, 16
    python benchmarks/spectral.py --quick    # KPM at L = 16, 18, 20; dense at L = 12, 14 (under a minute)
    python benchmarks/spectral.py --sizes 20 22 24

The last line is a JSON object with seconds_L24_dos (null when L = 24 was not run) and
dense_max_L (largest even L whose dense diagonalization fits this machine by the planner's
forecast, 3 D^2 complex numbers plus overhead).
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from math import comb
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from _common import emit_json, machine_line, peak_rss_bytes, print_table  # noqa: E402

MOMENTS = 1024
VECTORS = 4


def _one_kpm(L: int) -> dict:
    from largeq.scenario import resolve_scenario
    from largeq.workflows.planning import kpm_forecast
    from largeq.workflows.spectra import SpectraOptions, run_spectra

    scen = resolve_scenario("neel_j1j2", L)
    with tempfile.TemporaryDirectory() as tmp:
        t = time.perf_counter()
        run = run_spectra(scen, Path(tmp) / "run", SpectraOptions(moments=MOMENTS, vectors=VECTORS, seed=1,
                                                                   progress=False))
        wall = time.perf_counter() - t
    s = run.summary
    return {"L": L, "dim": s["dimension"], "wall": wall, "dos": s["timings"]["dos_seconds"],
            "ldos": s["timings"]["ldos_seconds"], "bounds": s["timings"]["bounds_seconds"],
            "peak": peak_rss_bytes(), "forecast": kpm_forecast(s["dimension"], L).total_bytes,
            "e_state": s["state_energy"], "res": s["resolution_at_state"]}


def _one_dense(L: int) -> dict:
    import numpy as np

    from largeq.scenario import resolve_scenario
    from largeq.operators.problem import build_problem

    problem = build_problem(resolve_scenario("neel_j1j2", L))
    t = time.perf_counter()
    H = problem.operator.to_dense(max_dim=10**6)
    build = time.perf_counter() - t
    t = time.perf_counter()
    evals = np.linalg.eigvalsh(H)
    eig = time.perf_counter() - t
    return {"L": L, "dim": int(evals.size), "build": build, "eig": eig, "peak": peak_rss_bytes(),
            "e0": float(evals[0])}


def _in_subprocess(kind: str, L: int) -> dict:
    cmd = [sys.executable, str(Path(__file__).resolve()), "--one", kind, str(L)]
    out = subprocess.run(cmd, check=True, capture_output=True, text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def _median(rows: list[dict], key: str) -> float:
    vals = sorted(r[key] for r in rows)
    return vals[len(vals) // 2]


def dense_max_L(available: int) -> int:
    from largeq.workflows.planning import exact_forecast

    best = 0
    for L in range(4, 40, 2):
        if exact_forecast(comb(L, L // 2)).total_bytes <= 0.9 * available:
            best = L
        else:
            break
    return best


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="KPM at L = 16, 18, 20 and dense at L = 12, 14")
    ap.add_argument("--sizes", type=int, nargs="+", default=None, help="KPM chain lengths (overrides the default)")
    ap.add_argument("--dense-sizes", type=int, nargs="+", default=None, help="dense chain lengths")
    ap.add_argument("--one", nargs=2, metavar=("KIND", "L"), help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.one:
        kind, L = args.one[0], int(args.one[1])
        print(json.dumps(_one_kpm(L) if kind == "kpm" else _one_dense(L)))
        return

    import psutil

    from largeq.workflows.planning import exact_forecast, format_bytes

    sizes = args.sizes or ([16, 18, 20] if args.quick else [20, 22, 24, 26])
    dense_sizes = args.dense_sizes or ([12, 14] if args.quick else [12, 14, 16])
    avail = int(psutil.virtual_memory().available)
    dmax = dense_max_L(avail)
    print(machine_line())
    print(f"# J1-J2 ring j2 = 0.3, Neel start, zero-magnetization sector; KPM: {MOMENTS} moments, R = {VECTORS} "
          f"real random vectors, Jackson kernel; each row measured in its own subprocess")
    print(f"# available memory {format_bytes(avail)}; dense diagonalization fits up to L = {dmax} by the forecast "
          f"(L = {dmax + 2} would need {format_bytes(exact_forecast(comb(dmax + 2, dmax // 2 + 1)).total_bytes)})")

    dense = {}
    for L in dense_sizes:
        if L > dmax:
            print(f"# dense L = {L} skipped: over the memory forecast")
            continue
        reps = 3 if comb(L, L // 2) <= 5000 else 1
        rows = [_in_subprocess("dense", L) for _ in range(reps)]
        dense[L] = {"dim": rows[0]["dim"], "eig": _median(rows, "eig"), "build": _median(rows, "build"),
                    "peak": max(r["peak"] for r in rows), "n": reps, "e0": rows[0]["e0"]}
    kpm = {}
    for L in sorted(set(sizes) | set(dense)):
        reps = 3 if comb(L, L // 2) <= 20000 else 1
        rows = [_in_subprocess("kpm", L) for _ in range(reps)]
        kpm[L] = {k: _median(rows, k) for k in ("wall", "dos", "ldos", "bounds")}
        kpm[L].update(dim=rows[0]["dim"], peak=max(r["peak"] for r in rows), forecast=rows[0]["forecast"], n=reps)
        print(f"# L = {L} done: {kpm[L]['wall']:.1f} s", flush=True)

    # dense cost extrapolated as D^3 from the largest measured size (time) and 8 D^2 bytes (memory)
    ref_L = max(dense) if dense else None
    table = []
    for L in sorted(kpm):
        k = kpm[L]
        D = k["dim"]
        if L in dense:
            d_time, d_note = dense[L]["eig"], f"{dense[L]['eig']:.3g}"
            d_mem = format_bytes(dense[L]["peak"])
        elif ref_L is not None:
            d_time = dense[ref_L]["eig"] * (D / dense[ref_L]["dim"]) ** 3
            d_note = f"~{d_time:.3g} (D^3 extrap.)"
            d_mem = f"~{format_bytes(exact_forecast(D).total_bytes)} (forecast)"
        else:
            d_time, d_note, d_mem = float("nan"), "n/a", "n/a"
        table.append([L, f"{D:,}", k["n"], f"{k['ldos']:.3g}", f"{k['dos']:.3g}", f"{k['wall']:.3g}",
                      format_bytes(k["peak"]), format_bytes(k["forecast"]), d_note, d_mem,
                      f"{d_time / k['wall']:.3g}" if d_time == d_time else "n/a"])
    print_table(["L", "dim", "runs", "ldos_s", "dos_s", "total_s", "peak_rss", "forecast", "dense_eig_s",
                 "dense_peak", "dense/kpm"], table)
    emit_json({
        "seconds_L24_dos": kpm[24]["dos"] if 24 in kpm else None,
        "seconds_L24_total": kpm[24]["wall"] if 24 in kpm else None,
        "peak_rss_L24_bytes": kpm[24]["peak"] if 24 in kpm else None,
        "dense_max_L": dmax,
        "dense_seconds": {str(L): d["eig"] for L, d in dense.items()},
        "kpm_dos_seconds": {str(L): k["dos"] for L, k in kpm.items()},
        "moments": MOMENTS,
        "vectors": VECTORS,
    })


if __name__ == "__main__":
    main()
