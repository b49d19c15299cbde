"""Thermal predictions for a quench: canonical and microcanonical values at the state's energy.

``run_thermal`` builds the problem, refuses up front when the forecast memory does not fit,
and computes in the basis the initial state lives in (its magnetization sector when the
Hamiltonian conserves the magnetization: the thermal ensemble is then the one of that sector,
because the dynamics never leave it):

* canonical ``<A>_beta = Tr(A e^{-beta H}) / Tr e^{-beta H}`` and ``<H>_beta`` for every scenario
  observable on a grid of inverse temperatures, from thermal pure quantum states
  ``e^{-beta H/2}|r>`` (S. Sugiura & A. Shimizu, PRL 108, 240401 (2012); PRL 111, 010401 (2013)),
  with jackknife error bars over the random vectors; the grid is chosen to cover the state's
  energy and extended (the whole grid recomputed with the same vectors) while it does not;
* the inverse temperature ``beta*`` with ``<H>_beta* = <psi|H|psi>`` and the canonical values at
  ``beta*`` (cubic interpolation on the grid), whose error combines the statistical error and
  the propagated uncertainty of ``beta*`` (``|d<A>/dbeta| * beta_err``, in quadrature);
* microcanonical values at ``E = <psi|H|psi>`` from random states filtered by a Gaussian
  energy window of stated standard deviation (a converged Chebyshev series of
  ``exp(-(H - E)^2 / (4 sigma^2))``; A. Weisse et al., Rev. Mod. Phys. 78, 275 (2006)).

Outputs: ``results.h5``, ``summary.json`` (per-observable canonical and microcanonical values:
what the main job's equilibrium values are compared against), ``thermal.png``, ``report.html``.
"""

from __future__ import annotations

import dataclasses
import time
from dataclasses import dataclass
from pathlib import Path

import matplotlib.ticker
import numpy as np
import scipy.interpolate

from largeq import __version__
from largeq.operators.problem import build_problem
from largeq.engines.bounds import spectral_bounds
from largeq.operators.linalg import apply_into
from largeq.engines.typical import canonical_averages, microcanonical_average, solve_beta
from largeq.workflows.planning import (MemoryForecast, available_bytes, check_basis_fits, check_fits, format_bytes,
                                       kpm_forecast)
from largeq.reports.progress import progress_bar
from largeq.reports import html
from largeq.reports import plots
from largeq.reports.run_record import run_attributes, summary_head
from largeq.reports.store import (Quantity, atomic_write_text, make_run_folder, write_results,
                                  write_summary)
from largeq.workflows.errors import OptionError, WorkflowError
from largeq.scenario.spec import Scenario, scenario_to_toml
from largeq.workflows.spectra import BOUNDS_SEED, sector_note, state_vector, vector_dtype
from largeq.operators.vectors import vdot

__all__ = ["ThermalOptions", "ThermalRun", "run_thermal", "default_beta_grid"]

SCENARIO_FILE = "scenario.toml"
GRID_POINTS = 25          # default grid size (the TPQ stepping costs the same whatever the number of points)
MAX_EXTENSIONS = 8        # grid doublings tried before giving up
BETA_LIMIT_SCALE = 1000.0  # |beta| a may not exceed this (a: half the spectral width): ~ ground-state energies


@dataclass(frozen=True)
class ThermalOptions:
    """Settings of one thermal run that are not part of the physics scenario.

    Attributes
    ----------
    vectors : int
        Random vectors R (>= 2 for error bars); errors shrink like 1/sqrt(R D_eff(beta)).
    betas : tuple of float or None
        Inverse-temperature grid (1/J); None chooses one that covers the state's energy.  Either
        way the grid is extended while the state's energy lies outside the energies it covers.
    window : float or None
        Standard deviation sigma (J) of the microcanonical Gaussian window; None: 2 % of the
        spectral width (E_max - E_min).
    seed : int or None
        Seed of the random vectors; None draws one (written to the outputs).
    progress : bool or None; memory_available : int or None (see SpectraOptions).
    """

    vectors: int = 8
    betas: tuple | None = None
    window: float | None = None
    seed: int | None = None
    progress: bool | None = None
    memory_available: int | None = None

    def validated(self) -> "ThermalOptions":
        if int(self.vectors) != self.vectors or self.vectors < 1:
            raise OptionError(f"thermal option 'vectors': got {self.vectors!r}; allowed: an integer >= 1 "
                                "(>= 2 for error bars)")
        betas = self.betas
        if betas is not None:
            arr = np.unique(np.asarray(betas, dtype=float).reshape(-1))
            if arr.size < 2 or not np.all(np.isfinite(arr)):
                raise OptionError(f"thermal option 'betas': got {list(betas)!r}; allowed: at least two distinct "
                                    "finite inverse temperatures")
            betas = tuple(float(b) for b in arr)
        if self.window is not None and not (np.isfinite(self.window) and self.window > 0):
            raise OptionError(f"thermal option 'window': got {self.window!r}; allowed: a positive energy")
        seed = self.seed
        if seed is None:
            seed = int(np.random.SeedSequence().entropy % (2**63))
        if int(seed) != seed or seed < 0:
            raise OptionError(f"thermal option 'seed': got {seed!r}; allowed: an integer >= 0")
        return dataclasses.replace(self, vectors=int(self.vectors), betas=betas, seed=int(seed))


@dataclass(frozen=True)
class ThermalRun:
    folder: Path
    summary: dict


def _rngs(seed: int):
    """Independent generators for the beta guess, the canonical and the microcanonical states.

    Fresh objects on every call (spawning changes a generator's seed sequence, so a generator
    is never reused for a second canonical attempt).
    """
    guess, canon, micro = np.random.SeedSequence(seed).spawn(3)
    return np.random.default_rng(guess), np.random.default_rng(canon), np.random.default_rng(micro)


def default_beta_grid(state_energy: float, mean0: float, var0: float, points: int = GRID_POINTS) -> np.ndarray:
    """A grid from 0 to twice the high-temperature guess ``beta_g = (E_0 - E_psi) / sigma_0^2``.

    ``E_0`` and ``sigma_0^2`` are the infinite-temperature mean and variance of H (from one
    random vector).  ``<H>_beta ~ E_0 - beta sigma_0^2`` to first order, and the true |beta*| is
    larger (the variance shrinks as the temperature drops), so the grid is extended when needed.
    At least ``+-0.5 / sigma_0`` around the guess is covered.
    """
    sigma0 = np.sqrt(max(var0, 1e-300))
    guess = (mean0 - state_energy) / sigma0**2
    lo, hi = min(0.0, 2.0 * guess), max(0.0, 2.0 * guess)
    pad = 0.5 / sigma0
    lo, hi = min(lo, guess - pad), max(hi, guess + pad)
    return np.unique(np.concatenate([np.linspace(lo, hi, points), [0.0]]))


def _extend(betas: np.ndarray, upward: bool, points: int) -> np.ndarray:
    """Double the grid's reach in one direction (more positive betas lower the energy)."""
    span = betas.max() - betas.min()
    if upward:
        edge = betas.max()
        new = np.linspace(edge, edge + max(span, abs(edge)), points // 2 + 1)[1:]
    else:
        edge = betas.min()
        new = np.linspace(edge - max(span, abs(edge)), edge, points // 2 + 1)[:-1]
    return np.unique(np.concatenate([betas, new]))


def _prepare(scenario: Scenario, options: ThermalOptions):
    avail = available_bytes() if options.memory_available is None else int(options.memory_available)
    check_basis_fits(scenario, kpm_forecast, avail)  # by counting, before any table is built
    problem = build_problem(scenario)
    base = kpm_forecast(problem.basis.dim, problem.basis.n_sites)
    forecast = MemoryForecast("typical", base.dimension, base.vectors, base.vector_bytes, base.table_bytes,
                              base.total_bytes, "thermal pure quantum states / filtered states: 3 full-size vectors")
    check_fits(forecast, n_sites=problem.basis.n_sites, up_spins=problem.basis.up_spins, available=avail)
    return problem, forecast


def run_thermal(scenario: Scenario, folder=None, options: ThermalOptions = ThermalOptions()) -> ThermalRun:
    """Canonical and microcanonical predictions at the energy of the initial state, saved as a run folder.

    Raises MemoryRefusal before allocating anything large when the run does not fit.

    Parameters
    ----------
    scenario : Scenario
    folder : path-like or None (default: runs/thermal-<timestamp>)
    options : ThermalOptions (vectors R, beta grid, window sigma, seed)

    Returns
    -------
    ThermalRun with the folder and the summary dict (also in ``summary.json``).
    """
    options = options.validated()
    text = scenario_to_toml(scenario)
    problem, forecast = _prepare(scenario, options)  # refuse before mkdir
    out = make_run_folder(folder, "thermal")
    atomic_write_text(out / SCENARIO_FILE, text)
    t_start = time.perf_counter()
    op = problem.operator
    timings = {}
    bar = progress_bar(3, f"thermal L={problem.n_sites}", enabled=options.progress)
    try:
        t0 = time.perf_counter()
        bounds = spectral_bounds(op, rng=np.random.default_rng(BOUNDS_SEED))
        # the state's energy and width from one product H psi
        psi, captured = state_vector(problem)
        hpsi = np.empty_like(psi, dtype=np.result_type(psi.dtype, op.dtype))
        apply_into(op, psi, hpsi)
        n2 = vdot(psi, psi).real
        energy = float(vdot(psi, hpsi).real / n2)
        width = float(np.sqrt(max(vdot(hpsi, hpsi).real / n2 - energy**2, 0.0)))
        del psi, hpsi
        rng_guess, rng_canon, rng_micro = _rngs(options.seed)
        r = rng_guess.standard_normal(op.shape[0]).astype(vector_dtype(problem))
        hr = np.empty_like(r, dtype=np.result_type(r.dtype, op.dtype))
        apply_into(op, r, hr)
        rn2 = vdot(r, r).real
        mean0 = float(vdot(r, hr).real / rn2)
        var0 = float(vdot(hr, hr).real / rn2 - mean0**2)
        del r, hr
        timings["setup_seconds"] = time.perf_counter() - t0
        bar.update(1)

        # canonical: grid, extended until it covers the state's energy
        t0 = time.perf_counter()
        betas = np.asarray(options.betas if options.betas is not None else default_beta_grid(energy, mean0, var0))
        a = 0.5 * (bounds.e_max - bounds.e_min)
        beta_limit = BETA_LIMIT_SCALE / a
        history = []
        obs = {n: problem.observable_operator(n) for n in problem.observables}
        extended = 0
        while True:
            rng_canon = _rngs(options.seed)[1]  # fresh generator: the same vectors on every attempt
            canon = canonical_averages(op, obs, betas, options.vectors, rng_canon, bounds,
                                       dtype=vector_dtype(problem))
            history.append([float(betas.min()), float(betas.max()), int(betas.size)])
            try:
                beta, beta_err = solve_beta(canon, energy)
                break
            except ValueError:
                upward = energy < canon.energy.min()
                if extended >= MAX_EXTENSIONS or np.max(np.abs(betas)) >= beta_limit:
                    raise WorkflowError(
                        f"thermal: the state's energy {energy:.6g} is not reached on the beta grid "
                        f"[{betas.min():.4g}, {betas.max():.4g}] (energies {canon.energy.min():.6g} .. "
                        f"{canon.energy.max():.6g}); the state is too close to a spectral edge for a "
                        "thermal description") from None
                betas = _extend(betas, upward, GRID_POINTS)
                betas = betas[np.abs(betas) <= beta_limit]
                extended += 1
        timings["canonical_seconds"] = time.perf_counter() - t0
        bar.update(1)
        matched = _matched_values(canon, beta, beta_err)

        t0 = time.perf_counter()
        micro = microcanonical_average(op, obs, energy, options.window, options.vectors, rng_micro, bounds,
                                       dtype=vector_dtype(problem))
        timings["microcanonical_seconds"] = time.perf_counter() - t0
        bar.update(1)
    finally:
        bar.close()
    timings["total_seconds"] = time.perf_counter() - t_start
    summary = _finish(problem, text, out, options, bounds, energy, width, canon, beta, beta_err, matched, micro,
                      history, timings, forecast, captured)
    return ThermalRun(out, summary)


def _matched_values(canon, beta: float, beta_err: float) -> dict:
    """Canonical values at beta* (cubic spline), with statistical and beta-propagated errors."""
    out = {}
    series = {"energy": (canon.energy, canon.energy_err),
              "energy_variance": (canon.energy_variance, canon.energy_variance_err)}
    series.update({n: (canon.values[n], canon.errors[n]) for n in canon.values})
    for name, (vals, errs) in series.items():
        spline = scipy.interpolate.CubicSpline(canon.betas, vals)
        value = float(spline(beta))
        stat = float(np.interp(beta, canon.betas, errs))
        slope = float(spline.derivative()(beta))
        from_beta = abs(slope) * beta_err if np.isfinite(beta_err) else float("nan")
        total = float(np.hypot(stat, from_beta)) if name != "energy" else stat
        out[name] = {"value": value, "error": total, "error_statistical": stat,
                     "error_from_beta": from_beta if name != "energy" else 0.0, "slope_dbeta": slope}
    return out


def _finish(problem, text, folder, options, bounds, energy, width, canon, beta, beta_err, matched, micro,
            history, timings, forecast, captured) -> dict:
    scenario = problem.scenario
    names = list(canon.values)
    note = sector_note(problem)
    D = problem.basis.dim
    k0 = np.nonzero(canon.betas == 0.0)[0]
    inf_t = {n: (float(canon.values[n][k0[0]]) if k0.size else None) for n in names}
    temperature = 1.0 / beta if beta != 0 else float("inf")
    temperature_err = abs(beta_err / beta**2) if beta != 0 else float("nan")
    obs_summary = {}
    for n in names:
        m = matched[n]
        obs_summary[n] = {
            "canonical": m["value"], "canonical_err": m["error"],
            "canonical_err_statistical": m["error_statistical"], "canonical_err_from_beta": m["error_from_beta"],
            "microcanonical": micro.values[n], "microcanonical_err": micro.errors[n],
            "infinite_temperature": inf_t[n],
            "description": problem.observables[n].description,
        }
    tree = {
        "canonical": {
            "betas": Quantity(canon.betas, "1/J", "inverse temperatures of the grid"),
            "energy": Quantity(canon.energy, "J", "<H>_beta"),
            "energy_err": Quantity(canon.energy_err, "J", "jackknife error of <H>_beta"),
            "energy_variance": Quantity(canon.energy_variance, "J^2", "<H^2>_beta - <H>_beta^2"),
            "energy_variance_err": Quantity(canon.energy_variance_err, "J^2", "jackknife error"),
            "log_z": Quantity(canon.log_z, "1", "ln(Tr e^{-beta H} / D)"),
            "log_z_err": Quantity(canon.log_z_err, "1", "jackknife error of ln Z/D"),
            "values": {n: Quantity(canon.values[n], "1", f"<A>_beta of {problem.observables[n].description}")
                       for n in names},
            "errors": {n: Quantity(canon.errors[n], "1", "jackknife error") for n in names},
        },
        "matched": {
            "beta": Quantity(beta, "1/J", "beta* with <H>_beta* = <psi|H|psi>"),
            "beta_err": Quantity(beta_err, "1/J", "error of beta*: <H> error / |d<H>/dbeta|"),
            **{n: {k: Quantity(v, "J" if n == "energy" else ("J^2" if n == "energy_variance" else "1"))
                   for k, v in m.items()} for n, m in matched.items()},
        },
        "microcanonical": {
            "window_center": Quantity(micro.energy, "J", "E = <psi|H|psi>"),
            "window_width": Quantity(micro.width, "J", "sigma of the eigenstate weights exp(-(E_m - E)^2 / (2 sigma^2))"),
            "mean_energy": Quantity(micro.mean_energy, "J", "energy of the filtered states"),
            "mean_energy_err": Quantity(micro.mean_energy_err, "J", "jackknife error"),
            "energy_spread": Quantity(micro.energy_spread, "J", "energy standard deviation of the filtered states"),
            "window_weight": Quantity(micro.window_weight, "1", "Tr w(H) / D"),
            "window_weight_err": Quantity(micro.window_weight_err, "1", "standard error"),
            "values": {n: Quantity(micro.values[n], "1", "microcanonical <A>_E") for n in names},
            "errors": {n: Quantity(micro.errors[n], "1", "jackknife error") for n in names},
        },
    }
    methods = {
        "canonical": "thermal pure quantum states e^{-beta H/2}|r> (S. Sugiura & A. Shimizu, PRL 108, 240401 (2012); "
                     "PRL 111, 010401 (2013)); jackknife errors over the random vectors",
        "beta_match": "cubic Hermite interpolation of <H>_beta with slope -Var_beta, Brent root; canonical values at "
                      "beta* by cubic spline; error = statistical (+) |d<A>/dbeta| beta_err in quadrature",
        "microcanonical": "Gaussian-window filtered random states, Chebyshev series (A. Weisse et al., "
                          "Rev. Mod. Phys. 78, 275 (2006))",
    }
    attrs = {
        **run_attributes("thermal", text, scenario.title, problem=problem),
        "ensemble_note": note,
        "initial_weight_in_basis": captured,
        "state_energy": energy,
        "state_width": width,
        "bounds": [bounds.e_min, bounds.e_max],
        "grid_history": history,
        "n_vectors": options.vectors,
        "vector_dtype": np.dtype(vector_dtype(problem)).name,
        "canonical_matvecs": canon.n_matvecs,
        "canonical_tolerance": canon.tol,
        "microcanonical_filter_terms": micro.n_moments,
        "microcanonical_truncation": micro.truncation,
        "microcanonical_matvecs": micro.n_matvecs,
        "methods": methods,
        "timings": timings,
        "seeds": {"random_vectors": options.seed, "bounds_lanczos": BOUNDS_SEED,
                  "rule": "SeedSequence(seed).spawn(3) -> (beta guess, canonical, microcanonical) generators"},
        "memory_forecast_bytes": forecast.total_bytes,
    }
    write_results(folder / "results.h5", tree, attrs=attrs)
    summary = {
        **summary_head("thermal", problem, D, note),
        "state_energy": energy,
        "state_width": width,
        "beta": beta,
        "beta_err": beta_err,
        "temperature": temperature,
        "temperature_err": temperature_err,
        "canonical_energy_at_beta": matched["energy"]["value"],
        "canonical_energy_width_at_beta": float(np.sqrt(max(matched["energy_variance"]["value"], 0.0))),
        "beta_grid": {"min": float(canon.betas.min()), "max": float(canon.betas.max()), "points": int(canon.betas.size),
                      "extensions": len(history) - 1},
        "vectors": options.vectors,
        "seed": options.seed,
        "microcanonical_window": {
            "center": micro.energy, "width": micro.width, "mean_energy": micro.mean_energy,
            "mean_energy_err": micro.mean_energy_err, "energy_spread": micro.energy_spread,
            "states_in_window": micro.window_weight * D,
            "filter_terms": micro.n_moments,
        },
        "observables": obs_summary,
        "timings": timings,
        "wall_seconds": timings["total_seconds"],
        "memory_forecast_bytes": forecast.total_bytes,
    }
    write_summary(folder / "summary.json", summary)
    _plot(folder / "thermal.png", canon, beta, problem.scenario.title + f" (L = {problem.n_sites})", energy)
    _report(problem, folder, summary)
    return summary


@plots._styled
def _plot(path, canon, beta, title, energy):
    """Observables (top) and energy (bottom) against temperature T = 1/beta (beta* > 0) or beta."""
    use_t = beta > 0
    keep = canon.betas > 0 if use_t else np.ones(canon.betas.size, bool)
    x = 1.0 / canon.betas[keep] if use_t else canon.betas
    order = np.argsort(x)
    x = x[order]
    fig, (ax1, ax2) = plots._figure(2, height=2.8)
    names = list(canon.values)
    for name, color in zip(names, plots._colors(len(names))):
        m = canon.values[name][keep][order]
        e = canon.errors[name][keep][order]
        ax1.plot(x, m, color=color, lw=1.2, label=name)
        ax1.fill_between(x, m - e, m + e, color=color, alpha=0.25, lw=0)
    m = canon.energy[keep][order]
    e = canon.energy_err[keep][order]
    ax2.plot(x, m, color="k", lw=1.2, label="⟨H⟩_β")
    ax2.fill_between(x, m - e, m + e, color="k", alpha=0.2, lw=0)
    ax2.axhline(energy, color="C3", lw=0.8, ls=":", label="⟨ψ|H|ψ⟩")
    xm = 1.0 / beta if use_t else beta
    for ax in (ax1, ax2):
        ax.axvline(xm, color="C3", ls="--", lw=1.0, label=("matched T* = %.4g" % xm) if use_t else
                   ("matched β* = %.4g" % xm))
        if use_t:
            ax.set_xscale("log")
            plain = matplotlib.ticker.FuncFormatter(lambda v, _: f"{v:g}")
            ax.xaxis.set_major_formatter(plain)
            ax.xaxis.set_minor_formatter(plain if x.max() / x.min() < 30 else matplotlib.ticker.NullFormatter())
        plots._legend_outside(ax)
    ax1.set_ylabel("canonical ⟨A⟩")
    ax2.set_ylabel("energy (J)")
    ax2.set_xlabel("temperature T (J)" if use_t else "inverse temperature β (1/J)")
    plots._title(ax1, title)
    return plots._save(fig, path)


def _report(problem, folder: Path, s: dict) -> None:
    rows = [
        ("state energy ⟨ψ|H|ψ⟩", html.format_number(s["state_energy"], 8), f"width ΔE = {s['state_width']:.4g}"),
        ("matched β*", html.format_value_error(s["beta"], s["beta_err"]), "1/J"),
        ("matched temperature T*", html.format_value_error(s["temperature"], s["temperature_err"]), "J"),
        ("canonical energy width at β*", html.format_number(s["canonical_energy_width_at_beta"]), "J"),
        ("β grid", f"[{s['beta_grid']['min']:.4g}, {s['beta_grid']['max']:.4g}], {s['beta_grid']['points']} points",
         f"{s['beta_grid']['extensions']} extension(s)"),
    ]
    obs_rows = []
    for n, o in s["observables"].items():
        obs_rows.append((f"{n}: canonical at β*", html.format_value_error(o["canonical"], o["canonical_err"]),
                         f"stat. {o['canonical_err_statistical']:.2g}, from β* {o['canonical_err_from_beta']:.2g}"))
        obs_rows.append((f"{n}: microcanonical", html.format_value_error(o["microcanonical"], o["microcanonical_err"]),
                         ""))
    w = s["microcanonical_window"]
    sections = [
        html.Section("Canonical values against temperature", images=["thermal.png"], table=rows,
                     paragraphs=[s["ensemble_note"],
                                 f"Thermal pure quantum states from {s['vectors']} random vectors (seed {s['seed']}); "
                                 "bands are jackknife errors."]),
        html.Section("Thermal predictions at the state's energy", table=obs_rows, paragraphs=[
            f"Microcanonical window: Gaussian eigenstate weights of standard deviation σ = {w['width']:.4g} J around "
            f"E = {w['center']:.6g} J (filtered states' mean energy {w['mean_energy']:.6g} ± {w['mean_energy_err']:.2g}, "
            f"spread {w['energy_spread']:.4g}; about {w['states_in_window']:.4g} states in the window; "
            f"{w['filter_terms']} Chebyshev terms)."]),
        html.Section("Run", table=[
            ("basis", problem.basis.label, problem.basis_reason),
            ("initial state", problem.start.label, ""),
            ("wall time (s)", html.format_number(s["wall_seconds"]),
             ", ".join(f"{k.replace('_seconds', '')} {v:.3g}" for k, v in s["timings"].items()
                       if k != "total_seconds")),
            ("memory forecast", format_bytes(s["memory_forecast_bytes"]), ""),
        ]),
    ]
    html.write_report(folder / "report.html", title=problem.scenario.title, sections=sections,
                      subtitle=f"largeq {__version__}: thermal predictions for L = {problem.n_sites}")
