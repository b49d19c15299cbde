"""Effective dimension, fluctuation bound and thermal comparison for the main command.

Chooses the method by size: exact diagonalization of the state's symmetric subspace where it
fits, the KPM estimate of d_eff and thermal pure quantum states at moderate sizes, nothing
beyond (the summary then says how to get the numbers).  Everything is returned as plain
numbers for summary.json and as table rows for the report.
"""

from __future__ import annotations

import numpy as np

from largeq.analysis.equilibrium_formulas import fluctuation_bound
from largeq.analysis.equilibration import (DenseLimitError, estimate_deff, exact_equilibration, exact_plan,
                                           exact_thermal_values, thermal_values)
from largeq.constants import ESTIMATE_MAX_DIM, EXACT_AUTO_MAX_BLOCK, EXACT_THERMAL_MAX_DIM
from largeq.engines.threads import dense_linear_algebra
from largeq.reports.progress import progress_bar

__all__ = ["MODES", "ESTIMATE_MAX_DIM", "equilibration_report"]

MODES = ("auto", "exact", "estimate", "off")


def _finite(x):
    return None if x is None or not np.isfinite(x) else float(x)


def equilibration_report(problem, times, survival, analyses, *, mode: str = "auto", seed: int = 0,
                         energy: float, progress: bool | None = None) -> dict:
    """d_eff (exact or estimated, and how), bounds, sigma^2 / bound and thermal values per observable.

    Returns {"summary": dict for summary.json, "per_observable": {name: dict}, "rows": report rows}.
    Dense diagonalizations run under the dense thread policy (:mod:`largeq.engines.threads`); ``progress``
    shows a bar over the thermal values' symmetry blocks.
    """
    if mode not in MODES:
        raise ValueError(f"equilibration mode: got {mode!r}; allowed: {', '.join(MODES)}")
    rng = np.random.default_rng(seed)
    dim = problem.basis.dim
    out = {"summary": {"method": "skipped", "seed": seed}, "per_observable": {n: {} for n in analyses}, "rows": []}
    if mode == "off":
        out["summary"]["note"] = "not requested (--equilibration off)"
        return out
    exact = None
    # no symmetry group of a chain has more than 4 L elements: a block is at least dim / (4 L) large
    hopeless = mode == "auto" and dim > 4 * problem.n_sites * EXACT_AUTO_MAX_BLOCK
    if hopeless:
        out["summary"]["exact_note"] = (f"basis dimension {dim:,}: every symmetry block is larger than the automatic "
                                        f"limit {EXACT_AUTO_MAX_BLOCK:,}")
    elif mode in ("exact", "auto"):
        plan = exact_plan(problem)
        if mode == "exact" or plan.largest <= EXACT_AUTO_MAX_BLOCK:
            try:
                with dense_linear_algebra():
                    exact = exact_equilibration(problem, plan=plan)
            except DenseLimitError as exc:
                if mode == "exact":
                    raise
                out["summary"]["exact_note"] = str(exc)
        else:
            out["summary"]["exact_note"] = (f"largest symmetry block touched by the initial state has dimension "
                                            f"{plan.largest:,} > {EXACT_AUTO_MAX_BLOCK:,} (automatic limit); "
                                            "--equilibration exact runs it anyway")
    if exact is not None:
        _from_exact(problem, exact, analyses, energy, out, rng, progress)
        return out
    if mode == "estimate" or dim <= ESTIMATE_MAX_DIM:
        _from_estimate(problem, times, survival, analyses, energy, rng, out)
        return out
    out["summary"]["note"] = (f"basis dimension {dim:,} is beyond the automatic limit ({ESTIMATE_MAX_DIM:,}): "
                              "rerun with --equilibration estimate (costs a KPM run), or see 'largeq crosscheck' "
                              "and 'largeq thermal'")
    return out


def _from_exact(problem, ex, analyses, energy, out, rng, progress=None) -> None:
    s = out["summary"]
    s.update(method="exact diagonalization", d_eff=ex.d_eff, d_eff_range=[ex.d_eff, ex.d_eff],
             how=(f"dense diagonalization of {ex.subspace}"
                  + ("" if f"dimension {ex.dim:,}" in ex.subspace else f" (dimension {ex.dim:,})")
                  + "; degenerate levels grouped"),
             gap_degeneracy_N0=ex.gap_degeneracy, details=ex.summary())
    s["details"].pop("observables", None)
    th = None
    if problem.basis.dim <= EXACT_THERMAL_MAX_DIM:
        bar = progress_bar(None, f"thermal values L={problem.n_sites}", enabled=progress)

        def on_block(i, n):
            if bar._bar is not None and bar._bar.total != n:
                bar._bar.total = n
            bar.update(1)

        try:
            with dense_linear_algebra():
                th = exact_thermal_values(problem, energy, psi=problem.initial_vector()[0], progress=on_block)
            s["thermal"] = {"method": "exact (all symmetry blocks of the basis)", "beta": th.beta, "width": th.width,
                            "ensemble": th.ensemble}
            if th.spin_weights:
                s["thermal"]["by_total_spin"] = {
                    f"{sv:g}": {"weight": w, "energy": th.spin_energies[sv], "beta": th.spin_betas[sv]}
                    for sv, w in th.spin_weights.items()}
        except DenseLimitError as exc:
            s["thermal"] = {"method": "skipped", "note": str(exc)}
        finally:
            bar.close()
    elif problem.basis.dim <= ESTIMATE_MAX_DIM:
        th = thermal_values(problem, energy, n_vectors=8, rng=rng)
        s["thermal"] = {"method": "thermal pure quantum states + KPM-filtered random states", "beta": th.beta,
                        "beta_err": th.beta_err, "width": th.width, "vectors": th.n_vectors,
                        "left_out": th.left_out}
    else:
        s["thermal"] = {"method": "skipped", "note": f"basis dimension {problem.basis.dim:,} beyond {ESTIMATE_MAX_DIM:,}"}
    rows = out["rows"]
    rows.append(("effective dimension d_eff", f"{ex.d_eff:.5g}", s["how"]))
    rows.append(("largest gap degeneracy N(0)", str(ex.gap_degeneracy), ""))
    for name, a in analyses.items():
        o = ex.observables[name]
        entry = {
            "diagonal_ensemble": o.equilibrium, "exact_variance": o.variance,
            "bound": o.bound_range, "bound_norm": o.bound_norm, "gap_factor": o.gap_factor,
            "bound_formula": "D_G (a_max - a_min)^2 / (4 d_eff)  [Reimann 2008; Short 2011; Short & Farrelly 2012]",
            "exact_variance_over_bound": o.ratio, "bound_holds": bool(o.holds),
            "measured_variance_over_bound": a.variance / o.bound_range if o.bound_range > 0 else None,
        }
        if th is not None:
            entry.update(canonical=th.canonical[name], microcanonical=th.microcanonical[name])
            if getattr(th, "spin_weights", None):
                entry.update(canonical_spins_mixed=th.canonical_mixed[name],
                             microcanonical_spins_mixed=th.microcanonical_mixed[name])
        out["per_observable"][name] = entry
        rows.append((f"{name}: ⟨A⟩∞ (diagonal ensemble) vs window mean",
                     f"{o.equilibrium:.5g} vs {a.equilibrium:.5g} ± {a.equilibrium_err:.2g}", ""))
        rows.append((f"{name}: σ² exact / bound", f"{o.variance:.3g} / {o.bound_range:.3g} = {o.ratio:.3g}",
                     "bound holds" if o.holds else "BOUND VIOLATED"))
        if th is not None:
            rows.append((f"{name}: canonical / microcanonical", f"{th.canonical[name]:.5g} / {th.microcanonical[name]:.5g}",
                         f"β = {th.beta:.4g}; " + _ensemble_note(th)))


def _from_estimate(problem, times, survival, analyses, energy, rng, out) -> None:
    est = estimate_deff(problem, n_moments=256, n_vectors=10, rng=rng, survival=(times, survival))
    s = out["summary"]
    s.update(method="KPM estimate", d_eff=est.d_eff, d_eff_range=[est.d_eff_low, est.d_eff_high],
             how=(f"eta * integral of LDOS^2 / DOS (eta = {est.eta:.3g}); {est.assumption}"),
             reliable=bool(est.reliable), warnings=list(est.warnings), details=est.summary())
    th = thermal_values(problem, energy, n_vectors=8, rng=rng)
    s["thermal"] = {"method": "thermal pure quantum states + KPM-filtered random states",
                    "beta": th.beta, "beta_err": th.beta_err, "width": th.width, "vectors": th.n_vectors,
                    "left_out": th.left_out}
    rows = out["rows"]
    rows.append(("effective dimension d_eff (estimate)", f"{est.d_eff:.4g} [{est.d_eff_low:.3g}, {est.d_eff_high:.3g}]",
                 "assumes chaotic eigenvectors; " + ("; ".join(est.warnings) if est.warnings else "no warning")))
    if est.plateau_d_eff is not None:
        rows.append(("d_eff from the survival plateau (rough)", f"{est.plateau_d_eff:.4g}", "late-time mean of |⟨ψ(0)|ψ(t)⟩|²"))
    for name, a in analyses.items():
        obs = problem.observables[name]
        b = fluctuation_bound(obs.norm, est.d_eff, a_min=obs.a_min, a_max=obs.a_max)
        out["per_observable"][name] = {
            "bound": b.value, "bound_formula": b.formula + " with the estimated d_eff (non-degenerate gaps assumed)",
            "measured_variance_over_bound": a.variance / b.value if b.value > 0 else None,
            "canonical": th.canonical[name], "canonical_err": th.canonical_err[name],
            "microcanonical": th.microcanonical.get(name), "microcanonical_err": th.microcanonical_err.get(name),
        }
        rows.append((f"{name}: σ² (window) / bound", f"{a.variance:.3g} / {b.value:.3g}", "bound from the estimated d_eff"))
        rows.append((f"{name}: window mean vs canonical vs microcanonical",
                     f"{a.equilibrium:.4g} vs {th.canonical[name]:.4g} ± {th.canonical_err[name]:.2g} vs "
                     f"{th.microcanonical.get(name, float('nan')):.4g}",
                     f"β = {th.beta:.4g} ± {th.beta_err:.2g}; " + _ensemble_note(th)))


def _ensemble_note(th) -> str:
    """What the thermal ensemble resolves and which conserved quantity it leaves out."""
    left = getattr(th, "left_out", None)
    if left:
        return "ensemble leaves out: " + left
    ens = getattr(th, "ensemble", None)
    return ens or ""
