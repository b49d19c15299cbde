"""Scenario summary: model terms, symmetries, basis, dimension and memory (nothing is run)."""

from __future__ import annotations

from largeq.operators.problem import build_problem, spin_conventions
from largeq.workflows.planning import (available_bytes, evolution_forecast, exact_forecast, format_bytes,
                                       kpm_forecast)
from largeq.scenario.spec import Scenario

__all__ = ["describe_scenario"]


def describe_scenario(scenario: Scenario) -> dict:
    """Return ``{"text": printable summary, "data": the same as a dict}``.

    Builds the basis tables (small) but allocates no state vector.
    """
    problem = build_problem(scenario)
    H = problem.hamiltonian
    basis = problem.basis
    L = basis.n_sites
    times = scenario.time.times()
    forecasts = {
        "chebyshev": evolution_forecast(basis.dim, L, method="chebyshev", block=1),
        "chebyshev_block8": evolution_forecast(basis.dim, L, method="chebyshev", block=8),
        "lanczos": evolution_forecast(basis.dim, L, method="lanczos"),
        "kpm": kpm_forecast(basis.dim, L),
        "exact": exact_forecast(basis.dim),
    }
    avail = available_bytes()
    sym = problem.symmetries
    data = {
        "title": scenario.title,
        "sites": L,
        "boundary": scenario.chain.boundary,
        "hamiltonian_terms": len(H),
        "hamiltonian": H.describe(max_terms=16),
        "symmetries": sym,
        "basis": basis.describe() | {"reason": problem.basis_reason},
        "initial_state": problem.start.label,
        "observables": {n: {"description": o.description, "norm": o.norm, "range": [o.a_min, o.a_max]}
                        for n, o in problem.observables.items()},
        "time_grid": {"t_max": float(times[-1]), "points": int(times.size)},
        "bytes_per_vector": basis.bytes_per_vector(),
        "memory_forecasts": {k: f.as_dict() for k, f in forecasts.items()},
        "memory_available": avail,
        "conventions": spin_conventions(),
    }
    used = [name for name, on in (("magnetization (U(1))", sym["conserves_magnetization"]),
                                  ("translation", sym["translation"]), ("spin flip", sym["spin_flip"]),
                                  ("reflection", sym["reflection"])) if on]
    lines = [
        f"{scenario.title}",
        f"  chain: L = {L}, {scenario.chain.boundary} boundary",
        f"  Hamiltonian: {len(H)} Pauli strings (S = sigma/2 couplings), e.g.",
        *[f"      {t}" for t in H.describe(max_terms=8)],
        "SYMMETRY_LINE",
        f"  initial state: {problem.start.label}",
        f"  basis: {basis.label}",
        f"      why: {problem.basis_reason}",
        f"  time grid: t = 0 .. {times[-1]:g}, {times.size} output times",
        "  observables:",
        *[f"      {n}: {o.description}  (||A|| = {o.norm:g})" for n, o in problem.observables.items()],
        f"  memory per complex state vector: {format_bytes(basis.bytes_per_vector())}",
        "  memory forecast (peak):",
        *[f"      {k:17s} {format_bytes(f.total_bytes):>11s}   {f.note}" for k, f in forecasts.items()],
        f"  memory available now: {format_bytes(avail)}",
    ]
    from largeq.workflows.planning import MemoryRefusal
    from largeq.workflows.relax import RelaxOptions, sector_plan

    try:
        plan = sector_plan(problem, RelaxOptions(), avail, times.size)
    except MemoryRefusal as exc:
        plan = None
        lines.append(f"  symmetry sectors: would not fit ({exc})")
    in_use = ["magnetization sector"] if basis.is_sector else []
    if plan is not None:
        in_use.append("momentum / reflection / spin-flip sectors for relax")
    sym_line = (f"  symmetries of H: {', '.join(used) if used else 'none detected'}"
                f"  (used: {', '.join(in_use) if in_use else 'none'})")
    lines[lines.index("SYMMETRY_LINE")] = sym_line
    if plan is not None:
        secs = [(c.sector.label, int(c.sector.dim), float(c.weight)) for c in plan["components"]]
        data["symmetry_sectors"] = {"sectors": secs, "note": plan["note"], "forecast": plan["forecast"].as_dict()}
        lines.append("  relax will evolve in symmetry sectors:")
        lines.extend(f"      {lab}: weight {w:.4g}" for lab, dim, w in secs)  # the label states the dimension
        lines.append(f"      forecast {format_bytes(plan['forecast'].total_bytes)} ({plan['forecast'].note})")
    elif sym["translation"] and problem.start.bits is not None:
        lines.append("  symmetry sectors: not used (they need diagonal observables only and the Chebyshev method)")
    if forecasts["chebyshev"].total_bytes > 0.9 * avail and plan is None:
        lines.append("  verdict: the time evolution does NOT fit in this machine's memory")
    else:
        lines.append("  verdict: the time evolution fits in this machine's memory")
    return {"text": "\n".join(lines), "data": data}
