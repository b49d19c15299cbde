"""``largeq sweep``: one scenario over several chain lengths, as tasks on a Dask cluster, with finite-size fits.

For each chain length L (and each disorder realization when asked) one task measures:

* exact equilibration (``equilibration.exact_equilibration``: d_eff, diagonal-ensemble values, exact sigma^2,
  fluctuation bound) where the state's symmetric subspace fits a dense diagonalization (``--max-dim``);
  beyond it the KPM estimate of d_eff (``equilibration.estimate_deff``, with its range);
* the relaxation curve on the scenario's time grid (``engines.propagate.evolve``) analysed with
  ``analysis.relaxation.analyse_curve``: late-window equilibrium value and error, temporal variance sigma^2,
  relaxation time;
* thermal values at the state's energy (``equilibration.thermal_values``, canonical and microcanonical);
* cost: wall time, matrix-vector products (all of them, counted on the operator) and the peak resident
  memory of the task (sampled), next to the memory forecast checked before submission.

Each finished task is saved at once (``sizes/L016.json`` + ``sizes/L016.h5``; with realizations
``L016-r003``); a rerun of the same command in the same folder skips tasks already saved for the same scenario
and options.  The table (``table.csv`` and ``results.h5``), the fits of ``largeq.analysis.fits`` (ln d_eff = a + s L,
ln sigma_A = b - kappa L, <A>_inf linear in 1/L), the extrapolation to ``--target`` with 1-sigma bands, the
plots against L and 1/L, ``summary.json`` and ``report.html`` are rewritten from all saved tasks.

Execution: an embedded ``dask.distributed.LocalCluster`` on 127.0.0.1 (processes, one thread per worker,
workers = cores unless ``--workers``), an existing scheduler (``--scheduler tcp://host:8786``), or in-process
(``--serial``).  Every task's memory forecast is compared with every worker's memory limit before anything is
submitted.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import time
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

from largeq import __version__
from largeq.workflows.planning import (MemoryRefusal, PeakRSS, available_bytes, evolution_forecast,
                                       exact_forecast, format_bytes, kpm_forecast)
from largeq.reports import html
from largeq.reports import plots
from largeq.reports.run_record import run_attributes
from largeq.reports.store import (Quantity, atomic_write_text, make_run_folder, write_results,
                                  write_summary)
from largeq.scenario.spec import Scenario, scenario_to_toml
from largeq.constants import MAX_DENSE_DIM, SWEEP_SEED
from largeq.workflows.errors import OptionError, WorkflowError

__all__ = ["SweepOptions", "measure_size", "task_forecast", "run_sweep", "sweep_table", "fit_trends",
           "make_client"]

SIZES_DIR = "sizes"
#: An exact diagonal-ensemble value below this magnitude at every exact size counts as fixed at 0 by symmetry.
SYMMETRY_ZERO = 1e-10


@dataclass(frozen=True)
class SweepOptions:
    """Settings of a sweep (not physics).

    Attributes
    ----------
    target : int or None
        Chain length to extrapolate to (besides L -> infinity for equilibrium values).
    realizations : int
        Disorder realizations per size (scenarios with random fields only).
    max_dim : int
        Largest dense diagonalization; larger subspaces use the KPM estimate.
    n_moments, n_vectors : int
        KPM moments and random vectors of the d_eff estimate.
    thermal : bool
        Compute canonical and microcanonical values.
    thermal_vectors : int
    seed : int
        Seed of the random vectors (one child per size and realization).
    kpm_everywhere : bool
        Also estimate d_eff by KPM where the exact value is available (to compare).
    window_start : float or None
        Start of the late averaging window (time units); None: the scenario's ``time.window_start``, else
        the last half of the run.
    """

    target: int | None = None
    realizations: int = 1
    max_dim: int = MAX_DENSE_DIM
    n_moments: int = 256
    n_vectors: int = 20
    thermal: bool = True
    thermal_vectors: int = 10
    seed: int = SWEEP_SEED
    kpm_everywhere: bool = False
    window_start: float | None = None

    def task_settings(self) -> dict:
        """The settings that change a task's numbers (a saved task is reused only if they match)."""
        d = asdict(self)
        for k in ("target", "realizations"):
            d.pop(k)
        return d


def task_name(L: int, k: int | None) -> str:
    return f"L{L:03d}" if k is None else f"L{L:03d}-r{k:03d}"


# --------------------------------------------------------------------------------------------- one task
def _counting(op):
    """Count every product with the Hamiltonian (all engines go through ``fused_update``)."""
    inner = op.fused_update
    box = {"n": 0}

    def fused_update(x, y, alpha=1.0, beta=0.0, gamma=0.0):
        box["n"] += 1
        return inner(x, y, alpha, beta, gamma)

    op.fused_update = fused_update
    return box


def _block(dim: int, L: int, n_times: int, memory: int) -> int:
    from largeq.workflows.planning import choose_block

    return choose_block(dim, L, n_times, memory, "chebyshev")


def _symmetry_reduction(problem) -> int:
    """Largest possible stabiliser order of the state (translations x reflection x spin flip)."""
    s = problem.symmetries
    g = problem.n_sites if s.get("translation") else 1
    g *= 2 if s.get("reflection") else 1
    g *= 2 if (s.get("spin_flip") and problem.basis.up_spins is not None
               and 2 * problem.basis.up_spins == problem.n_sites) else 1
    return g


def task_forecast(scenario: Scenario, options: SweepOptions, memory: int | None = None) -> dict:
    """Predicted peak memory of one sweep task (bytes) and of its parts, before anything is built.

    Parts: the evolution (Chebyshev, block chosen as the task will), KPM, the dense diagonalization of the
    state's symmetric subspace (its dimension estimated as dim / largest stabiliser, at most ``max_dim``;
    not attempted when even that exceeds ``max_dim``) and the symmetry permutation tables (4 L x dim int64
    at most, only below the size where the exact engine builds them).
    """
    from types import SimpleNamespace

    from largeq.model import build as model
    from largeq.workflows.planning import plan_run

    # by counting: nothing is built, so a task far too large is refused at once, in little memory
    plan = plan_run(scenario, symmetry="off", available=1 << 62, check_times=False)
    dim, L = plan.basis_dimension, plan.n_sites
    problem = SimpleNamespace(symmetries=model.symmetries(scenario), n_sites=L,
                              basis=SimpleNamespace(up_spins=plan.up_spins))
    memory = available_bytes() if memory is None else int(memory)
    block = _block(dim, L, scenario.time.n_points, memory)
    parts = {"evolution": evolution_forecast(dim, L, block=block).total_bytes,
             "kpm": kpm_forecast(dim, L).total_bytes}
    d_sub = math.ceil(dim / _symmetry_reduction(problem))
    exact = d_sub <= options.max_dim
    if exact:
        parts["exact"] = exact_forecast(d_sub).total_bytes + 2 * 8 * dim * 4 * L
    return {"sites": L, "dimension": dim, "block": block, "subspace_dimension_estimate": d_sub,
            "exact_attempted": exact, "parts": parts, "total_bytes": max(parts.values())}


def measure_size(scenario: Scenario, options: SweepOptions, *, realization: int | None = None,
                 memory: int | None = None) -> dict:
    """Everything the sweep records for one chain length (the scenario is already at that length).

    Returns a dict: plain numbers (the table row) plus ``_arrays`` (curves for the per-size HDF5 file).
    """
    from largeq.analysis.curves import analyse_curve
    from largeq.operators.problem import build_problem
    from largeq.engines.propagate import evolve
    from largeq.analysis.equilibration import (DenseLimitError, default_bounds, estimate_deff,
                                               exact_equilibration, thermal_values)
    from largeq.operators.vectors import vdot

    t0 = time.perf_counter()
    with PeakRSS() as peak:
        problem = build_problem(scenario)
        L = problem.n_sites
        op = problem.operator
        count = _counting(op)
        psi, captured = problem.initial_vector()
        psi = psi / np.sqrt(vdot(psi, psi).real)
        rngs = np.random.default_rng([options.seed, L, 0 if realization is None else realization + 1]).spawn(2)
        bounds = default_bounds(op)
        row: dict = {"sites": L, "realization": realization, "seeds": _seed_record(scenario),
                     "basis": problem.basis.label, "basis_dimension": int(problem.basis.dim),
                     "initial_weight_in_basis": float(captured)}
        # exact engine where the state's subspace fits
        ex = None
        if math.ceil(problem.basis.dim / _symmetry_reduction(problem)) <= options.max_dim:
            try:
                ex = exact_equilibration(problem, max_dim=options.max_dim, psi=psi, level_statistics=False)
            except DenseLimitError as exc:
                row["exact_skipped"] = str(exc)
        # relaxation curve
        times = scenario.time.times()
        names = list(problem.observables)
        ops = {n: problem.observable_operator(n) for n in names}
        vals = {n: np.empty(times.size) for n in names}
        surv = np.empty(times.size)
        energy = np.empty(times.size)

        def on_output(i, t, v):
            n2 = vdot(v, v).real
            surv[i] = abs(vdot(psi, v)) ** 2 / n2
            energy[i] = op.expectation(v) / n2
            for n in names:
                vals[n][i] = ops[n].expectation(v).real / n2

        mem = available_bytes() if memory is None else int(memory)
        block = _block(problem.basis.dim, L, times.size, mem)
        t_ev = time.perf_counter()
        mv0 = count["n"]
        evolve(op, psi, times, bounds=bounds, tol=min(scenario.numerics.tolerance, 1e-12), block=block,
                       on_output=on_output)
        evolution_seconds = time.perf_counter() - t_ev
        evolution_matvecs = count["n"] - mv0
        ws = options.window_start if options.window_start is not None else scenario.time.window_start
        analyses = {n: analyse_curve(times, v, window_start=ws,
                                     exact_equilibrium=None if ex is None else ex.observables[n].equilibrium)
                    for n, v in vals.items()}
        e_mean = float(energy[0])
        # d_eff: exact, else KPM
        row["energy_mean"] = e_mean
        if ex is not None:
            row.update(d_eff=ex.d_eff, d_eff_low=ex.d_eff, d_eff_high=ex.d_eff, d_eff_method="exact",
                       subspace_dimension=ex.dim, energy_variance=ex.energy_variance,
                       gap_degeneracy_N0=ex.gap_degeneracy)
        if ex is None or options.kpm_everywhere:
            est = estimate_deff(problem, n_moments=options.n_moments, n_vectors=options.n_vectors, rng=rngs[0],
                                psi=psi, bounds=bounds, survival=(times, surv))
            kp = {"d_eff_kpm": est.d_eff, "d_eff_kpm_low": est.d_eff_low, "d_eff_kpm_high": est.d_eff_high,
                  "d_eff_kpm_reliable": est.reliable, "d_eff_kpm_warnings": list(est.warnings)}
            row.update(kp)
            if ex is None:
                row.update(d_eff=est.d_eff, d_eff_low=est.d_eff_low, d_eff_high=est.d_eff_high, d_eff_method="kpm",
                           subspace_dimension=est.subspace_dim)
        th = None
        if options.thermal:
            th = thermal_values(problem, e_mean, n_vectors=options.thermal_vectors, rng=rngs[1], bounds=bounds)
            row["beta"], row["beta_err"] = th.beta, th.beta_err
        obs = {}
        for n, a in analyses.items():
            o = {"equilibrium": a.equilibrium, "equilibrium_err": a.equilibrium_err,
                 "temporal_variance": a.variance, "sigma": math.sqrt(max(a.variance, 0.0)),
                 "relaxation_time": a.relaxation_time, "settled": bool(a.settled), "status": a.status}
            if ex is not None:
                e = ex.observables[n]
                o.update(equilibrium_exact=e.equilibrium, variance_exact=e.variance,
                         sigma_exact=math.sqrt(max(e.variance, 0.0)), bound=e.bound_range, bound_holds=bool(e.holds))
            if th is not None:
                o.update(canonical=th.canonical[n], canonical_err=th.canonical_err[n],
                         microcanonical=th.microcanonical[n], microcanonical_err=th.microcanonical_err[n])
            obs[n] = o
        row["observables"] = obs
        row["block"] = block
        row["evolution_matvecs"] = int(evolution_matvecs)
        row["evolution_seconds"] = evolution_seconds
        row["matvecs"] = int(count["n"])
    row["wall_seconds"] = time.perf_counter() - t0
    row["peak_rss_bytes"] = int(peak.peak)
    row["rss_at_start_bytes"] = int(peak.start)
    row["_arrays"] = {
        "times": Quantity(times, "1/J", "output times"),
        "survival": Quantity(surv, "1", "|<psi|psi(t)>|^2"),
        "energy": Quantity(energy, "J", "<psi(t)|H|psi(t)>"),
        **{f"curve_{n}": Quantity(v, "1", f"<{n}(t)>") for n, v in vals.items()},
    }
    return row


def _seed_record(scenario: Scenario) -> dict:
    out = {f"field_{f.axis}": f.seed for f in scenario.fields if f.seed is not None}
    if scenario.model is not None and "seed" in dict(scenario.model.params):
        out["model"] = scenario.model.param("seed")
    return out


# --------------------------------------------------------------------------------------------- saving
def _task_paths(folder: Path, name: str) -> tuple[Path, Path]:
    d = folder / SIZES_DIR
    return d / f"{name}.json", d / f"{name}.h5"


def _save_task(folder: Path, name: str, row: dict, scenario_text: str, settings: dict) -> None:
    jpath, hpath = _task_paths(folder, name)
    jpath.parent.mkdir(exist_ok=True)
    arrays = row.pop("_arrays", {})
    write_results(hpath, {"curves": arrays}, attrs={"scenario_toml": scenario_text, "largeq_version": __version__,
                                                    "task": name})
    rec = {"task": name, "scenario_toml": scenario_text, "settings": settings, "row": row}
    atomic_write_text(jpath, json.dumps(rec, indent=1, default=_jsonable) + "\n")


def _jsonable(x):
    if isinstance(x, (np.floating, np.integer)):
        return x.item()
    if isinstance(x, np.bool_):
        return bool(x)
    if isinstance(x, np.ndarray):
        return x.tolist()
    raise TypeError(f"not JSON serializable: {type(x)}")


def _load_task(folder: Path, name: str, scenario_text: str, settings: dict) -> dict | None:
    jpath, hpath = _task_paths(folder, name)
    if not (jpath.exists() and hpath.exists()):
        return None
    try:
        rec = json.loads(jpath.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if rec.get("scenario_toml") != scenario_text or rec.get("settings") != json.loads(json.dumps(settings)):
        return None
    return rec["row"]


# --------------------------------------------------------------------------------------------- dask
#: how long a sweep waits for a Dask scheduler given with --scheduler
SCHEDULER_TIMEOUT = "10s"


def make_client(*, workers: int | None = None, scheduler: str | None = None):
    """A dask.distributed Client: to ``scheduler`` if given, else to a new LocalCluster on 127.0.0.1.

    The LocalCluster uses worker processes with one thread each (``workers`` of them, default: CPU cores) and
    splits the machine's memory evenly between them (each worker's ``memory_limit``).
    Returns (client, cluster or None); close both when done.
    """
    from dask.distributed import Client, LocalCluster

    if scheduler:
        try:
            return Client(scheduler, timeout=SCHEDULER_TIMEOUT), None
        except (OSError, TimeoutError) as exc:
            raise WorkflowError(f"no Dask scheduler answered at {scheduler} within {SCHEDULER_TIMEOUT} "
                                f"({type(exc).__name__}); start one with 'dask scheduler', or drop --scheduler to "
                                f"use a local cluster") from None
    n = int(workers) if workers else (os.cpu_count() or 1)
    cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                           dashboard_address="127.0.0.1:0", memory_limit="auto")
    return Client(cluster), cluster


def worker_memory_limits(client) -> dict[str, int]:
    """{worker address: memory limit in bytes} (0 = no limit set, then the machine's total)."""
    import psutil

    info = client.scheduler_info()["workers"]
    return {addr: int(w.get("memory_limit") or psutil.virtual_memory().total) for addr, w in info.items()}


def check_tasks_fit(forecasts: dict, limits: dict[str, int], fraction: float = 0.9) -> None:
    """Refuse (MemoryRefusal) when a task's forecast exceeds ``fraction`` of the smallest worker limit."""
    if not limits:
        raise MemoryRefusal("the Dask cluster has no workers; start some ('dask worker ADDRESS') and retry")
    smallest = min(limits.values())
    too_big = [(name, f) for name, f in forecasts.items() if f["total_bytes"] > fraction * smallest]
    if too_big:
        lines = [f"{name}: about {format_bytes(f['total_bytes'])} (dimension {f['dimension']:,}; "
                 + ", ".join(f"{k} {format_bytes(v)}" for k, v in f["parts"].items()) + ")" for name, f in too_big]
        raise MemoryRefusal(
            f"refusing to submit: {len(too_big)} task(s) exceed {fraction:.0%} of the smallest worker memory limit "
            f"({format_bytes(smallest)} over {len(limits)} worker(s)): " + "; ".join(lines)
            + ". Use fewer workers per machine (more memory each), workers with a larger --memory-limit, "
              "a smaller --max-dim, or drop those sizes.")


# --------------------------------------------------------------------------------------------- the sweep
def _task_list(scenario: Scenario, sizes, options: SweepOptions) -> list[tuple[str, Scenario, int | None]]:
    from largeq.workflows.disorder import base_seed, is_disordered, realization_seeds, with_seed

    tasks = []
    if options.realizations > 1 and not is_disordered(scenario):
        from largeq.scenario.spec import ScenarioError

        raise ScenarioError("realizations", options.realizations, "1 for a scenario without random fields",
                            scenario.source)
    seeds = realization_seeds(base_seed(scenario), options.realizations) if options.realizations > 1 else None
    for L in sizes:
        sc = scenario.with_length(int(L))
        if seeds is None:
            tasks.append((task_name(int(L), None), sc, None))
        else:
            for k, s in enumerate(seeds):
                tasks.append((task_name(int(L), k), with_seed(sc, s), k))
    return tasks


def run_sweep(scenario: Scenario, sizes, folder=None, options: SweepOptions = SweepOptions(), *,
              mode: str = "local", workers: int | None = None, scheduler: str | None = None, client=None,
              echo=print) -> tuple[Path, dict]:
    """Run (or complete) a sweep into a run folder; returns (folder, summary).

    mode: 'local' (embedded LocalCluster), 'scheduler' (connect to ``scheduler``), 'serial' (in-process),
    or pass an existing dask ``client``.
    """
    sizes = sorted({int(L) for L in sizes})
    if len(sizes) < 1:
        raise OptionError("sizes: give at least one chain length")
    if options.target is not None and len(sizes) < 3:
        raise OptionError(f"target: --target {options.target} extrapolates fits over the sizes, which need at least 3 "
                          f"distinct sizes; got {len(sizes)} ({', '.join(map(str, sizes))})")
    tasks = _task_list(scenario, sizes, options)
    if client is None and mode in ("serial", "local") and (folder is None or not Path(folder).exists()):
        # a new run on this machine: a task beyond its free memory fits no local worker, so refuse before
        # anything is written (the per-worker check below comes once the workers are known)
        mem = available_bytes()
        check_tasks_fit({name: task_forecast(sc, options, mem) for name, sc, _ in tasks}, {"this machine": mem})
    out = make_run_folder(folder, "sweep")
    atomic_write_text(out / "scenario.toml", scenario_to_toml(scenario))
    settings = options.task_settings()
    rows: dict[str, dict] = {}
    todo = []
    for name, sc, k in tasks:
        text = scenario_to_toml(sc)
        done = _load_task(out, name, text, settings)
        if done is not None:
            rows[name] = done
            echo(f"  {name}: already done, kept")
        else:
            todo.append((name, sc, k, text))

    def finished(name, text, row):
        _save_task(out, name, row, text, settings)
        rows[name] = row
        echo(f"  {name}: d_eff {row['d_eff']:.4g} ({row['d_eff_method']}), {row['matvecs']} products, "
             f"{row['wall_seconds']:.1f} s, peak {format_bytes(row['peak_rss_bytes'])}")
        _write_outputs(out, scenario, sizes, tasks, rows, options, complete=False)

    if todo:
        own = None
        if mode == "serial" and client is None:
            mem = available_bytes()
            forecasts = {name: task_forecast(sc, options, mem) for name, sc, _, _ in todo}
            check_tasks_fit(forecasts, {"this process": mem})
            for name, sc, k, text in todo:
                finished(name, text, measure_size(sc, options, realization=k, memory=mem))
        else:
            from dask.distributed import as_completed

            if client is None:
                client, own = make_client(workers=workers, scheduler=scheduler if mode == "scheduler" else None)
            try:
                limits = worker_memory_limits(client)
                smallest = min(limits.values()) if limits else 0
                forecasts = {name: task_forecast(sc, options, smallest) for name, sc, _, _ in todo}
                check_tasks_fit(forecasts, limits)
                echo(f"  {len(todo)} task(s) on {len(limits)} worker(s), memory limit {format_bytes(smallest)} each")
                futs = {}
                for name, sc, k, text in sorted(todo, key=lambda t: -t[1].n_sites):  # largest first
                    f = client.submit(measure_size, sc, options, realization=k, memory=smallest,
                                      key=f"largeq-sweep-{name}-{os.getpid()}-{time.time_ns()}", pure=False)
                    futs[f] = (name, text)
                for f in as_completed(list(futs)):
                    name, text = futs[f]
                    finished(name, text, f.result())
            finally:
                if own is not None:
                    client.close()
                    own.close()
    summary = _write_outputs(out, scenario, sizes, tasks, rows, options, complete=True)
    return out, summary


# --------------------------------------------------------------------------------------------- table and fits
def _num(x):
    return float("nan") if x is None else float(x)


def sweep_table(sizes, tasks, rows: dict, observables) -> list[dict]:
    """One row per size (realizations averaged: mean and standard error), flat keys for CSV."""
    from largeq.workflows.disorder import aggregate

    table = []
    for L in sizes:
        group = [rows[name] for name, sc, k in tasks if sc.n_sites == L and name in rows]
        if not group:
            continue
        n = len(group)
        r = {"sites": L, "realizations": n, "basis_dimension": group[0]["basis_dimension"],
             "subspace_dimension": group[0].get("subspace_dimension"), "d_eff_method": group[0]["d_eff_method"]}

        def put(key, values):
            a = aggregate(values)
            r[key] = a["mean"]
            if n > 1:
                r[f"{key}_stderr"] = a["stderr"]
                r[f"{key}_spread"] = a["spread"]

        put("d_eff", [g["d_eff"] for g in group])
        if n == 1:
            r["d_eff_low"], r["d_eff_high"] = group[0]["d_eff_low"], group[0]["d_eff_high"]
            if "d_eff_kpm" in group[0]:
                r["d_eff_kpm"] = group[0]["d_eff_kpm"]
        put("energy_mean", [g["energy_mean"] for g in group])
        for name in observables:
            for key in ("equilibrium", "equilibrium_err", "temporal_variance", "sigma", "relaxation_time",
                        "equilibrium_exact", "variance_exact", "sigma_exact", "bound", "canonical", "canonical_err",
                        "microcanonical", "microcanonical_err"):
                vals = [g["observables"][name].get(key) for g in group]
                if all(v is None for v in vals):
                    continue
                put(f"{name}.{key}", vals)
        for key in ("wall_seconds", "matvecs", "evolution_matvecs", "evolution_seconds", "peak_rss_bytes"):
            r[key] = float(np.mean([g[key] for g in group]))
        table.append(r)
    return table


def _errors(table, key):
    errs = [t.get(f"{key}_stderr") for t in table]
    if all(e is not None and np.isfinite(e) and e > 0 for e in errs):
        return np.asarray(errs, dtype=float), True
    return None, False


def fit_trends(table: list[dict], observables, target: int | None) -> dict:
    """Fits of d_eff, sigma_A and <A>_inf over L and extrapolations (see the module docstring).

    Every point with an error bar is weighted by it (weighted least squares), and the parameter errors are
    those of the points, inflated by the scatter about the line when chi^2 / dof > 1 (never shrunk below what
    the points' errors give); points without errors (one realization of d_eff or sigma) take their parameter
    errors from the scatter (chi^2 / dof).  Fits need at least 3 sizes.  The d_eff fit uses only exact values
    when at least 3 sizes have them.  An equilibrium value whose exact diagonal ensemble is 0 at every exact
    size (to 1e-10: fixed by a symmetry of the state and H) is reported as 0 by symmetry, not extrapolated.
    """
    from largeq.analysis.fits import extrapolate, fit_inverse_size, fit_log_deff, fit_log_sigma

    out = {"trends": {}, "extrapolations": {}, "notes": [], "fixed_by_symmetry": {}}
    if len(table) < 3:
        out["notes"].append("fewer than 3 sizes: no fits")
        return out

    def record(key, trend):
        out["trends"][key] = trend.as_dict() | {"sizes": [float(x) for x in
                                                          (1 / trend.fit.x if trend.kind == "inverse-size" else trend.fit.x)]}
        ex = {}
        if target is not None:
            ex[str(target)] = extrapolate(trend, target).as_dict()
        if trend.kind == "inverse-size":
            ex["infinity"] = extrapolate(trend, np.inf).as_dict()
        out["extrapolations"][key] = ex
        out.setdefault("_objects", {})[key] = trend

    rows = [t for t in table if t["d_eff_method"] == "exact"]
    if len(rows) < 3:
        rows = table
    else:
        if len(rows) < len(table):
            out["notes"].append("d_eff fit uses the exact sizes only (KPM estimates shown separately)")
    L = np.array([t["sites"] for t in rows], float)
    err, absolute = _errors(rows, "d_eff")
    try:
        record("d_eff", fit_log_deff(L, [t["d_eff"] for t in rows], err, absolute="inflate" if err is not None else None))
    except ValueError as exc:
        out["notes"].append(f"d_eff: {exc}")
    Lall = np.array([t["sites"] for t in table], float)
    for name in observables:
        try:
            err, absolute = _errors(table, f"{name}.sigma")
            record(f"{name}.sigma", fit_log_sigma(Lall, [t[f"{name}.sigma"] for t in table], err,
                                                  quantity=f"sigma_A ({name})",
                                                  absolute="inflate" if err is not None else None))
        except (ValueError, KeyError) as exc:
            out["notes"].append(f"{name} sigma: {exc}")
        exact = [t.get(f"{name}.equilibrium_exact") for t in table]
        exact = [x for x in exact if x is not None and np.isfinite(x)]
        if exact and max(abs(x) for x in exact) <= SYMMETRY_ZERO:
            out["fixed_by_symmetry"][name] = {"value": 0.0, "sizes_checked": len(exact),
                                              "largest_exact_magnitude": max(abs(x) for x in exact)}
            out["notes"].append(f"<{name}>_inf = 0 by symmetry (the exact diagonal ensemble is 0 to "
                                f"{SYMMETRY_ZERO:g} at all {len(exact)} exact sizes): shown as 0, not extrapolated")
            continue
        try:
            err, absolute = _errors(table, f"{name}.equilibrium")
            if err is None:
                e = np.array([t[f"{name}.equilibrium_err"] for t in table], float)
                err, absolute = (e, True) if np.all(np.isfinite(e) & (e > 0)) else (None, None)
            record(f"{name}.equilibrium", fit_inverse_size(Lall, [t[f"{name}.equilibrium"] for t in table], err,
                                                           quantity=f"<{name}>_inf",
                                                           absolute="inflate" if err is not None else None))
        except (ValueError, KeyError) as exc:
            out["notes"].append(f"{name} equilibrium: {exc}")
    return out


CSV_FIRST = ("sites", "realizations", "basis_dimension", "subspace_dimension", "d_eff", "d_eff_method")


def _csv_text(table) -> str:
    keys = list(CSV_FIRST)
    for r in table:
        keys += [k for k in r if k not in keys]
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=keys, restval="", lineterminator="\n")
    w.writeheader()
    for r in table:
        w.writerow({k: ("" if v is None else v) for k, v in r.items()})
    return buf.getvalue()


def format_table(table, observables) -> str:
    """Plain-text table printed by the command."""
    head = f"{'L':>3s} {'dim':>10s} {'d_eff':>12s} {'method':>6s}"
    for n in observables:
        head += f" {('<' + n + '>_inf')[:16]:>16s} {('sigma ' + n)[:12]:>12s}"
    head += f" {'products':>9s} {'wall s':>8s} {'peak':>10s}"
    lines = [head, "-" * len(head)]
    for r in table:
        s = f"{r['sites']:>3d} {r['basis_dimension']:>10,d} {r['d_eff']:>12.5g} {r['d_eff_method']:>6s}"
        for n in observables:
            s += f" {r.get(n + '.equilibrium', float('nan')):>+16.5f} {r.get(n + '.sigma', float('nan')):>12.4g}"
        s += f" {int(r['matvecs']):>9d} {r['wall_seconds']:>8.1f} {format_bytes(r['peak_rss_bytes']):>10s}"
        lines.append(s)
    return "\n".join(lines)


def _write_outputs(out: Path, scenario: Scenario, sizes, tasks, rows, options: SweepOptions, complete: bool) -> dict:
    names = [o.name for o in scenario.observables]
    table = sweep_table(sizes, tasks, rows, names)
    fits = fit_trends(table, names, options.target)
    objs = fits.pop("_objects", {})
    atomic_write_text(out / "table.csv", _csv_text(table))
    summary = {
        "title": scenario.title, "command": "sweep", "complete": complete, "sizes": sizes,
        "done": sorted(rows), "options": asdict(options), "table": table, "fits": fits,
        "fit_rule": fit_trends.__doc__.split("\n\n")[1].strip().replace("\n", " "),
    }
    write_summary(out / "summary.json", summary)
    tree = {"table": {k: np.array([_num(r.get(k)) if k != "d_eff_method" else 0 for r in table])
                      for k in (table[0] if table else {}) if k != "d_eff_method"}}
    if table:
        tree["table"]["d_eff_method"] = [r["d_eff_method"] for r in table]
    attrs = run_attributes("sweep", scenario_to_toml(scenario), scenario.title, options=asdict(options), fits=fits,
                           complete=complete)
    write_results(out / "results.h5", tree, attrs=attrs)
    if complete and table:
        _plots_and_report(out, scenario, table, fits, objs, names, options)
    return summary


def _plots_and_report(out, scenario, table, fits, objs, names, options) -> None:
    L = np.array([r["sites"] for r in table], float)
    Lmax = max(L.max(), options.target or 0)
    Lf = np.linspace(L.min(), Lmax, 50)

    def err(key):
        return np.array([r.get(f"{key}_stderr", np.nan) for r in table])

    series = {"d_eff": (np.array([r["d_eff"] for r in table]), err("d_eff"))}
    if any("d_eff_kpm" in r for r in table):
        series["d_eff (KPM)"] = (np.array([r.get("d_eff_kpm", np.nan) for r in table]), None)
    fit, bands = {}, {}
    if "d_eff" in objs:
        v, lo, hi = objs["d_eff"].at(Lf)
        fit = {"fit ln d_eff = a + sL": (Lf, v)}
        bands = {"fit ln d_eff = a + sL": (Lf, lo, hi)}
    plots.plot_versus_size(out / "deff_vs_L.png", L, series, logy=True, fit=fit, bands=bands,
                           ylabel="effective dimension d_eff", title=scenario.title)
    series, fit, bands = {}, {}, {}
    for n in names:
        series[f"σ_A {n}"] = (np.array([r.get(f"{n}.sigma", np.nan) for r in table]), err(f"{n}.sigma"))
        if f"{n}.sigma" in objs:
            v, lo, hi = objs[f"{n}.sigma"].at(Lf)
            fit[f"fit σ_A {n}"] = (Lf, v)
            bands[f"fit σ_A {n}"] = (Lf, lo, hi)
    plots.plot_versus_size(out / "sigma_vs_L.png", L, series, logy=True, fit=fit, bands=bands,
                           ylabel="temporal fluctuation σ_A (late window)", title=scenario.title)
    series, fit, bands = {}, {}, {}
    x = 1.0 / L
    xf = np.linspace(0.0, x.max(), 50)
    for n in names:
        series[f"⟨{n}⟩∞"] = (np.array([r.get(f"{n}.equilibrium", np.nan) for r in table]),
                             np.array([r.get(f"{n}.equilibrium_err", np.nan) for r in table]))
        if f"{n}.equilibrium" in objs:
            v, e = objs[f"{n}.equilibrium"].fit.predict(xf)
            fit[f"fit ⟨{n}⟩∞"] = (xf, v)
            bands[f"fit ⟨{n}⟩∞"] = (xf, v - e, v + e)
    plots.plot_versus_size(out / "equilibrium_vs_invL.png", x, series, fit=fit, bands=bands, xlabel="1 / L",
                           ylabel="late-window mean", title=scenario.title)
    plots.plot_panels_versus_size(out / "cost_vs_L.png", L, [
        {"series": {"wall time": (np.array([r["wall_seconds"] for r in table]), None)}, "logy": True,
         "ylabel": "wall time (s)"},
        {"series": {"matrix-vector products": (np.array([r["matvecs"] for r in table], float), None)},
         "ylabel": "products"},
        {"series": {"peak memory": (np.array([r["peak_rss_bytes"] for r in table]) / 2**20, None)}, "logy": True,
         "ylabel": "peak memory (MiB)"},
    ], title=f"{scenario.title}: cost per task")
    rows = []
    for key, t in fits["trends"].items():
        rows.append((f"{key}: {t['form']}", t["rate"], t["rate_err"]))
        for where, e in fits["extrapolations"].get(key, {}).items():
            rows.append((f"  at L = {where}", html.format_number(e["value"]),
                         f"1σ band [{html.format_number(e['low'])}, {html.format_number(e['high'])}]"))
    for key, fz in fits.get("fixed_by_symmetry", {}).items():
        rows.append((f"<{key}>_inf", "0 (by symmetry)",
                     f"exact diagonal ensemble |value| <= {fz['largest_exact_magnitude']:.1e} at {fz['sizes_checked']} sizes"))
    table_rows = [(f"L = {r['sites']}", html.format_number(r["d_eff"]),
                   f"{r['d_eff_method']}; dim {r['basis_dimension']:,}; {int(r['matvecs'])} products; "
                   f"{r['wall_seconds']:.1f} s; peak {format_bytes(r['peak_rss_bytes'])}") for r in table]
    html.write_report(out / "report.html", title=scenario.title,
                      subtitle=f"largeq {__version__}: sweep over L = {', '.join(str(int(v)) for v in L)}",
                      sections=[
                          html.Section("Effective dimension", images=["deff_vs_L.png"], table=table_rows),
                          html.Section("Fits and extrapolations", images=["sigma_vs_L.png", "equilibrium_vs_invL.png"],
                                       table=rows, paragraphs=list(fits["notes"]) + [fit_trends.__doc__.split("\n\n")[1]]),
                          html.Section("Cost", images=["cost_vs_L.png"]),
                      ])
