"""Neel quench of the J1-J2 XXZ ring (j2 = 0.3) in symmetry sectors vs. the magnetization sector.

The main demo's observables: staggered magnetization, sigma^z_0, the nearest-neighbour zz average and
the bond energy of sites 0, 1 (off-diagonal: evaluated across sectors through covariant parts),
t = 0 .. t_max (default 20, 201 times).  Each size runs in its own subprocess (peak memory from its
VmHWM).  Also measures the representative lookup methods (one matvec per method) and, with
--per-product, the cost of one product and one observable evaluation per sector at given sizes
(for extrapolating to sizes that are not run).

    python benchmarks/symmetric.py --quick                      # L = 16, 20 (under a minute)
    python benchmarks/symmetric.py --sizes 20 22 24 28 --t-max 5 --n-times 26
    python benchmarks/symmetric.py --per-product 24 26 28       # seconds per product, memory, L = 34 estimate

Last line: JSON with seconds_L28, peak_GiB_L28, seconds_L32, peak_gib_L32, speedup_vs_u1_L24
(null where not run).
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


def _observables(L) -> dict:
    """The main demo's observables (neel_j1j2): staggered z, z_0, zz average, bond energy (0, 1) in S units."""
    from largeq.model.pauli import PauliSum, pauli_string

    zz = PauliSum(L, np.zeros(L, np.int64), np.array([(1 << j) | (1 << ((j + 1) % L)) for j in range(L)]),
                  np.full(L, 1.0 / L))
    bond = sum((pauli_string(L, {0: a, 1: a}, 0.25) for a in "YZ"), pauli_string(L, {0: "X", 1: "X"}, 0.25))
    return {"staggered": _observable(L) * (1.0 / L), "z0": pauli_string(L, {0: "Z"}), "zz_nn": zz, "bond01": bond}


def run_symmetric(L: int, n_times: int, t_max: float) -> dict:
    from largeq.engines.sector_evolution import evolve_split

    H = j1j2_ring(L)
    neel = sum(1 << j for j in range(1, L, 2))
    times = np.linspace(0.0, t_max, n_times)
    t0 = time.perf_counter()
    res = evolve_split(H, neel, times, _observables(L), reflection=True, spin_flip=True,
                       block=RELAX_SECTOR_BLOCK, store_observables=True)
    wall = time.perf_counter() - t0
    return {"L": L, "mode": "sectors", "seconds": wall, "peak_bytes": peak_rss_bytes(),
            "dims": [s["dimension"] for s in res["sectors"]], "final": float(res["curves"]["staggered"][-1]),
            "curves": {k: v.tolist() for k, v in res["curves"].items()}}


def run_u1(L: int, n_times: int, t_max: float) -> dict:
    from largeq.basis.spaces import magnetization_basis
    from largeq.engines.propagate import evolve
    from largeq.operators.pauli_operator import PauliOperator
    from largeq.basis.states import basis_state

    H = j1j2_ring(L)
    neel = sum(1 << j for j in range(1, L, 2))
    times = np.linspace(0.0, t_max, n_times)
    t0 = time.perf_counter()
    b = magnetization_basis(L, L // 2)
    op = PauliOperator(H, b)
    obs = {k: PauliOperator(v, b) for k, v in _observables(L).items()}
    curves = {k: np.zeros(n_times) for k in obs}

    def out(i, t, psi):
        for k, o in obs.items():
            curves[k][i] = o.expectation(psi)
    evolve(op, basis_state(b, neel), times, on_output=out)
    wall = time.perf_counter() - t0
    return {"L": L, "mode": "u1", "seconds": wall, "peak_bytes": peak_rss_bytes(), "dims": [b.dim],
            "final": float(curves["staggered"][-1]), "curves": {k: v.tolist() for k, v in curves.items()}}


def run_per_product(L: int) -> dict:
    """Costs of the Neel run at size L without evolving: orbit enumeration, the sectors' matrix-free and
    stored products (median of 3 per sector), one evaluation of the demo observables across sectors,
    table / stored-matrix bytes and the peak memory of the child."""
    from largeq.operators.sector_operator import SymmetricOperator, sector_observables, split_basis_state

    H = j1j2_ring(L)
    neel = sum(1 << j for j in range(1, L, 2))
    t0 = time.perf_counter()
    comps, note = split_basis_state(neel, L, reflection=True, spin_flip=True)
    split_s = time.perf_counter() - t0
    out = {"L": L, "dims": [c.sector.dim for c in comps], "split_s": split_s}
    t0 = time.perf_counter()
    cross = sector_observables([c.sector for c in comps], _observables(L))
    rng = np.random.default_rng(2)
    # random sector vectors: the split components of a basis state have one nonzero entry, and the
    # cross-pair kernel skips zero rows, so they would not show the cost during the evolution
    vecs = [rng.standard_normal(c.sector.dim) + 1j * rng.standard_normal(c.sector.dim) for c in comps]
    out["observables_setup_s"] = time.perf_counter() - t0
    out["observables_eval_s"] = median_time(lambda: cross(vecs), repeats=3)
    t0 = time.perf_counter()
    cross_st = sector_observables([c.sector for c in comps], _observables(L), store=True)
    out["observables_store_build_s"] = time.perf_counter() - t0
    out["observables_stored_bytes"] = cross_st.table_bytes()
    out["observables_stored_eval_s"] = median_time(lambda: cross_st(vecs), repeats=3)
    cross_st = None  # freed before the sector products are timed
    mf, st, stored_bytes = 0.0, 0.0, 0
    for c in comps:
        op = SymmetricOperator(H, c.sector, check=False)
        x = rng.standard_normal(c.sector.dim) + 0j
        y = np.empty_like(x)
        mf += median_time(lambda: op.fused_update(x, y), repeats=3)
        t0 = time.perf_counter()
        so = op.stored()
        out.setdefault("store_build_s", 0.0)
        out["store_build_s"] += time.perf_counter() - t0
        st += median_time(lambda: so.fused_update(x, y), repeats=3)
        stored_bytes += so.table_bytes()
        so = None
    out.update(product_free_s=mf, product_stored_s=st, stored_bytes=stored_bytes, peak_bytes=peak_rss_bytes())
    return out


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
        print(json.dumps(run_symmetric(args.L, args.n_times, args.t_max)))
    elif args.child == "perprod":
        print(json.dumps(run_per_product(args.L)))
    else:
        print(json.dumps(run_u1(args.L, args.n_times, args.t_max)))


def _spawn(kind: str, L: int, n_times: int, t_max: float = 20.0) -> dict:
    cmd = [sys.executable, os.path.abspath(__file__), "--child", kind, "--L", str(L), "--n-times", str(n_times),
           "--t-max", str(t_max)]
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
    ap.add_argument("--t-max", type=float, default=20.0)
    ap.add_argument("--per-product", type=int, nargs="*", default=None,
                    help="sizes for the per-product costs and the L = 34 extrapolation (no evolution)")
    ap.add_argument("--skip-lookup", action="store_true")
    ap.add_argument("--child", default=None)
    ap.add_argument("--L", type=int, default=0)
    args = ap.parse_args(argv)
    if args.child:
        _child(args)
        return
    print(machine_line())
    if args.per_product:
        per_product(args.per_product)
        return
    sizes = args.sizes or ([16, 20] if args.quick else [20, 22, 24, 28])
    # lookup methods at the smallest size run
    lk = _spawn("lookup", sizes[0] if args.quick else min(sizes[0], 24), 2) if not args.skip_lookup else None
    if lk is not None:
        _print_lookup(lk)
    rows, res = [], {}
    for L in sizes:
        s = _spawn("sectors", L, args.n_times, args.t_max)
        u = _spawn("u1", L, args.n_times, args.t_max) if L <= args.u1_max else None
        diff = max(max(abs(a - b) for a, b in zip(s["curves"][k], u["curves"][k])) for k in s["curves"]) if u else None
        res[L] = (s, u)
        rows.append([L, "+".join(str(d) for d in s["dims"]), f"{s['seconds']:.1f}", f"{s['peak_bytes'] / 2**30:.2f}",
                     f"{u['seconds']:.1f}" if u else "-", f"{u['peak_bytes'] / 2**30:.2f}" if u else "-",
                     f"{u['seconds'] / s['seconds']:.1f}" if u else "-",
                     f"{u['peak_bytes'] / s['peak_bytes']:.1f}" if u else "-", f"{diff:.1e}" if diff is not None else "-"])
    print(f"# Neel quench, t = 0 .. {args.t_max:g} ({args.n_times} times), 4 observables (bond energy included); "
          "peak = child VmHWM (its own peak memory)")
    print_table(["L", "sector dims", "sectors_s", "sectors_GiB", "u1_s", "u1_GiB", "time ratio", "memory ratio",
                 "max|diff|"], rows)
    s28 = res.get(28, (None, None))[0]
    s32 = res.get(32, (None, None))[0]
    s24, u24 = res.get(24, (None, None))
    emit_json({
        "seconds_L28": s28["seconds"] if s28 else None,
        "peak_GiB_L28": s28["peak_bytes"] / 2**30 if s28 else None,
        "seconds_L32": s32["seconds"] if s32 else None,
        "peak_gib_L32": s32["peak_bytes"] / 2**30 if s32 else None,
        "speedup_vs_u1_L24": (u24["seconds"] / s24["seconds"]) if (s24 and u24) else None,
        "t_max": args.t_max, "n_times": args.n_times,
        "lookup": {k: v for k, v in lk.items()} if lk else None,
        "sizes": {str(L): {"sectors_s": s["seconds"], "sectors_peak_gib": s["peak_bytes"] / 2**30,
                           "u1_s": u["seconds"] if u else None,
                           "u1_peak_gib": u["peak_bytes"] / 2**30 if u else None,
                           "max_abs_diff": (max(max(abs(a - b) for a, b in zip(s["curves"][k], u["curves"][k]))
                                                for k in s["curves"]) if u else None)}
                  for L, (s, u) in res.items()},
    })


def per_product(sizes) -> None:
    """Per-product costs at the given sizes and a linear-in-dimension extrapolation to L = 34."""
    from largeq.operators.sector_operator import choose_sectors

    rows, out = [], {}
    for L in sizes:
        r = _spawn("perprod", L, 2)
        out[L] = r
        d = sum(r["dims"])
        rows.append([L, "+".join(str(x) for x in r["dims"]), f"{r['split_s']:.1f}", f"{r['product_free_s']:.3f}",
                     f"{r['product_stored_s']:.3f}", f"{1e9 * r['product_free_s'] / d:.0f}",
                     f"{1e9 * r['product_stored_s'] / d:.0f}", f"{r['observables_eval_s']:.3f}",
                     f"{r['observables_stored_eval_s']:.3f}", f"{r['observables_stored_bytes'] / 2**30:.2f}",
                     f"{r['stored_bytes'] / 2**30:.2f}", f"{r['peak_bytes'] / 2**30:.2f}"])
    print("# Neel, J1-J2 ring, sectors (T, R, F): one product = one fused_update on every touched sector")
    print_table(["L", "sector dims", "split_s", "product_free_s", "product_stored_s", "ns/state free",
                 "ns/state stored", "observables_s", "obs_stored_s", "obs_stored_GiB", "stored_GiB", "peak_GiB"], rows)
    Lr = max(out)
    r = out[Lr]
    neel34 = np.zeros((34, 2)); neel34[np.arange(34), [(j % 2) for j in range(34)]] = 1
    ch = choose_sectors(neel34, conserve_magnetization=True, reflection=True, spin_flip=True)
    d34 = [s["dimension"] for s in ch["sectors"]]
    scale = sum(d34) / sum(r["dims"])
    per_free = r["product_free_s"] * scale
    per_stored = r["product_stored_s"] * scale
    block = 8
    vec_bytes = (4 + 2 * block) * 16 * sum(d34)
    stored = r["stored_bytes"] * scale
    est = {"L": 34, "dims": d34, "from_L": Lr, "product_free_s": per_free, "product_stored_s": per_stored,
           "observables_eval_s": r["observables_eval_s"] * scale,
           "observables_stored_eval_s": r["observables_stored_eval_s"] * scale,
           "observables_stored_GiB": r["observables_stored_bytes"] * scale / 2**30, "vectors_GiB": vec_bytes / 2**30,
           "stored_GiB": stored / 2**30}
    print(f"# L = 34 (dims {'+'.join(str(x) for x in d34)}, exact counts) from L = {Lr}, linear in the dimension: "
          f"{per_free:.1f} s per product matrix-free, {per_stored:.1f} s stored; vectors (block {block}) "
          f"{vec_bytes / 2**30:.1f} GiB, stored matrices {stored / 2**30:.1f} GiB; observables per output time "
          f"{est['observables_eval_s']:.1f} s matrix-free, {est['observables_stored_eval_s']:.1f} s stored "
          f"({est['observables_stored_GiB']:.1f} GiB)")
    emit_json({"per_product": {str(k): v for k, v in out.items()}, "estimate_L34": est})


def _print_lookup(lk) -> None:
    print(f"# lookup, L = {lk['L']}, sector dim {lk['dim']:,} (k=0, R=+, F=+), one matvec (median of 5):")
    print_table(["method", "matvec_s", "ns/state", "table_MiB"],
                [[m, f"{lk[f'matvec_{m}_s']:.4f}", f"{1e9 * lk[f'matvec_{m}_s'] / lk['dim']:.0f}",
                  f"{lk[f'table_{m}_bytes'] / 2**20:.1f}"] for m in ("bisect", "block", "rank")]
                + [["u1 (dim %d)" % lk["u1_dim"], f"{lk['matvec_u1_s']:.4f}",
                    f"{1e9 * lk['matvec_u1_s'] / lk['u1_dim']:.0f}", "-"]])
    print(f"# orbit enumeration: {lk['enumerate_s']:.2f} s")


if __name__ == "__main__":
    main()
