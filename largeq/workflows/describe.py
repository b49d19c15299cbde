"""Scenario summary: model terms, symmetries, basis, dimension and memory (nothing is run).

Everything here comes from the Pauli sums and from counting (magnetization sectors by binomials, symmetry
sectors by Burnside counts): no basis table, no sector enumeration and no state vector is built, so the
summary is immediate at every chain length up to 62 sites.
"""

from __future__ import annotations

from largeq.basis.spaces import basis_table_bytes
from largeq.model import build as model
from largeq.operators.problem import spin_conventions
from largeq.workflows.planning import (COMPLEX, available_bytes, evolution_forecast, exact_forecast, format_bytes,
                                       kpm_forecast, plan_run)
from largeq.scenario.spec import Scenario

__all__ = ["describe_scenario"]


def describe_scenario(scenario: Scenario, *, available: int | None = None) -> dict:
    """Return ``{"text": printable summary, "data": the same as a dict}``."""
    H = model.hamiltonian(scenario)
    sym = model.symmetries(scenario, H)
    start = model.initial_state(scenario)
    observables = model.observables(scenario, H)
    avail = available_bytes() if available is None else int(available)
    plan = plan_run(scenario, available=avail, model_parts={"hamiltonian": H, "symmetries": sym, "start": start,
                                                             "observables": observables})
    L = scenario.n_sites
    D = plan.basis_dimension
    times = scenario.time.times()
    forecasts = {
        "chebyshev": evolution_forecast(D, L, method="chebyshev", block=1),
        "chebyshev_block8": evolution_forecast(D, L, method="chebyshev", block=8),
        "lanczos": evolution_forecast(D, L, method="lanczos"),
        "kpm": kpm_forecast(D, L),
        "exact": exact_forecast(D),
    }
    basis = {"kind": "full" if plan.up_spins is None else "magnetization", "sites": L, "up_spins": plan.up_spins,
             "dimension": D, "low_sites": L // 2, "table_bytes": basis_table_bytes(L, plan.up_spins),
             "reason": plan.basis_reason}
    data = {
        "title": scenario.title,
        "sites": L,
        "boundary": scenario.chain.boundary,
        "hamiltonian_terms": len(H),
        "hamiltonian": H.describe(max_terms=16),
        "symmetries": sym,
        "basis": basis,
        "initial_state": start.label,
        "observables": {n: {"description": o.description, "norm": o.norm, "range": [o.a_min, o.a_max]}
                        for n, o in observables.items()},
        "time_grid": {"t_max": float(times[-1]), "points": int(times.size)},
        "bytes_per_vector": D * COMPLEX,
        "memory_forecasts": {k: f.as_dict() for k, f in forecasts.items()},
        "memory_available": avail,
        "plan": plan.as_dict(),
        "conventions": spin_conventions(),
    }
    used = [name for name, on in (("magnetization (U(1))", sym["conserves_magnetization"]),
                                  ("translation", sym["translation"]), ("spin flip", sym["spin_flip"]),
                                  ("reflection", sym["reflection"])) if on]
    if plan.path == "sectors":
        in_use = ("magnetization, momentum and parity sectors for relax"
                  if (plan.sector_group or {}).get("conserve_magnetization") else
                  "momentum and parity sectors of the full space for relax")
    else:
        in_use = {"magnetization": "magnetization sector for relax", "full": "none"}[plan.path]
    lines = [
        f"{scenario.title}",
        f"  chain: L = {L}, {scenario.chain.boundary} boundary",
        f"  Hamiltonian: {len(H)} Pauli strings (S = sigma/2 couplings), e.g.",
        *[f"      {t}" for t in H.describe(max_terms=8)],
        f"  symmetries of H: {', '.join(used) if used else 'none detected'}  (used: {in_use})",
        f"  initial state: {start.label}",
        f"  basis: {plan.basis_label}",
        f"      why: {plan.basis_reason}",
        f"  time grid: t = 0 .. {times[-1]:g}, {times.size} output times",
        "  observables:",
        *[f"      {n}: {o.description}  (||A|| = {o.norm:g})" for n, o in observables.items()],
        f"  memory per complex state vector: {format_bytes(D * COMPLEX)}",
        "  memory forecast (peak):",
        *[f"      {k:17s} {format_bytes(f.total_bytes):>11s}   {f.note}" for k, f in forecasts.items()],
        f"  memory available now: {format_bytes(avail)}",
    ]
    if plan.path == "sectors":
        secs = [(c.label, c.dimension, c.weight) for c in plan.sectors]
        data["symmetry_sectors"] = {"sectors": secs, "note": plan.sector_note, "forecast": plan.forecast.as_dict()}
        lines.append("  relax will evolve in symmetry sectors (dimensions counted, nothing enumerated):")
        lines.extend(f"      {lab}: weight {w:.4g}" for lab, dim, w in secs)
        lines.append(f"      forecast {format_bytes(plan.forecast.total_bytes)} ({plan.forecast.note})")
    else:
        lines.append(f"  relax will evolve in the {plan.path} basis: {plan.sectors_refused or plan.basis_reason}")
    lines.append(f"  time forecast: about {plan.products:,} products of dimension {plan.dimension:,}; roughly "
                 f"{_human_seconds(plan.seconds_estimate)} (uncalibrated; 'largeq forecast' measures this machine)")
    if plan.fits:
        lines.append(f"  verdict: the time evolution fits in this machine's memory "
                     f"({format_bytes(plan.forecast.total_bytes)} of {format_bytes(avail)})")
    else:
        lines.append(f"  verdict: the time evolution does NOT fit in this machine's memory "
                     f"({format_bytes(plan.forecast.total_bytes)} needed, {format_bytes(avail)} available)")
    return {"text": "\n".join(lines), "data": data}


def _human_seconds(s: float) -> str:
    if s < 120:
        return f"{s:.2g} s"
    if s < 7200:
        return f"{s / 60:.2g} min"
    if s < 2 * 86400:
        return f"{s / 3600:.2g} h"
    if s < 2 * 365 * 86400:
        return f"{s / 86400:.2g} days"
    return f"{s / (365 * 86400):.2g} years"
