"""``largeq forecast``: what a scenario at a target chain length would need, before running it.

For the scenario at L sites:

* sectors: the exact dimension of every magnetization sector the initial product state touches and its weight
  in it (the distribution of the number of up spins of a product state is Poisson-binomial: the product over
  sites of (q_j + p_j x), p_j = |up amplitude|^2), and the basis largeq would actually use;
* memory per vector and in total for the exact engine (dense, state's symmetric subspace estimated as
  dim / largest stabiliser), Chebyshev and Lanczos evolution and KPM (``largeq.workflows.planning``), with a measured
  interpreter baseline instead of the planner's fixed allowance when calibrated;
* throughput: a short measurement on this machine at a calibration length L_c <= L of the same parity
  (the largest with dimension <= ``CALIBRATION_DIM``, same sector structure): seconds per product
  ``fused_update``, per vector update (axpy), per observable evaluation. Scaling to L:
  t_product(L) = t_product(L_c) x [D(L) T(L)] / [D(L_c) T(L_c)] (D dimension, T Pauli strings of H),
  vector updates x D(L)/D(L_c), observable evaluations x D x strings of each observable;
* spectral half-width a(L) = a(L_c) x sum|coeff H(L)| / sum|coeff H(L_c)| (extensive; Lanczos at L_c);
* products of the requested evolution: per Chebyshev block the order of ``chebyshev_order(a dt, tol)``
  (minus one), plus the Lanczos bounds; predicted wall time = products x t_product + vector updates x t_axpy
  + outputs x (energy, observables, norm and survival overlaps); KPM spectra: N/2 products per vector;
* from a sweep (``--from-sweep DIR``): d_eff and sigma_A at L from its fits, with 1-sigma bands;
* a verdict: fits in this machine's memory or not, the symmetries of the model (and which largeq uses),
  what more memory or cores would change.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
import time
from math import comb
from pathlib import Path

import numpy as np

from largeq.workflows.planning import (COMPLEX, OVERHEAD_BYTES, MemoryForecast, available_bytes,
                                       evolution_forecast, exact_forecast, format_bytes, kpm_forecast,
                                       table_bytes_estimate)
from largeq.scenario.spec import Scenario
from largeq.constants import BOUNDS_SEED

__all__ = ["sector_weights", "calibrate", "Calibration", "predict_evolution", "measure_evolution",
           "measure_baseline_rss", "forecast", "format_forecast", "CALIBRATION_DIM"]

CALIBRATION_DIM = 250_000
BOUNDS_STEPS = 60  # Lanczos steps of the relax job's spectral bounds (engines.bounds default)


# --------------------------------------------------------------------------------------------- sectors
def sector_weights(scenario: Scenario) -> dict:
    """Magnetization sectors the initial product state touches, with exact dimensions and weights.

    Returns ``{'conserves_magnetization', 'sectors': [{'up_spins', 'dimension', 'weight'}], 'full_dimension'}``;
    sectors with weight below 1e-15 are left out.
    """
    from largeq.model import build as model

    L = scenario.n_sites
    H = model.hamiltonian(scenario)
    sym = model.symmetries(scenario, H)
    sp = np.asarray(model.initial_state(scenario).spinors)  # columns: down, up amplitudes
    pu = np.abs(sp[:, 1]) ** 2 / (np.abs(sp[:, 0]) ** 2 + np.abs(sp[:, 1]) ** 2)
    dist = np.array([1.0])
    for p in pu:  # coefficients of prod (q + p x): P(n_up = n)
        dist = np.convolve(dist, [1.0 - p, p])
    sectors = [{"up_spins": n, "dimension": comb(L, n), "weight": float(w)} for n, w in enumerate(dist) if w > 1e-15]
    return {"conserves_magnetization": bool(sym["conserves_magnetization"]), "sectors": sectors,
            "full_dimension": 2**L}


# --------------------------------------------------------------------------------------------- calibration
class Calibration:
    """Measured costs at one calibration length (seconds) and the sizes they scale with."""

    def __init__(self, **kw):
        self.__dict__.update(kw)

    def as_dict(self) -> dict:
        return dict(self.__dict__)


def _timeit(fn, min_seconds: float = 0.25, min_reps: int = 3) -> float:
    fn()  # warm-up (compilation, caches)
    reps, t0 = 0, time.perf_counter()
    while reps < min_reps or time.perf_counter() - t0 < min_seconds:
        fn()
        reps += 1
    return (time.perf_counter() - t0) / reps


def calibration_length(scenario: Scenario, L: int, max_dim: int = CALIBRATION_DIM) -> int:
    """Largest L_c <= L with L_c = L mod 2 (patterns keep their meaning) and basis dimension <= max_dim."""
    from largeq.workflows.planning import plan_run

    best = None
    for Lc in range(L, 3, -2):
        try:
            dim = plan_run(scenario.with_length(Lc), symmetry="off", available=1 << 62).basis_dimension
        except Exception:  # noqa: BLE001 - a length the scenario cannot take
            continue
        if dim <= max_dim:
            best = Lc
            break
    if best is None:
        raise ValueError(f"no calibration length <= {L} with dimension <= {max_dim}")
    return best


def calibrate(scenario: Scenario, L: int, *, max_dim: int = CALIBRATION_DIM) -> Calibration:
    """Time products, vector updates and observable evaluations at the calibration length (see module doc)."""
    from largeq.operators.problem import build_problem
    from largeq.engines.bounds import spectral_bounds
    from largeq.operators.vectors import axpy, vdot

    Lc = calibration_length(scenario, L, max_dim)
    problem = build_problem(scenario.with_length(Lc))
    op = problem.operator
    psi, _ = problem.initial_vector()
    rng = np.random.default_rng(1)
    x = (rng.standard_normal(psi.size) + 1j * rng.standard_normal(psi.size)) / np.sqrt(2 * psi.size)
    y = np.zeros_like(x)
    t_prod = _timeit(lambda: op.fused_update(x, y, 1.0, 0.5, -1.0))
    t_axpy = _timeit(lambda: axpy(1e-3, x, y))
    t_vdot = _timeit(lambda: vdot(x, y))
    t_energy = _timeit(lambda: op.expectation(x))
    t_obs = {n: _timeit(lambda n=n: problem.observable_operator(n).expectation(x)) for n in problem.observables}
    t0 = time.perf_counter()
    b = spectral_bounds(op, rng=np.random.default_rng(BOUNDS_SEED))
    t_bounds = time.perf_counter() - t0
    h = problem.hamiltonian
    return Calibration(
        sites=Lc, dimension=int(problem.basis.dim), terms=int(len(h.coeff)),
        coeff_sum=float(np.sum(np.abs(h.coeff))),
        obs_terms={n: int(len(problem.observables[n].pauli.coeff)) for n in problem.observables},
        half_width=float(b.half_width), center=float(b.center), bounds_steps=int(b.steps),
        seconds_per_product=t_prod, seconds_per_axpy=t_axpy, seconds_per_vdot=t_vdot,
        seconds_per_energy=t_energy, seconds_per_observable=t_obs, bounds_seconds=t_bounds,
    )


# --------------------------------------------------------------------------------------------- prediction
def _block(dim, L, n_times, available, block):
    from largeq.workflows.planning import choose_block

    return int(block) if block else choose_block(dim, L, n_times, available, "chebyshev")


def predict_evolution(scenario: Scenario, cal: Calibration, *, block: int | None = None,
                      available: int | None = None, dimension: int | None = None,
                      vector_bytes: int | None = None) -> dict:
    """Products and wall time of the relax job's evolution at the scenario's length (see the module doc).

    ``dimension``: states evolved (default: the magnetization / full basis; the sum of the sector dimensions on
    the sector path, taken at the calibrated cost per state and term).  ``vector_bytes``: the largest vector one
    product reads (default 16 x dimension; one sector's on the sector path).  When it is larger than the
    calibration's, products, energies and observables are scaled by the measured ratio of random-read times
    from vectors of the two sizes (:func:`largeq.machine.random_read_seconds`; the test vector holds at most
    2 GiB and a quarter of the free memory): a vector that no longer fits in the caches makes every
    scattered read wait for memory (measured here: about 4x per stored entry from L = 30 to L = 34 of the
    Néel sectors).
    Nothing is built at the target length.
    """
    from largeq.engines.propagate import chebyshev_order
    from largeq.model import build as model
    from largeq.workflows.planning import plan_run

    h = model.hamiltonian(scenario)
    observables = model.observables(scenario, h)
    L = scenario.n_sites
    D = int(dimension) if dimension is not None else plan_run(scenario, symmetry="off",
                                                                available=1 << 62).basis_dimension
    terms = int(len(h.coeff))
    a = cal.half_width * float(np.sum(np.abs(h.coeff))) / cal.coeff_sum
    times = scenario.time.times()
    avail = available_bytes() if available is None else int(available)
    B = _block(D, L, times.size, avail, block)
    tol = scenario.numerics.tolerance
    products = axpys = 0
    i, n = 0, times.size
    while i < n - 1:
        j = min(n - 1, (i // B + 1) * B)
        orders = [chebyshev_order(a * float(times[k] - times[i]), tol)[0] for k in range(i + 1, j + 1)]
        products += max(orders) - 1
        axpys += sum(orders)  # c_0 scaling and one update per kept term, per output of the block
        i = j
    sd = D / cal.dimension
    reads = _read_factor(16 * cal.dimension, 16 * D if vector_bytes is None else int(vector_bytes))
    t_prod = cal.seconds_per_product * sd * terms / cal.terms * reads["factor"]
    t_axpy = cal.seconds_per_axpy * sd
    t_vdot = cal.seconds_per_vdot * sd
    t_energy = cal.seconds_per_energy * sd * terms / cal.terms * reads["factor"]
    obs_terms = {nm: int(len(o.pauli.coeff)) for nm, o in observables.items()}
    t_obs = reads["factor"] * sum(cal.seconds_per_observable[nm] * sd * obs_terms[nm] / max(cal.obs_terms[nm], 1)
                                  for nm in obs_terms)
    t_output = t_energy + t_obs + 3 * t_vdot  # norm, survival overlap, per-step norm check
    bounds_products = BOUNDS_STEPS
    seconds = (products * t_prod + axpys * t_axpy + times.size * t_output
               + bounds_products * (t_prod + 4 * t_axpy))
    return {"sites": L, "dimension": D, "terms": terms, "half_width": a, "t_max": float(times[-1]), "block": B, "outputs": int(times.size),
            "products": int(products), "vector_updates": int(axpys), "bounds_products": bounds_products,
            "seconds_per_product": t_prod, "seconds_per_output": t_output, "seconds": seconds,
            "tolerance": tol, "random_reads": reads}


def _read_factor(cal_bytes: int, target_bytes: int) -> dict:
    """How much slower scattered reads are from the target's vector than from the calibration's (>= 1).

    Measured only when the target's vector is larger than twice the calibration's and than half the
    last-level cache (32 MiB where the cache size is unknown): below that it stays cached like the
    calibration's, and the ratio would only be noise.  The test vector is at most 2 GiB (far beyond any
    cache) and a quarter of the memory free now."""
    from largeq.machine import available_bytes as free_now, last_level_cache_bytes, random_read_seconds

    llc = last_level_cache_bytes()
    out = {"calibration_vector_bytes": int(cal_bytes), "target_vector_bytes": int(target_bytes), "factor": 1.0,
           "measured_bytes": None, "last_level_cache_bytes": llc}
    if target_bytes <= max(2 * cal_bytes, (llc if llc else 64 << 20) // 2):
        return out
    size = int(min(target_bytes, free_now() // 4, 1 << 31))
    t_cal = random_read_seconds(cal_bytes)
    t_big = random_read_seconds(size)
    out.update(factor=max(1.0, t_big / t_cal), measured_bytes=size, seconds_per_read_calibration=t_cal,
               seconds_per_read_target=t_big)
    return out


def predict_kpm(dim_scale_product: float, n_moments: int = 256, n_vectors: int = 20, t_vdot: float = 0.0) -> dict:
    """KPM LDOS + stochastic DOS: N/2 products per vector (moment doubling) for 1 + R vectors."""
    products = (n_moments // 2) * (1 + n_vectors)
    return {"n_moments": n_moments, "n_vectors": n_vectors, "products": products,
            "seconds": products * (dim_scale_product + 2 * t_vdot)}


def measure_evolution(scenario: Scenario, *, block: int | None = None, available: int | None = None) -> dict:
    """Run what :func:`predict_evolution` predicts (bounds + evolution + observables at every output)."""
    from largeq.operators.problem import build_problem
    from largeq.engines.bounds import spectral_bounds
    from largeq.engines.propagate import evolve
    from largeq.workflows.planning import PeakRSS
    from largeq.operators.vectors import vdot

    with PeakRSS() as peak:
        problem = build_problem(scenario)
        op = problem.operator
        psi, _ = problem.initial_vector()
        times = scenario.time.times()
        avail = available_bytes() if available is None else int(available)
        B = _block(problem.basis.dim, problem.n_sites, times.size, avail, block)
        ops = {n: problem.observable_operator(n) for n in problem.observables}
        vals = {n: np.empty(times.size) for n in ops}
        t0 = time.perf_counter()
        bounds = spectral_bounds(op, rng=np.random.default_rng(BOUNDS_SEED))

        def on_output(i, t, v):
            n2 = vdot(v, v).real
            abs(vdot(psi, v))
            op.expectation(v)
            for n, o in ops.items():
                vals[n][i] = o.expectation(v) / n2

        stats = evolve(op, psi, times, bounds=bounds, tol=scenario.numerics.tolerance, block=B, on_output=on_output)
        seconds = time.perf_counter() - t0
    return {"sites": problem.n_sites, "dimension": int(problem.basis.dim), "block": B, "seconds": seconds,
            "products": int(stats.matvecs), "bounds_products": int(bounds.steps), "peak_rss_bytes": int(peak.peak),
            "half_width": float(bounds.half_width)}


def measure_baseline_rss(scenario: Scenario, sites: int = 8) -> int:
    """Peak RSS (bytes) of a fresh interpreter that runs a tiny evolution of this scenario (imports, compiled
    kernels, libraries: everything but the large vectors)."""
    from largeq.scenario.spec import scenario_to_toml

    code = ("import json, sys; from largeq.scenario import parse_scenario; import tomllib; "
            "from largeq.workflows.forecast import measure_evolution; "
            "s = parse_scenario(tomllib.loads(sys.stdin.read())); "
            "print(json.dumps(measure_evolution(s, block=1)))")
    small = scenario.with_length(sites)
    small = _short_time(small)
    res = subprocess.run([sys.executable, "-c", code], input=scenario_to_toml(small), capture_output=True, text=True,
                         timeout=300, check=True)
    return int(json.loads(res.stdout.strip().splitlines()[-1])["peak_rss_bytes"])


def _short_time(scenario: Scenario, t_max: float = 0.5, points: int = 3) -> Scenario:
    from largeq.scenario.spec import parse_scenario, scenario_to_dict

    d = scenario_to_dict(scenario)
    d["time"] = {"t_max": t_max, "points": points}
    return parse_scenario(d, source=scenario.source)


# --------------------------------------------------------------------------------------------- forecast
def _from_sweep(folder, L: int) -> dict:
    from largeq.analysis.fits import LinearFit, SizeTrend, extrapolate
    from largeq.reports.store import read_summary

    s = read_summary(Path(folder) / "summary.json")
    out = {}
    for key, t in s.get("fits", {}).get("trends", {}).items():
        if not (key == "d_eff" or key.endswith(".sigma")):
            continue
        f = t["fit"]
        kind = "log-linear" if key == "d_eff" else "log-decay"
        x = np.asarray(t.get("sizes", []), float)
        fit = LinearFit(f["intercept"], f["slope"], np.asarray(f["covariance"], float), f["chi2"], f["dof"],
                        f["errors"] == "given", x, x * 0, x * 0 + 1)
        e = extrapolate(SizeTrend(t["quantity"], kind, fit), L)
        out[key] = e.as_dict() | {"rate": t["rate"], "rate_err": t["rate_err"], "fitted_sizes": t.get("sizes")}
    return out


def forecast(scenario: Scenario, *, from_sweep=None, calibrate_here: bool = True, baseline: bool = True,
             block: int | None = None, available: int | None = None, symmetry: str = "auto") -> dict:
    """Everything ``largeq forecast`` prints and saves (a plain dict; see the module docstring).

    The path is the one ``relax`` takes (:func:`largeq.workflows.planning.plan_run`, by counting): symmetry
    sectors when relax would use them, else the magnetization sector or the full space.  Nothing is built
    at the target length.
    """
    import os

    from largeq.model import build as model
    from largeq.workflows.planning import plan_run

    avail = available_bytes() if available is None else int(available)
    H = model.hamiltonian(scenario)
    s = model.symmetries(scenario, H)
    plan = plan_run(scenario, symmetry=symmetry, block=block, available=avail)
    L, D = plan.n_sites, plan.basis_dimension
    sec = sector_weights(scenario)
    base = measure_baseline_rss(scenario) if baseline else OVERHEAD_BYTES
    n_times = scenario.time.n_points
    B = _block(D, L, n_times, avail, block)
    stab = 1
    stab *= L if s.get("translation") else 1
    stab *= 2 if s.get("reflection") else 1
    half = plan.up_spins is not None and 2 * plan.up_spins == L
    stab *= 2 if (s.get("spin_flip") and half) else 1
    d_sub = math.ceil(D / stab)

    def adjusted(f: MemoryForecast) -> dict:
        d = f.as_dict()
        if baseline and f.method != "exact":
            d["total_bytes"] = int(f.total_bytes - OVERHEAD_BYTES + base)
            d["total_human"] = format_bytes(d["total_bytes"])
            d["note"] += "; interpreter baseline measured"
        return d

    planned = adjusted(plan.forecast)
    planned["note"] = f"the path relax takes: {planned['note']}"
    memory = {
        "planned": planned,
        "chebyshev": adjusted(evolution_forecast(D, L, block=B)),
        "chebyshev_block1": adjusted(evolution_forecast(D, L, block=1)),
        "lanczos": adjusted(evolution_forecast(D, L, method="lanczos")),
        "kpm": adjusted(kpm_forecast(D, L)),
        "exact_subspace": exact_forecast(d_sub).as_dict() | {"dimension": d_sub,
                                                             "note": f"dense, state's symmetric subspace ~ D / {stab}"},
    }
    out = {"sites": L, "title": scenario.title, "basis": plan.basis_label, "basis_dimension": D,
           "basis_reason": plan.basis_reason, "sectors": sec, "bytes_per_vector": D * COMPLEX,
           "table_bytes": table_bytes_estimate(L, len(H.coeff)), "baseline_bytes": base,
           "available_bytes": avail, "memory": memory, "symmetries": s, "cores": os.cpu_count(),
           "plan": plan.as_dict()}
    if calibrate_here:
        cal = calibrate(scenario, L)
        largest = max((c.dimension for c in plan.sectors), default=D) if plan.path == "sectors" else D
        ev = predict_evolution(scenario, cal, block=plan.block, available=avail, dimension=plan.dimension,
                               vector_bytes=largest * COMPLEX)
        kpm = predict_kpm(ev["seconds_per_product"], t_vdot=cal.seconds_per_vdot * D / cal.dimension)
        out.update(calibration=cal.as_dict(), evolution=ev, kpm=kpm)
    if from_sweep is not None:
        out["from_sweep"] = _from_sweep(from_sweep, L)
    fits_mem = planned["total_bytes"] <= 0.9 * avail
    out["verdict"] = _verdict(out, fits_mem, d_sub, stab)
    return out


def _verdict(f: dict, fits_mem: bool, d_sub: int, stab: int) -> dict:
    s = f["symmetries"]
    plan = f["plan"]
    have = [k for k in ("conserves_magnetization", "translation", "reflection", "spin_flip") if s.get(k)]
    need = f["memory"]["planned"]["total_bytes"]
    lines = [f"path: {plan['path']} (dimension {plan['dimension']:,}): {plan['reason']}"]
    if plan["path"] == "sectors":
        p = plan["parts"]
        lines.append(f"sector path: stored sector matrices {'yes' if plan['stored_matrices'] else 'no (matrix-free)'}"
                     f" ({format_bytes(p.get('stored_matrices', 0))}, assembly peak "
                     f"{format_bytes(p.get('matrix_assembly', 0))}); vectors {format_bytes(p['vectors'])} "
                     f"(4 + 2 x block {plan['block']} per sector)")
    if fits_mem:
        lines.append(f"fits: the planned evolution needs about {format_bytes(need)} of "
                     f"{format_bytes(f['available_bytes'])} available")
    else:
        vec = f["memory"]["chebyshev_block1"]
        lines.append(f"does NOT fit: the planned evolution needs about {format_bytes(need)}, "
                     f"{format_bytes(f['available_bytes'])} available here")
        lines.append(f"machine that would run it: at least {format_bytes(need / 0.9)} of free memory (the CPU path, "
                     f"any core count: memory decides); or the jax backend (pip install largeq[jax]) on GPUs with "
                     f"about {format_bytes(vec['vectors'] * vec['vector_bytes'])} of device memory in total for the "
                     f"magnetization-sector vectors, split over the devices")
    lines.append("symmetries of the model: " + (", ".join(have) or "none found"))
    if "evolution" in f:
        t = f["evolution"]["seconds"]
        cores = f["cores"] or 1
        lines.append(f"predicted evolution time {_human_time(t)} on {cores} core(s); products are memory-bandwidth "
                     f"bound, so k times the cores (and bandwidth) gives up to ~k times faster, and Dask sweeps "
                     f"run sizes side by side on several workers")
    return {"fits_in_memory": fits_mem, "lines": lines}


def format_forecast(f: dict) -> str:
    L = f["sites"]
    dim_text = f"{f['basis_dimension']:,}"
    dim_note = "" if dim_text in f["basis"] else f" (dimension {dim_text})"  # the label may already state it
    out = [f"{f['title']}: forecast for L = {L}",
           f"  basis: {f['basis']}{dim_note}; {f['basis_reason']}"]
    sec = f["sectors"]
    touched = sec["sectors"]
    if len(touched) == 1:
        s0 = touched[0]
        out.append(f"  initial state in one magnetization sector: n_up = {s0['up_spins']}, dimension {s0['dimension']:,}")
    else:
        out.append(f"  initial state touches {len(touched)} magnetization sectors (n_up: dimension, weight):")
        for s0 in touched:
            out.append(f"    {s0['up_spins']:3d}: {s0['dimension']:>16,d}  {s0['weight']:.3e}")
        if not sec["conserves_magnetization"]:
            out.append(f"    (H does not conserve magnetization: the evolution needs the full space, 2^{L} = {2**L:,})")
    out.append(f"  one vector: {format_bytes(f['bytes_per_vector'])}; interpreter baseline {format_bytes(f['baseline_bytes'])}")
    for k, m in f["memory"].items():
        out.append(f"  memory {k:16s} {m['total_human']:>12s}   ({m['note']})")
    if "evolution" in f:
        e, c = f["evolution"], f["calibration"]
        out.append(f"  calibration at L = {c['sites']} (dimension {c['dimension']:,}): {c['seconds_per_product'] * 1e3:.3g} ms "
                   f"per product, {c['seconds_per_axpy'] * 1e3:.3g} ms per vector update")
        out.append(f"  evolution to t = {e['t_max']:g}: spectral half-width {e['half_width']:.4g} "
                   f"(scaled), block {e['block']}, {e['products']:,} products + {e['bounds_products']} for bounds, "
                   f"{e['outputs']} outputs; {e['seconds_per_product']:.3g} s per product")
        rr = e.get("random_reads") or {}
        if rr.get("measured_bytes"):
            capped = "" if rr["measured_bytes"] >= rr["target_vector_bytes"] else (
                f", measured on {format_bytes(rr['measured_bytes'])} for lack of free memory: a lower bound")
            out.append(f"  scattered reads from a {format_bytes(rr['target_vector_bytes'])} vector are "
                       f"{rr['factor']:.2g}x slower than from the calibration's {format_bytes(rr['calibration_vector_bytes'])} "
                       f"(measured now{capped}); products scaled by that")
        out.append(f"  predicted evolution wall time: {_human_time(e['seconds'])}")
        k = f["kpm"]
        out.append(f"  KPM spectra ({k['n_moments']} moments, {k['n_vectors']} vectors): {k['products']:,} products, "
                   f"{_human_time(k['seconds'])}")
    for key, e in f.get("from_sweep", {}).items():
        out.append(f"  from sweep: {key} at L = {L}: {e['value']:.4g} (1-sigma band {e['low']:.4g} .. {e['high']:.4g}); "
                   f"rate {e['rate']:.4g} +- {e['rate_err']:.2g} per site")
    out += [f"  verdict: {ln}" for ln in f["verdict"]["lines"]]
    return "\n".join(out)


def _human_time(s: float) -> str:
    if s < 120:
        return f"{s:.3g} s"
    if s < 7200:
        return f"{s / 60:.3g} min"
    if s < 2 * 86400:
        return f"{s / 3600:.3g} h"
    return f"{s / 86400:.3g} days"
