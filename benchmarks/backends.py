"""numba (CPU) against jax (CPU or GPU): matrix-vector product and a short Chebyshev evolution.

J1-J2 XXZ ring (j2 = 0.3, away from the Majumdar-Ghosh point), zero-magnetization sector, complex
vectors.  Both backends run in this process, side by side, on the same operator and vectors;
the table gives medians and the ratio jax / numba (> 1: jax slower).  The last line is a JSON
object with ``<device>_ratio_jax_over_numba`` (matvec) for the largest L.

    python benchmarks/backends.py --quick            # CPU, L = 20, 22, 24
    python benchmarks/backends.py                    # CPU, L = 20 .. 26
    python benchmarks/backends.py --device gpu       # jax on the GPU, L = 26, 28, 30 (numba on the host)

Evolution: psi(0) = Neel state, output times 0, t/2, t (``--t-evolve``, default 1.0), bounds from
one Lanczos run shared by both backends (not timed), tolerance 1e-10; jax is timed after one
warm-up run (its compile time is reported separately).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from math import comb


def _parse():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--device", choices=("cpu", "gpu"), default="cpu", help="where jax runs (numba always on the CPU)")
    ap.add_argument("--quick", action="store_true", help="CPU: L = 20, 22, 24; GPU: L = 26, 28")
    ap.add_argument("--sizes", type=int, nargs="+", default=None, help="chain lengths (overrides the defaults)")
    ap.add_argument("--repeats", type=int, default=7, help="matvec repeats (median)")
    ap.add_argument("--evolve-repeats", type=int, default=3, help="evolution repeats (median)")
    ap.add_argument("--t-evolve", type=float, default=1.0, help="evolution time (inverse energy units)")
    ap.add_argument("--complex64", action="store_true", help="also time jax with complex64 vectors")
    return ap.parse_args()


ARGS = _parse()
# jax reads these when it initialises: set them before the first import
if ARGS.device == "cpu":
    os.environ.setdefault("JAX_PLATFORMS", "cpu")
else:
    os.environ.setdefault("XLA_PYTHON_CLIENT_PREALLOCATE", "false")

import numpy as np  # noqa: E402
import psutil  # noqa: E402

from _common import emit_json, j1j2_ring, machine_line, median_time, print_table  # noqa: E402
from largeq.backends import get_backend  # noqa: E402
from largeq.basis.spaces import magnetization_basis  # noqa: E402
from largeq.engines.bounds import spectral_bounds  # noqa: E402
from largeq.engines.propagate import evolve  # noqa: E402
from largeq.operators.pauli_operator import PauliOperator  # noqa: E402


def run(L: int, jb, args) -> dict:
    import jax

    basis = magnetization_basis(L, L // 2)
    H = j1j2_ring(L)
    nop = PauliOperator(H, basis)
    t = time.perf_counter()
    jop = jb.JaxPauliOperator(H, basis)
    build = time.perf_counter() - t
    rng = np.random.default_rng(1)
    x = rng.standard_normal(basis.dim) + 1j * rng.standard_normal(basis.dim)
    y = np.empty_like(x)
    numba_mv = median_time(lambda: nop.fused_update(x, y), args.repeats)
    xd = jop.to_device(x)
    t = time.perf_counter()
    yd = jop.apply(xd).block_until_ready()
    compile_mv = time.perf_counter() - t
    jax_mv = median_time(lambda: jop.apply(xd).block_until_ready(), args.repeats)
    dev_mv = float(np.max(np.abs(np.asarray(yd) - y)) / np.max(np.abs(y)))
    del yd
    row = {"L": L, "dim": basis.dim, "numba_mv_s": numba_mv, "jax_mv_s": jax_mv, "mv_ratio": jax_mv / numba_mv,
           "jax_build_s": build, "jax_mv_compile_s": compile_mv, "mv_rel_dev": dev_mv}
    if args.complex64:
        j32 = jb.JaxPauliOperator(H, basis, dtype=np.complex64)
        x32 = j32.to_device(x)
        j32.apply(x32).block_until_ready()
        row["jax_c64_mv_s"] = median_time(lambda: j32.apply(x32).block_until_ready(), args.repeats)
        del j32, x32
    # short evolution from the Neel state
    neel = sum(1 << j for j in range(0, L, 2))
    psi0 = np.zeros(basis.dim, complex)
    psi0[basis.index([neel])[0]] = 1.0
    bounds = spectral_bounds(nop)
    times = np.linspace(0.0, args.t_evolve, 3)
    last = {}

    def ev_numba():
        last["numba"] = evolve(nop, psi0, times, method="chebyshev", bounds=bounds, tol=1e-10, block=1,
                               on_output=lambda i, t, p: last.__setitem__("numba_psi", p.copy()) if i == 2 else None)

    def ev_jax():
        last["jax"] = jb.evolve_jax(jop, psi0, times, bounds, 1e-10,
                                    on_output=lambda i, t, p: last.__setitem__("jax_psi", p) if i == 2 else None)
        last["jax_psi"].block_until_ready()

    numba_ev = median_time(ev_numba, args.evolve_repeats, warmup=0)
    t = time.perf_counter()
    ev_jax()
    first = time.perf_counter() - t
    jax_ev = median_time(ev_jax, args.evolve_repeats, warmup=0)
    assert last["jax"].orders == last["numba"].orders
    row.update({"numba_ev_s": numba_ev, "jax_ev_s": jax_ev, "ev_ratio": jax_ev / numba_ev,
                "jax_ev_compile_s": max(first - jax_ev, 0.0), "matvecs": last["numba"].matvecs,
                "ev_dev": float(np.max(np.abs(np.asarray(last["jax_psi"]) - last["numba_psi"])))})
    jax.clear_caches()
    return row


def main() -> None:
    args = ARGS
    try:
        jb_backend = get_backend("jax")
    except ImportError as exc:
        sys.exit(str(exc))
    import jax

    import largeq.backends.jax_backend as jb

    platform = jax.default_backend()
    if args.device == "gpu" and platform != "gpu":
        sys.exit(f"--device gpu: jax sees no GPU (default backend {platform!r}); install jax[cuda12]")
    if args.sizes:
        sizes = args.sizes
    elif args.device == "gpu":
        sizes = [26, 28] if args.quick else [26, 28, 30]
    else:
        sizes = [20, 22, 24] if args.quick else [20, 22, 24, 26]
    print(machine_line())
    print(f"# jax {jax.__version__}, backend {platform}, devices {jax.devices()}; operator {jb_backend.operator.__name__}")
    rows = []
    for L in sizes:
        dim = comb(L, L // 2)
        need = 10 * dim * 16 + 2 * dim * 8  # ~10 complex vectors over both backends + states and diagonal
        if need > 0.8 * psutil.virtual_memory().available:
            print(f"# L = {L}: would need ~{need / 2**30:.1f} GiB of host memory; skipped")
            continue
        rows.append(run(L, jb, args))
        r = rows[-1]
        print(f"# L = {L} done: matvec rel. deviation {r['mv_rel_dev']:.1e}, evolved state deviation "
              f"{r['ev_dev']:.1e}, {r['matvecs']} products", flush=True)
    headers = ["L", "dim", "numba_mv_ms", "jax_mv_ms", "jax/numba", "numba_ev_s", "jax_ev_s", "jax/numba_ev",
               "mv_compile_s", "ev_compile_s"]
    table = [(r["L"], f"{r['dim']:,}", f"{r['numba_mv_s'] * 1e3:.1f}", f"{r['jax_mv_s'] * 1e3:.1f}",
              f"{r['mv_ratio']:.2f}", f"{r['numba_ev_s']:.2f}", f"{r['jax_ev_s']:.2f}", f"{r['ev_ratio']:.2f}",
              f"{r['jax_mv_compile_s']:.2f}", f"{r['jax_ev_compile_s']:.2f}") for r in rows]
    if args.complex64:
        headers.append("jax_c64_mv_ms")
        table = [t + (f"{r['jax_c64_mv_s'] * 1e3:.1f}",) for t, r in zip(table, rows)]
    print_table(headers, table)
    last = rows[-1]
    emit_json({
        "L": last["L"],
        "device": args.device,
        f"{args.device}_ratio_jax_over_numba": round(last["mv_ratio"], 3),
        f"{args.device}_evolve_ratio_jax_over_numba": round(last["ev_ratio"], 3),
        "matvec_rel_deviation": last["mv_rel_dev"],
        "jax_version": jax.__version__,
    })


if __name__ == "__main__":
    main()
