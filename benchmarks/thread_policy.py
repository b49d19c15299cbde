"""Exact equilibration + exact thermal values of ``relax xx_neel`` (L = 16) with and without the dense
thread policy (largeq.engines.threads), alternated in one process; medians and their ratio.

    PYTHONPATH=. python benchmarks/thread_policy.py [reps]
"""

from __future__ import annotations

import statistics
import sys
import time
from contextlib import nullcontext

from largeq.analysis.equilibration import exact_equilibration, exact_thermal_values
from largeq.engines.threads import dense_linear_algebra
from largeq.operators.problem import build_problem
from largeq.scenario import resolve_scenario


def once(problem, ctx) -> float:
    t0 = time.perf_counter()
    with ctx:
        ex = exact_equilibration(problem)
        exact_thermal_values(problem, ex.energy_mean)
    return time.perf_counter() - t0


def main(reps: int = 3) -> None:
    problem = build_problem(resolve_scenario("xx_neel"))
    once(problem, nullcontext())  # warm-up (compilation, symmetry tables)
    times = {"BLAS on all cores": [], "policy (BLAS and numba on one thread)": []}
    for _ in range(reps):
        times["BLAS on all cores"].append(once(problem, nullcontext()))
        times["policy (BLAS and numba on one thread)"].append(once(problem, dense_linear_algebra()))
    med = {k: statistics.median(v) for k, v in times.items()}
    for k, v in times.items():
        print(f"{k:40s} median {med[k]:7.2f} s   runs {', '.join(f'{x:.2f}' for x in v)}")
    a, b = med.values()
    print(f"ratio all cores / policy: {a / b:.2f}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 3)
