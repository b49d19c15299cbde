"""``largeq crosscheck``: the large-L estimators against exact diagonalization at small L.

For each chain length L (``scenario.with_length(L)``) whose state's symmetric subspace fits a dense
diagonalization, compute exactly (``largeq.analysis.equilibration.exact_equilibration``) and by the estimators
that also work past the exact-diagonalization wall, and compare:

* d_eff: raw KPM estimate (``estimate_deff``), the calibrated estimate (raw x the ratio exact / raw fitted over
  the *smaller* sizes of the same run and extrapolated, with its prediction interval and leave-out validation,
  ``calibrate_deff``) and the survival-probability plateau vs exact 1 / sum p_E^2;
* <A>_inf: late-window mean of the relaxation curve (``evolve`` over the scenario's time grid, then
  ``analyse_curve`` with the exact diagonal ensemble, so "settled" requires agreement with it) vs the
  diagonal ensemble;
* sigma_A^2: late-window temporal variance vs the exact infinite-time variance (and the bound);
* LDOS and DOS: Kolmogorov-Smirnov distance sup_E |F_KPM(E) - F_exact(E)| of the normalised counting
  functions (the KPM one is the exact integral of the kernel-damped series, the exact one a step
  function); also the distance to the exact counting function damped with the same Jackson kernel;
* thermal values: canonical (TPQ, beta solved for <H>_beta = <psi|H|psi>) and microcanonical vs the
  same ensembles from the dense spectrum of every symmetry block of the basis;
* <r> in a fully resolved block and N(0), the largest gap degeneracy.

A run folder gets ``results.h5``, ``summary.json`` (rewritten after each size), ``crosscheck.png``
(estimate against exact over L) and ``report.html``.
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np

from largeq import __version__
from largeq.analysis.equilibrium_formulas import GOE_R, POISSON_R
from largeq.analysis.curves import analyse_curve
from largeq.operators.problem import build_problem
from largeq.engines.kpm import kernel_factors, reconstruct_cumulative
from largeq.engines.propagate import evolve
from largeq.analysis.equilibration import (CalibrationPoint, DenseLimitError, default_bounds, estimate_deff,
                                           exact_equilibration, exact_thermal_values, thermal_values)
from largeq.reports.progress import progress_bar
from largeq.reports import html
from largeq.reports import plots
from largeq.reports.run_record import run_attributes
from largeq.reports.store import (Quantity, atomic_write_text, make_run_folder, write_results,
                                  write_summary)
from largeq.reports.headline import EXACT_ACCURACY, fmt, fmt_error
from largeq.scenario.spec import scenario_to_toml
from largeq.basis.blocks import symmetry_group
from largeq.operators.vectors import vdot
from largeq.constants import CROSSCHECK_SEED, MAX_DENSE_DIM

__all__ = ["CrosscheckOptions", "crosscheck_size", "run_crosscheck", "format_table", "ks_distances"]


class CrosscheckOptions:
    """Settings of a cross-check run (not physics).

    Parameters
    ----------
    n_moments : int
        KPM moments for the LDOS and DOS (default 256).
    n_vectors : int
        Random vectors for the DOS trace and the thermal averages (default 20).
    seed : int
        Seed of every random draw (one child generator per size and task).
    max_dim : int
        Largest dense diagonalization (default MAX_DENSE_DIM, 13000).
    progress : bool or None
    window_start : float or None
        Start of the late averaging window (time units); None: the scenario's ``time.window_start``, else
        the last half of the run.
    dos_vectors : int or None
        Random vectors of the KPM DOS in the d_eff estimate (default: ``n_vectors``); the DOS noise is the
        raw estimate's only random error, and it is large where the state's energy sits in a sparse part
        of the spectrum.
    """

    def __init__(self, n_moments: int = 256, n_vectors: int = 20, seed: int = CROSSCHECK_SEED,
                 max_dim: int = MAX_DENSE_DIM,
                 progress: bool | None = None, window_start: float | None = None, dos_vectors: int | None = None):
        if int(n_moments) != n_moments or n_moments < 16:
            raise ValueError(f"n_moments must be an integer >= 16, got {n_moments!r}")
        if int(n_vectors) != n_vectors or n_vectors < 2:
            raise ValueError(f"n_vectors must be an integer >= 2 (error bars need two), got {n_vectors!r}")
        if dos_vectors is not None and (int(dos_vectors) != dos_vectors or dos_vectors < 2):
            raise ValueError(f"dos_vectors must be an integer >= 2, got {dos_vectors!r}")
        if window_start is not None and not (np.isfinite(window_start) and window_start >= 0):
            raise ValueError(f"window_start must be a finite time >= 0, got {window_start!r}")
        self.n_moments, self.n_vectors, self.seed = int(n_moments), int(n_vectors), int(seed)
        self.max_dim, self.progress = int(max_dim), progress
        self.window_start = None if window_start is None else float(window_start)
        self.dos_vectors = int(n_vectors if dos_vectors is None else dos_vectors)


def _exact_cumulative_damped(energies, weights, density):
    """Exact counting function damped with the same kernel and scaling as the KPM ``density``."""
    a, b = density.scale, density.shift
    x = np.clip((np.asarray(energies) - b) / a, -1.0, 1.0)
    n = np.arange(density.n_moments)
    mu = np.cos(np.outer(n, np.arccos(x))) @ np.asarray(weights, dtype=float)  # sum_m w_m T_n(x_m)
    g = kernel_factors("jackson", density.n_moments)
    _, cum = reconstruct_cumulative(mu * g, density.energies.size)
    return cum


def ks_distances(grid, kpm_cumulative, energies, weights, density) -> tuple[float, float]:
    """(sup |F_KPM - F_exact|, sup |F_KPM - F_exact damped|) on the KPM grid, both normalised to 1.

    F_exact(E) = sum_{E_m <= E} w_m / sum w_m (a step function); the damped one is the exact counting
    function expanded in the same Chebyshev series with the same Jackson factors.
    """
    e = np.asarray(energies, dtype=float)
    w = np.asarray(weights, dtype=float)
    order = np.argsort(e)
    e, w = e[order], w[order]
    total = w.sum()
    step = np.concatenate([[0.0], np.cumsum(w)])[np.searchsorted(e, grid, side="right")] / total
    f = np.asarray(kpm_cumulative) / kpm_cumulative[-1]
    damped = _exact_cumulative_damped(e, w / total, density)
    return float(np.max(np.abs(f - step))), float(np.max(np.abs(f - damped / damped[-1])))


def _relaxation(problem, psi, bounds):
    sc = problem.scenario
    times = sc.time.times()
    names = list(problem.observables)
    ops = {n: problem.observable_operator(n) for n in names}
    vals = {n: np.empty(times.size) for n in names}
    surv = np.empty(times.size)

    def on_output(i, t, v):
        n2 = vdot(v, v).real
        surv[i] = abs(vdot(psi, v)) ** 2 / n2
        for n in names:
            vals[n][i] = ops[n].expectation(v).real / n2

    # tol at most 1e-12: evolve checks the accumulated norm drift against 2 tol + 1e-9 of the *initial*
    # norm, which per-step truncation errors of 1e-10 can exceed after ~100 steps (seen at L = 10)
    stats = evolve(problem.operator, psi, times, method=sc.numerics.method, bounds=bounds,
                   tol=min(sc.numerics.tolerance, 1e-12), on_output=on_output)
    return times, vals, surv, stats


def _rel(est, exact):
    return (est - exact) / abs(exact) if exact != 0 else float("nan")


def calibration_point(row: dict) -> CalibrationPoint | None:
    """The (exact, raw) d_eff pair of a finished cross-check row, for calibrating larger sizes."""
    if row.get("status") != "ok":
        return None
    return CalibrationPoint(int(row["sites"]), float(row["d_eff_exact"]), float(row["d_eff_kpm"]),
                            float(row["d_eff_kpm_low"]), float(row["d_eff_kpm_high"]), row.get("d_eff_kpm_log_err"))


def crosscheck_size(scenario, L: int, options: CrosscheckOptions, previous=()) -> dict:
    """Exact values and estimates for one chain length (see the module docstring).

    ``previous``: rows of smaller sizes of the same scenario (their exact and raw d_eff calibrate this
    size's estimate; never this size's own exact value).

    Returns
    -------
    dict
        ``{'sites', 'status', ...}``; status 'ok' or 'skipped' (with ``reason``).
    """
    t0 = time.perf_counter()
    sc = scenario.with_length(L)
    problem = build_problem(sc)
    psi, captured = problem.initial_vector()
    psi = psi / np.linalg.norm(psi)
    group = symmetry_group(problem)
    try:
        ex = exact_equilibration(problem, max_dim=options.max_dim, psi=psi, group=group)
    except DenseLimitError as exc:
        return {"sites": L, "status": "skipped", "reason": str(exc)}
    rngs = np.random.default_rng([options.seed, L]).spawn(2)
    bounds = default_bounds(problem.operator)
    times, curves, surv, stats = _relaxation(problem, psi, bounds)
    ws = options.window_start if options.window_start is not None else sc.time.window_start
    analyses = {n: analyse_curve(times, v, window_start=ws, exact_equilibrium=ex.observables[n].equilibrium)
                for n, v in curves.items()}
    points = [p for p in (calibration_point(r) for r in previous) if p is not None and p.sites < L]
    est = estimate_deff(problem, n_moments=options.n_moments, n_vectors=options.dos_vectors, rng=rngs[0],
                        psi=psi, bounds=bounds, survival=(times, surv), level_ratio=ex.level_ratio, group=group,
                        calibration=points)
    cal = est.calibration
    ldos_ks, ldos_ks_d = ks_distances(est.ldos.energies, est.ldos.cumulative, ex.quench.level_energies,
                                      ex.quench.level_weights, est.ldos)
    dos_ks, dos_ks_d = ks_distances(est.dos.energies, est.dos.cumulative, ex.energies, np.ones(ex.energies.size),
                                    est.dos)
    th = thermal_values(problem, ex.energy_mean, n_vectors=options.n_vectors, rng=rngs[1], bounds=bounds)
    tx = exact_thermal_values(problem, ex.energy_mean, width=th.width, max_dim=options.max_dim, group=group)
    obs = {}
    for n, o in ex.observables.items():
        a = analyses[n]
        obs[n] = {
            "equilibrium_exact": o.equilibrium, "equilibrium_curve": a.equilibrium,
            "equilibrium_curve_err": a.equilibrium_err, "settled": a.settled, "status": a.status,
            "equilibrium_curve_z": a.exact_z, "relaxation_time": a.relaxation_time,
            "window": [a.window_start, a.window_end],
            "variance_exact": o.variance, "variance_curve": a.variance,
            "bound": o.bound_range, "bound_norm": o.bound_norm, "variance_over_bound": o.ratio, "bound_holds": o.holds,
            "canonical_exact": tx.canonical[n], "canonical_tpq": th.canonical[n], "canonical_tpq_err": th.canonical_err[n],
            "microcanonical_exact": tx.microcanonical[n], "microcanonical_tpq": th.microcanonical[n],
            "microcanonical_tpq_err": th.microcanonical_err[n],
        }
    row = {
        "sites": L, "status": "ok", "basis": problem.basis.label, "basis_dimension": int(problem.basis.dim),
        "subspace": ex.subspace, "subspace_dimension": ex.dim, "initial_state": problem.start.label,
        "initial_weight_in_basis": captured, "energy_mean": ex.energy_mean, "energy_variance": ex.energy_variance,
        "d_eff_exact": ex.d_eff, "d_eff_kpm": est.d_eff, "d_eff_kpm_low": est.d_eff_low,
        "d_eff_kpm_high": est.d_eff_high, "d_eff_kpm_rel_error": _rel(est.d_eff, ex.d_eff),
        "d_eff_kpm_log_err": est.log_err, "d_eff_raw": est.d_eff,
        "d_eff_estimate": cal.d_eff, "d_eff_estimate_low": cal.d_eff_low, "d_eff_estimate_high": cal.d_eff_high,
        "d_eff_estimate_rel_error": _rel(cal.d_eff, ex.d_eff),
        "d_eff_estimate_covers": bool(cal.d_eff_low <= ex.d_eff <= cal.d_eff_high),
        "d_eff_estimate_level": cal.level, "d_eff_estimate_from_sizes": list(cal.used),
        "calibration": cal.summary(), "reasons": list(est.reasons),
        "d_eff_plateau": est.plateau_d_eff, "d_eff_plateau_low": est.plateau_low, "d_eff_plateau_high": est.plateau_high,
        "eta": est.eta, "narrow": est.narrow, "reliable": est.reliable, "warnings": list(est.warnings),
        "assumption": est.assumption, "ldos_width": est.estimate.ldos_width, "kpm_resolution": est.estimate.resolution,
        "ldos_ks": ldos_ks, "ldos_ks_damped": ldos_ks_d, "dos_ks": dos_ks, "dos_ks_damped": dos_ks_d,
        "gap_degeneracy_N0": ex.gap_degeneracy, "n_degenerate_gaps": ex.n_degenerate_gaps,
        "level_ratio": None if ex.level_ratio is None else ex.level_ratio.mean_r,
        "level_ratio_err": None if ex.level_ratio is None else ex.level_ratio.stderr,
        "level_ratio_n": None if ex.level_ratio is None else ex.level_ratio.n,
        "level_block": ex.level_block, "beta_exact": tx.beta, "beta_tpq": th.beta, "beta_tpq_err": th.beta_err,
        "micro_width": th.width, "observables": obs, "evolution_matvecs": stats.matvecs,
        "seconds": time.perf_counter() - t0,
    }
    arrays = {
        "times": Quantity(times, "1/J", "output times"),
        "survival": Quantity(surv, "1", "|<psi|psi(t)>|^2"),
        **{f"curve_{n}": Quantity(v, "1", f"<{n}(t)>") for n, v in curves.items()},
        "ldos_energies": Quantity(est.ldos.energies, "J", "KPM grid"),
        "ldos_kpm": Quantity(est.ldos.density, "1/J", "KPM local density of states (Jackson)"),
        "dos_energies": Quantity(est.dos.energies, "J", "KPM grid"),
        "dos_kpm": Quantity(est.dos.density, "1/J", "KPM density of states of the state's subspace"),
        "dos_kpm_err": Quantity(est.dos.density_err, "1/J", "standard error over random vectors"),
        "level_energies": Quantity(ex.quench.level_energies, "J", "distinct levels of the state's subspace"),
        "level_weights": Quantity(ex.quench.level_weights, "1", "p_E = ||P_E psi||^2"),
        "subspace_energies": Quantity(ex.energies, "J", "eigenvalues of the state's subspace"),
    }
    row["_arrays"] = arrays
    return row


def _fmt(x, digits=4):
    if x is None or (isinstance(x, float) and not np.isfinite(x)):
        return "-"
    return f"{x:.{digits}g}"


def _pct(x):
    return "-" if x is None or not np.isfinite(x) else f"{100 * x:+.1f}%"


def _error(estimate, exact, scale=None):
    """Relative error in %, or the absolute difference when the exact value is (near) zero.

    Near zero a relative error means nothing (an exact beta of 0 would give 10^14 %): the
    difference is printed instead whenever |exact| is below ``scale`` (the estimate's own error
    bar, or 1e-6 without one).
    """
    if estimate is None or exact is None or not (np.isfinite(estimate) and np.isfinite(exact)):
        return "-"
    small = scale if scale is not None and np.isfinite(scale) and scale > 0 else 1e-6
    if abs(exact) <= small:
        return f"{estimate - exact:+.1e} abs"
    return _pct(_rel(estimate, exact))


def format_table(row: dict) -> str:
    """The per-size table printed by the command (plain text)."""
    if row["status"] != "ok":
        return f"L = {row['sites']}: skipped ({row['reason']})"
    lines = [
        f"L = {row['sites']}: {row['basis']}",
        f"  state: {row['initial_state']}; <H> = {row['energy_mean']:.6g}, Var H = {row['energy_variance']:.4g}; "
        f"diagonalized {row['subspace_dimension']:,} (state's symmetric subspace)",
    ]
    if row["level_ratio"] is not None:
        lines.append(f"  <r> = {row['level_ratio']:.4f} +- {row['level_ratio_err']:.4f} ({row['level_ratio_n']} ratios) in "
                     f"{row['level_block']}; GOE {GOE_R:.4f}, Poisson {POISSON_R:.4f}")
    lines.append(f"  N(0) = {row['gap_degeneracy_N0']} (largest gap degeneracy), {row['n_degenerate_gaps']} degenerate gaps")
    head = f"  {'quantity':34s} {'exact':>12s} {'estimate':>24s} {'error':>10s}"
    lines += [head, "  " + "-" * (len(head) - 2)]

    def add(label, exact, est, err):
        lines.append(f"  {label:34s} {exact:>12s} {est:>24s} {err:>10s}")

    add("d_eff (raw KPM formula)", _fmt(row["d_eff_exact"]),
        f"{_fmt(row['d_eff_kpm'])} [{_fmt(row['d_eff_kpm_low'], 3)}, {_fmt(row['d_eff_kpm_high'], 3)}]",
        _pct(row["d_eff_kpm_rel_error"]))
    if row.get("d_eff_estimate") is not None and np.isfinite(row["d_eff_estimate"]):
        add(f"d_eff (calibrated on L={','.join(map(str, row['d_eff_estimate_from_sizes']))})", _fmt(row["d_eff_exact"]),
            f"{_fmt(row['d_eff_estimate'])} [{_fmt(row['d_eff_estimate_low'], 3)}, {_fmt(row['d_eff_estimate_high'], 3)}]",
            _pct(row["d_eff_estimate_rel_error"]))
    if row["d_eff_plateau"] is not None:
        add("d_eff (survival plateau)", _fmt(row["d_eff_exact"]),
            f"{_fmt(row['d_eff_plateau'])} [{_fmt(row['d_eff_plateau_low'], 3)}, {_fmt(row['d_eff_plateau_high'], 3)}]",
            _pct(_rel(row["d_eff_plateau"], row["d_eff_exact"])))
    add("LDOS KS distance (damped)", "-", f"{row['ldos_ks']:.3g} ({row['ldos_ks_damped']:.1g})", "")
    add("DOS KS distance (damped)", "-", f"{row['dos_ks']:.3g} ({row['dos_ks_damped']:.1g})", "")
    add("beta at <H>", _fmt(row["beta_exact"]), f"{_fmt(row['beta_tpq'])} +- {row['beta_tpq_err']:.1g}",
        _error(row["beta_tpq"], row["beta_exact"], row["beta_tpq_err"]))
    for n, o in row["observables"].items():
        add(f"<{n}>_inf (curve window)", fmt(o["equilibrium_exact"], EXACT_ACCURACY),
            f"{_fmt(o['equilibrium_curve'])} +- {o['equilibrium_curve_err']:.1g}",
            f"{o['equilibrium_curve'] - o['equilibrium_exact']:+.1e}")
        add(f"sigma^2 {n} (curve window)", _fmt(o["variance_exact"], 3), _fmt(o["variance_curve"], 3),
            _error(o["variance_curve"], o["variance_exact"]))
        add(f"sigma^2/bound {n}", _fmt(o["variance_over_bound"], 3), f"bound {_fmt(o['bound'], 3)}",
            "holds" if o["bound_holds"] else "VIOLATED")
        add(f"canonical {n}", fmt(o["canonical_exact"], EXACT_ACCURACY),
            f"{_fmt(o['canonical_tpq'])} +- {o['canonical_tpq_err']:.1g}",
            f"{o['canonical_tpq'] - o['canonical_exact']:+.1e}")
        add(f"microcanonical {n}", fmt(o["microcanonical_exact"], EXACT_ACCURACY),
            f"{_fmt(o['microcanonical_tpq'])} +- {o['microcanonical_tpq_err']:.1g}",
            f"{o['microcanonical_tpq'] - o['microcanonical_exact']:+.1e}")
    v = (row.get("calibration") or {}).get("validation")
    if v:
        lines.append(f"  leave-out check: L = {v['sites']} predicted {v['predicted']:.4g} [{v['low']:.4g}, {v['high']:.4g}] "
                     f"from L = {', '.join(map(str, v['from_sizes']))}, exact {v['exact']:.4g}: "
                     + ("passed" if v["passed"] else "FAILED"))
    lines.append("  d_eff estimate reliable: " + ("yes" if row["reliable"] else "no"))
    for w in row.get("reasons", row["warnings"]):
        lines.append(f"  reason: {w}")
    for n, o in row["observables"].items():
        if not o.get("settled", True):
            lines.append(f"  {n}: window mean {o.get('status', 'not settled')} ({o['equilibrium_curve_z']:.1f} errors "
                         "from the diagonal ensemble)" if o.get("equilibrium_curve_z") is not None else
                         f"  {n}: not settled")
    lines.append(f"  ({row['seconds']:.1f} s)")
    return "\n".join(lines)


def _save(folder: Path, scenario, rows: list, options: CrosscheckOptions, final: bool) -> dict:
    text = scenario_to_toml(scenario)
    clean = [{k: v for k, v in r.items() if k != "_arrays"} for r in rows]
    summary = {
        "title": scenario.title, "command": "crosscheck", "complete": final,
        "options": {"n_moments": options.n_moments, "n_vectors": options.n_vectors, "seed": options.seed,
                    "max_dim": options.max_dim, "window_start": options.window_start,
                    "dos_vectors": options.dos_vectors},
        "sizes": clean,
        "references": {
            "bound": "P. Reimann, PRL 101, 190403 (2008); A. J. Short, NJP 13, 053009 (2011); "
                     "A. J. Short & T. C. Farrelly, NJP 14, 013063 (2012)",
            "kpm": "A. Weisse, G. Wellein, A. Alvermann & H. Fehske, Rev. Mod. Phys. 78, 275 (2006)",
            "d_eff estimate": "random-matrix reasoning, F. M. Izrailev, Phys. Rep. 196, 299 (1990)",
            "tpq": "S. Sugiura & A. Shimizu, PRL 108, 240401 (2012); PRL 111, 010401 (2013)",
            "level ratio": "V. Oganesyan & D. A. Huse, PRB 75, 155111 (2007); Y. Y. Atas et al., PRL 110, 084101 (2013)",
        },
    }
    write_summary(folder / "summary.json", summary)
    tree = {}
    for r, c in zip(rows, clean):
        if r["status"] != "ok":
            continue
        g = {k: v for k, v in r["_arrays"].items()}
        g["numbers"] = {k: v for k, v in c.items() if isinstance(v, (int, float, bool, np.floating)) and v is not None}
        g["observables"] = {n: {k: v for k, v in o.items() if v is not None and not isinstance(v, (list, str))}
                            for n, o in c["observables"].items()}
        tree[f"L{r['sites']}"] = g
    attrs = run_attributes("crosscheck", text, scenario.title, options=summary["options"], complete=final,
                           references=summary["references"])
    write_results(folder / "results.h5", tree or {"empty": None}, attrs=attrs)
    return summary


def _plots_and_report(folder: Path, scenario, rows: list) -> None:
    ok = [r for r in rows if r["status"] == "ok"]
    if not ok:
        return
    sizes = [r["sites"] for r in ok]
    series = {
        "d_eff exact": ([r["d_eff_exact"] for r in ok], None),
        "d_eff raw KPM formula": ([r["d_eff_kpm"] for r in ok],
                                  [0.5 * (r["d_eff_kpm_high"] - r["d_eff_kpm_low"]) for r in ok]),
        "d_eff calibrated (smaller sizes)": ([r["d_eff_estimate"] for r in ok],
                                             [0.5 * (r["d_eff_estimate_high"] - r["d_eff_estimate_low"]) for r in ok]),
        "d_eff survival plateau": ([r["d_eff_plateau"] if r["d_eff_plateau"] is not None else np.nan for r in ok],
                                   [0.5 * (r["d_eff_plateau_high"] - r["d_eff_plateau_low"])
                                    if r["d_eff_plateau"] is not None else np.nan for r in ok]),
    }
    panels = [{"series": series, "logy": True, "ylabel": "d_eff"}]
    for n in list(ok[0]["observables"])[:4]:  # one panel per observable (first four), one quantity per axis
        panels.append({"series": {f"σ² {n} exact (infinite time)": ([r["observables"][n]["variance_exact"] for r in ok], None),
                                  f"σ² {n} from the curve": ([r["observables"][n]["variance_curve"] for r in ok], None),
                                  f"bound {n}": ([r["observables"][n]["bound"] for r in ok], None)},
                       "logy": True, "ylabel": f"σ² of {n}"})
    plots.plot_panels_versus_size(folder / "crosscheck.png", sizes, panels,
                                  title=f"{scenario.title}: estimates against exact diagonalization")
    sections = [html.Section(
        "Estimates against exact values", images=["crosscheck.png"],
        paragraphs=["d_eff: KPM estimate (LDOS of the state, DOS of its symmetric subspace; "
                    + ok[0]["assumption"] + ")",
                    "KS distances: sup |F_KPM - F_exact| of the normalised counting functions."])]
    for r in ok:
        table = [
            ("d_eff exact", html.format_number(r["d_eff_exact"]), ""),
            ("d_eff KPM", html.format_number(r["d_eff_kpm"]),
             f"range {html.format_number(r['d_eff_kpm_low'])} .. {html.format_number(r['d_eff_kpm_high'])}; "
             f"error {_pct(r['d_eff_kpm_rel_error'])}"),
            ("β at ⟨H⟩ exact / TPQ", fmt(r["beta_exact"], EXACT_ACCURACY, 5),
             f"TPQ {fmt_error(r['beta_tpq'], r['beta_tpq_err'])}; difference {_error(r['beta_tpq'], r['beta_exact'], r['beta_tpq_err'])}"),
            ("d_eff calibrated", html.format_number(r["d_eff_estimate"]),
             f"interval {html.format_number(r['d_eff_estimate_low'])} .. {html.format_number(r['d_eff_estimate_high'])}; "
             f"error {_pct(r['d_eff_estimate_rel_error'])}; reliable: {'yes' if r['reliable'] else 'no'}"),
            ("d_eff survival plateau", html.format_number(r["d_eff_plateau"]) if r["d_eff_plateau"] else "-", ""),
            ("<r>", html.format_value_error(r["level_ratio"], r["level_ratio_err"]) if r["level_ratio"] is not None else "-",
             r["level_block"]),
            ("N(0)", str(r["gap_degeneracy_N0"]), ""),
            ("LDOS / DOS KS distance", f"{r['ldos_ks']:.3g} / {r['dos_ks']:.3g}", ""),
        ]
        for n, o in r["observables"].items():
            table += [
                (f"<{n}>_inf exact / curve", fmt(o["equilibrium_exact"], EXACT_ACCURACY, 5),
                 f"curve {fmt_error(o['equilibrium_curve'], o['equilibrium_curve_err'])}"),
                (f"σ² {n} exact / curve", fmt(o["variance_exact"], digits=3),
                 f"curve {fmt(o['variance_curve'], digits=3)}; σ²/bound {fmt(o['variance_over_bound'], digits=3)}"),
                (f"canonical {n} exact / TPQ", fmt(o["canonical_exact"], EXACT_ACCURACY, 5),
                 f"TPQ {fmt_error(o['canonical_tpq'], o['canonical_tpq_err'])}"),
                (f"microcanonical {n} exact / TPQ", fmt(o["microcanonical_exact"], EXACT_ACCURACY, 5),
                 f"TPQ {fmt_error(o['microcanonical_tpq'], o['microcanonical_tpq_err'])}"),
            ]
        sections.append(html.Section(f"L = {r['sites']}", table=table,
                                     paragraphs=[r["subspace"]] + [f"reason: {w}" for w in r.get("reasons", r["warnings"])]))
    skipped = [r for r in rows if r["status"] != "ok"]
    if skipped:
        sections.append(html.Section("Skipped sizes", paragraphs=[f"L = {r['sites']}: {r['reason']}" for r in skipped]))
    html.write_report(folder / "report.html", title=scenario.title or "cross-check", sections=sections,
                      subtitle=f"largeq {__version__}: cross-check of estimators against exact diagonalization")


def run_crosscheck(scenario, sizes, folder=None, options: CrosscheckOptions | None = None, *, echo=print):
    """Cross-check ``scenario`` at each size; returns (folder, summary). Saves after every size."""
    options = options or CrosscheckOptions()
    sizes = sorted({int(s) for s in sizes})  # ascending: each size is calibrated on the smaller ones
    if not sizes:
        raise ValueError("give at least one size")
    from largeq.workflows.planning import available_bytes, check_basis_fits, evolution_forecast

    avail = available_bytes()
    for s in sizes:
        # validate every size (raises ScenarioError) and refuse, by counting, one that cannot fit: before any work
        check_basis_fits(scenario.with_length(s), lambda d, L: evolution_forecast(d, L, block=1), avail)
    out = make_run_folder(folder, "crosscheck")
    atomic_write_text(out / "scenario.toml", scenario_to_toml(scenario))
    rows = []
    bar = progress_bar(len(sizes), "crosscheck", enabled=options.progress)
    summary = None
    for s in sizes:
        row = crosscheck_size(scenario, s, options, previous=rows)
        rows.append(row)
        if echo is not None:
            echo(format_table(row))
        summary = _save(out, scenario, rows, options, final=False)
        bar.update(1)
    bar.close()
    summary = _save(out, scenario, rows, options, final=True)
    _plots_and_report(out, scenario, rows)
    return out, summary


# ------------------------------------------------------------------------------------------------ command
