"""Plots and report.html of a finished relaxation run, drawn from what the run folder holds.

Everything comes from ``summary.json``, ``results.h5`` and ``scenario.toml``, so the page can
be rebuilt at any time (:func:`write_relax_report`) and never shows a number that the saved
files do not hold.  The page opens with the headline (:mod:`largeq.reports.headline`, the
same lines the console prints), then the plots with their numbers, then the scenario, the
Hamiltonian, the conventions, the time grid, the seeds, the versions and the time per phase.
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np

from largeq import __version__
from largeq.analysis.references import known_curves
from largeq.reports import html, plots
from largeq.reports.headline import (ENERGY_ACCURACY, EXACT_ACCURACY, basis_text, fmt, fmt_error, hamiltonian_terms, relax_headline)
from largeq.reports.store import read_results, read_summary
from largeq.scenario.spec import load_scenario

__all__ = ["write_relax_report", "known_curve_summary", "PLOTS"]

PLOTS = ("relaxation.png", "distance.png", "survival.png")


def known_curve_summary(scenario, times, curves: dict) -> dict:
    """Per observable with an analytic reference: its formula, source, validity and largest deviation."""
    out = {}
    known = known_curves(scenario, {n: float(np.real(c[0])) for n, c in curves.items()})
    t = np.asarray(times, float)
    for name, k in known.items():
        mask = t <= k.valid_until
        dev = float(np.max(np.abs(np.real(curves[name])[mask] - k.value(t[mask])))) if mask.any() else None
        out[name] = {"formula": k.label, "source": k.source, "valid_until": k.valid_until,
                     "max_deviation_until_valid": dev}
    return out


def _plots(folder: Path, scenario, summary: dict, tree: dict) -> None:
    curves = tree["curves"]
    analysis = tree["analysis"]
    times = np.asarray(curves["times"], float)
    names = _names(scenario, summary)
    obs = summary["observables"]
    refs = {}
    for n in names:
        r = {}
        for key, label in (("diagonal_ensemble", "diagonal ensemble"), ("canonical", "canonical"),
                           ("microcanonical", "microcanonical")):
            if obs[n].get(key) is not None:
                r[label] = float(obs[n][key])
        refs[n] = r
    known = {}
    for n, k in known_curves(scenario, {n: float(np.real(curves[n][0])) for n in names}).items():
        tk = np.linspace(0.0, min(k.valid_until, times[-1]), 400)
        known[n] = (f"{k.label} (t ≤ L/4J)", tk, k.value(tk))
    plots.plot_relaxation(
        folder / "relaxation.png", times, {n: curves[n] for n in names},
        running_average={n: analysis[n]["running_average"] for n in names},
        equilibrium={n: (obs[n]["equilibrium"], np.sqrt(max(obs[n]["temporal_variance"], 0.0))) for n in names},
        window={n: tuple(obs[n]["window"]) for n in names},
        references=refs, known=known,
        title=f"{scenario.title} (L = {summary['sites']})",
    )
    plots.plot_distance(folder / "distance.png", times, {n: analysis[n]["distance"] for n in names},
                        fluctuation_level={n: obs[n]["temporal_variance"] for n in names},
                        bound_level={n: obs[n]["bound"] for n in names if obs[n].get("bound") is not None},
                        title="distance to the late-window mean")
    survival = np.asarray(curves["survival_probability"], float)
    d_eff = (summary.get("equilibration") or {}).get("d_eff")
    late = survival[times >= 0.5 * times[-1]]
    plots.plot_survival(folder / "survival.png", times, survival,
                        plateau=float(np.mean(late)) if late.size else None,
                        inverse_deff=(1.0 / d_eff) if d_eff else None,
                        title="survival probability (late-time mean → 1/d_eff for non-degenerate gaps)")


def _names(scenario, summary: dict) -> list[str]:
    """Observable names in the scenario's order (summary.json sorts its keys)."""
    order = [o.name for o in scenario.observables]
    return [n for n in order if n in summary["observables"]] + [n for n in summary["observables"] if n not in order]


def _ordered(scenario, summary: dict) -> dict:
    s = dict(summary)
    s["observables"] = {n: summary["observables"][n] for n in _names(scenario, summary)}
    return s


def _observable_rows(summary: dict) -> list:
    rows = []
    for n, o in summary["observables"].items():
        w0, w1 = o["window"]
        rows.append((f"{n}: late-window mean", fmt_error(o["equilibrium"], o["equilibrium_err"]),
                     f"window t = {fmt(w0, digits=3)} .. {fmt(w1, digits=3)}"))
        rows.append((f"{n}: temporal variance σ²", fmt(o["temporal_variance"], digits=3),
                     f"σ = {fmt(np.sqrt(max(o['temporal_variance'], 0.0)), digits=3)}"))
        t_relax = o.get("relaxation_time")
        reached = t_relax is not None and np.isfinite(t_relax)
        if o["settled"]:
            rows.append((f"{n}: relaxation time", fmt(t_relax, digits=3) if reached else "n/a", "settled"))
        else:
            rows.append((f"{n}: relaxation time", "not reached",
                         "NOT settled" + (f" (inside the band from t = {fmt(t_relax, digits=3)} on, too late or "
                                          "too short to judge)" if reached else "")))
        kc = o.get("known_curve")
        if kc:
            rows.append((f"{n}: against {kc['formula']}", fmt(kc["max_deviation_until_valid"], digits=2),
                         f"largest deviation for t ≤ {fmt(kc['valid_until'], digits=3)}; {kc['source']}"))
    return rows


def _equilibrium_rows(summary: dict) -> list:
    eq = summary.get("equilibration") or {}
    rows = []
    if eq.get("d_eff") is not None:
        lo, hi = eq.get("d_eff_range", [eq["d_eff"]] * 2)
        rng = "" if lo == hi else f" (range {fmt(lo, digits=3)} .. {fmt(hi, digits=3)})"
        rows.append(("effective dimension d_eff", fmt(eq["d_eff"], digits=4) + rng, eq.get("how", "")))
    else:
        rows.append(("effective dimension d_eff", "not computed", eq.get("note") or eq.get("exact_note") or ""))
    if eq.get("gap_degeneracy_N0") is not None:
        rows.append(("largest gap degeneracy N(0)", str(eq["gap_degeneracy_N0"]), "enters the bound as a factor"))
    th = eq.get("thermal") or {}
    if th.get("beta") is not None:
        beta = fmt_error(th["beta"], th.get("beta_err")) if th.get("beta_err") else fmt(th["beta"], digits=4)
        rows.append(("inverse temperature β of the state's energy", beta, th.get("method", "")))
    lr = (eq.get("details") or {}).get("level_ratio")
    if lr and lr.get("mean") is not None:
        rows.append(("mean level-spacing ratio ⟨r⟩", fmt_error(lr["mean"], lr.get("stderr")),
                     f"Poisson {lr['poisson']:.4f}, GOE {lr['goe']:.4f}; block {lr.get('block', '')}"))
    return rows


def _comparison_table(summary: dict) -> tuple[list[str], list[list[str]]]:
    """One row per observable: the late-window mean against the ensembles, sigma^2 against the bound."""
    cols = ["observable", "late-window mean", "diagonal ensemble", "canonical", "microcanonical", "σ² (window)",
            "σ² exact", "bound on σ²", "σ²/bound"]
    rows = []
    for n, o in summary["observables"].items():
        def ens(key):
            if o.get(key) is None:
                return "n/a"
            err = o.get(f"{key}_err")
            return fmt_error(o[key], err) if err else fmt(o[key], EXACT_ACCURACY, 5)
        rows.append([n, fmt_error(o["equilibrium"], o["equilibrium_err"]), ens("diagonal_ensemble"), ens("canonical"),
                     ens("microcanonical"), fmt(o["temporal_variance"], digits=3), fmt(o.get("exact_variance"), digits=3),
                     fmt(o.get("bound"), digits=3), fmt(o.get("measured_variance_over_bound"), digits=3)])
    return cols, rows


def _run_rows(summary: dict, attrs: dict) -> list:
    grid = summary.get("time_grid") or {}
    rows = [
        ("basis", basis_text(summary["basis"]), summary["basis"].get("reason", "")),
        ("initial state", summary["initial_state"], f"⟨H⟩ = {fmt(summary['initial_energy'], ENERGY_ACCURACY, digits=6)}"),
        ("method", summary["method"], f"tolerance {summary['tolerance']:g}; {summary['block']} output times per expansion"),
        ("time grid", f"t = 0 .. {fmt(grid.get('t_max'), digits=6)}, {grid.get('points', '?')} points",
         f"step {fmt(grid.get('step'), digits=4)} (1/J)" if grid.get("step") else ""),
        ("matrix-vector products", f"{summary['matvecs']:,}", ""),
        ("memory forecast", plots_bytes(summary["memory_forecast_bytes"]), "peak, forecast before the run"),
        ("memory measured", plots_bytes(summary.get("peak_rss_bytes")) if summary.get("peak_rss_bytes") else "n/a",
         "peak resident memory of the process that finished the run"),
    ]
    sectors = summary.get("symmetry_sectors")
    if sectors:
        rows.append(("symmetry sectors", "; ".join(f"{s['label']} (weight {s['weight']:.3g})" for s in sectors["sectors"]),
                     sectors.get("note", "")))
    for phase, sec in (summary.get("phase_seconds") or {}).items():
        rows.append((f"time: {phase}", f"{sec:.3g} s", ""))
    for k, v in (summary.get("seeds") or attrs.get("seeds") or {}).items():
        rows.append((f"seed: {k}", str(v), ""))
    for k, v in (attrs.get("versions") or {}).items():
        rows.append((f"version: {k}", str(v), ""))
    machine = attrs.get("machine") or {}
    if machine:
        rows.append(("machine", f"{machine.get('cpu_count', '?')} cores, {plots_bytes(machine.get('memory_total_bytes', 0))}",
                     f"{machine.get('platform', '')}; {machine.get('timestamp_utc', '')}"))
    return rows


def plots_bytes(n) -> str:
    n = float(n or 0)
    for unit, size in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if n >= size:
            return f"{n / size:.3g} {unit}"
    return f"{int(n)} B"


def draw_relax_plots(folder) -> None:
    """Draw the PNG plots of the finished run in ``folder`` (from its summary.json, results.h5 and scenario)."""
    folder = Path(folder)
    summary = read_summary(folder / "summary.json")
    tree, _ = read_results(folder / "results.h5", quantities=False)
    scenario = load_scenario(folder / "scenario.toml")
    _plots(folder, scenario, _ordered(scenario, summary), tree)


def write_relax_report(folder, *, draw: bool = True) -> Path:
    """Write ``report.html`` of the finished run in ``folder`` (and first draw its plots unless ``draw`` is
    False, for a page rewritten after :func:`draw_relax_plots`); returns the page's path."""
    folder = Path(folder)
    if draw:
        draw_relax_plots(folder)
    summary = read_summary(folder / "summary.json")
    tree, attrs = read_results(folder / "results.h5", quantities=False)
    scenario_path = folder / "scenario.toml"
    scenario = load_scenario(scenario_path)
    summary = _ordered(scenario, summary)
    conventions = attrs.get("conventions") or {}
    sections = [
        html.Section("Relaxation curves", images=["relaxation.png"], table=_observable_rows(summary),
                     paragraphs=[f"{n}: {o['verdict']}" for n, o in summary["observables"].items()]),
        html.Section("Equilibrium, thermal values and the fluctuation bound", images=["survival.png"],
                     table=_equilibrium_rows(summary), columns=_comparison_table(summary)[0],
                     rows=_comparison_table(summary)[1],
                     paragraphs=["Bound on σ²: " + next((o["bound_formula"] for o in summary["observables"].values()
                                                        if o.get("bound_formula")), "not computed") + "."]),
        html.Section("Distance to the late-window mean", images=["distance.png"], table=[
            ("energy drift max |⟨H⟩(t) − ⟨H⟩(0)|", fmt(summary["energy_drift"], digits=2), ""),
            ("norm drift max |‖ψ(t)‖ − 1|", fmt(summary["norm_drift"], digits=2), ""),
        ]),
        html.Section("Scenario", paragraphs=[f"Hamiltonian (S = σ/2 units; L = {summary['sites']}, "
                                             f"{scenario.chain.boundary} boundary):"],
                     items=hamiltonian_terms(scenario), preformatted=scenario_path.read_text()),
        html.Section("Conventions", table=[(k, v, "") for k, v in conventions.items()]),
        html.Section("Run", table=_run_rows(summary, attrs)),
    ]
    return html.write_report(folder / "report.html", title=scenario.title, sections=sections,
                             headline=relax_headline(summary),
                             subtitle=f"largeq {__version__}: relaxation of L = {summary['sites']}, "
                                      f"written {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}")
