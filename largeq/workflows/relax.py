"""The main job: relaxation curves of a scenario, analysed and saved as a run folder.

``run_relaxation`` builds the problem, refuses up front when the forecast memory does not
fit, evolves the initial state over the time grid (Chebyshev or Lanczos), records every
observable, the survival probability, the norm and the energy at each output time, writes
atomic checkpoints, and finally analyses each curve and writes ``results.h5``,
``summary.json``, the plots and ``report.html``.  ``resume_relaxation`` continues a killed
run from its last checkpoint and gives the same numbers as an uninterrupted run.
"""

from __future__ import annotations

import hashlib
import time
from dataclasses import dataclass
from pathlib import Path
from types import SimpleNamespace

import numpy as np

from largeq import __version__
from largeq.analysis.curves import analyse_curve
from largeq.operators.problem import Problem, build_problem, spin_conventions
from largeq.engines.bounds import SpectralBounds, spectral_bounds
from largeq.engines.propagate import evolve
from largeq.workflows.equilibration_step import equilibration_report
from largeq.workflows.planning import available_bytes, check_fits, evolution_forecast, format_bytes
from largeq.reports.progress import progress_bar
from largeq.reports import html
from largeq.reports import plots
from largeq.reports.checkpoint import CHECKPOINT_NAME, Checkpointer, load_checkpoint
from largeq.reports.store import (Quantity, atomic_write_text, make_run_folder, package_versions,
                                  run_metadata, write_results, write_summary)
from largeq.scenario.spec import Scenario, load_scenario, scenario_to_toml
from largeq.operators.vectors import vdot

__all__ = ["RelaxOptions", "RelaxRun", "run_relaxation", "resume_relaxation", "choose_block", "sector_choice",
           "sector_plan"]

SCENARIO_FILE = "scenario.toml"
BOUNDS_SEED = 20260101  # fixed seed of the Lanczos start vector: bounds are reproducible


@dataclass(frozen=True)
class RelaxOptions:
    """Settings of one relaxation run that are not part of the physics scenario.

    Attributes
    ----------
    checkpoint_seconds : float or None
        Interval between checkpoints; None takes the scenario's ``numerics.checkpoint_seconds``.
    progress : bool or None
        Progress bar on/off; None: on when stderr is a terminal.
    block : int or None
        Output times sharing one Chebyshev expansion; None chooses from the memory available.
    memory_available : int or None
        Override of the available memory in bytes (for forecasts on another machine and tests).
    equilibration : str
        d_eff, bounds and thermal values: "auto" (exact where diagonalization fits, estimates at
        moderate sizes, skipped beyond), "exact", "estimate" or "off".
    seed : int
        Seed of the random vectors used by the estimators (recorded in the results).
    symmetry : str
        "auto": evolve in momentum (and reflection / spin-flip) sectors when H is translation
        invariant and the state's sectors are smaller than the basis (``sector_choice``), any product
        start and any observable; "off": always the magnetization sector (or full space).
    """

    checkpoint_seconds: float | None = None
    progress: bool | None = None
    block: int | None = None
    memory_available: int | None = None
    equilibration: str = "auto"
    seed: int = 20261201
    symmetry: str = "auto"


@dataclass(frozen=True)
class RelaxRun:
    folder: Path
    summary: dict


def fingerprint(scenario_text: str) -> str:
    return hashlib.sha256(scenario_text.encode()).hexdigest()[:24]


def choose_block(dimension: int, n_sites: int, n_times: int, available: int, method: str) -> int:
    """Output times per Chebyshev expansion: up to 8, while the run uses at most half the memory.

    Sharing an expansion saves the O(log 1/tol) start-up of each step but holds one
    accumulator vector per output time (common practice: a handful of outputs per block).
    """
    if method != "chebyshev":
        return 1
    block = 1
    for k in (8, 4, 2):
        if k < n_times and evolution_forecast(dimension, n_sites, block=k).total_bytes <= 0.5 * available:
            block = k
            break
    return block


class _Recorder:
    """Observables, survival probability, norm and energy at every output time."""

    def __init__(self, problem: Problem, psi_start: np.ndarray, n_times: int):
        self.problem = problem
        self.psi_start = psi_start
        self.names = list(problem.observables)
        self.ops = {n: problem.observable_operator(n) for n in self.names}
        self.values = {n: np.full(n_times, np.nan) for n in self.names}
        self.survival = np.full(n_times, np.nan)
        self.norm = np.full(n_times, np.nan)
        self.energy = np.full(n_times, np.nan)

    def record(self, i: int, psi: np.ndarray) -> None:
        nrm2 = vdot(psi, psi).real
        self.norm[i] = np.sqrt(nrm2)
        self.survival[i] = abs(vdot(self.psi_start, psi)) ** 2
        self.energy[i] = self.problem.operator.expectation(psi) / nrm2
        for n in self.names:
            self.values[n][i] = self.ops[n].expectation(psi) / nrm2

    def arrays(self) -> dict[str, np.ndarray]:
        out = {f"obs:{n}": v for n, v in self.values.items()}
        out.update(survival=self.survival, norm=self.norm, energy=self.energy)
        return out

    def restore(self, state: dict) -> None:
        for n in self.names:
            self.values[n][:] = state[f"obs:{n}"]
        self.survival[:] = state["survival"]
        self.norm[:] = state["norm"]
        self.energy[:] = state["energy"]


def _prepare(scenario: Scenario, options: RelaxOptions):
    problem = build_problem(scenario)
    basis = problem.basis
    method = scenario.numerics.method
    times = scenario.time.times()
    avail = available_bytes() if options.memory_available is None else int(options.memory_available)
    plan = sector_plan(problem, options, avail, len(times))
    if plan is not None:
        return problem, times, plan["block"], plan["forecast"], plan
    block = options.block or choose_block(basis.dim, basis.n_sites, len(times), avail, method)
    forecast = evolution_forecast(basis.dim, basis.n_sites, method=method, block=block)
    check_fits(forecast, n_sites=basis.n_sites, up_spins=basis.up_spins, available=avail)
    return problem, times, block, forecast, None


def sector_choice(problem: Problem, options: RelaxOptions = RelaxOptions()) -> dict:
    """Whether ``relax`` evolves in momentum (+ reflection, spin-flip) sectors, and in which ones,
    decided without enumerating any sector (describe and forecast call this to predict the run).

    The sectors apply when the method is Chebyshev and H is translation invariant; any product
    start (z-basis or tilted) and any Hermitian Pauli-sum observable are handled (observables across
    sectors by ``largeq.operators.sector_operator.sector_observables``).  With a conserved
    magnetization the sectors are resolved in n_up as well; otherwise they are sectors of the full
    2^L space.  The touched sectors and their weights come from
    ``largeq.operators.sector_operator.product_sector_weights`` (O(|G| L^2)), their dimensions from
    character sums over fixed points (``sector_dimensions``); the sectors are used when their total
    dimension is at most half the basis ``relax`` would otherwise use (a state spread over every
    momentum gains nothing and would pay for the cross-sector pairs).

    Returns a dict: ``use`` (bool), ``reason`` (words), and when translation applies ``group``
    (flags), ``conserve_magnetization``, ``sectors`` [{key: (n_up or None, m, r, f), weight,
    dimension}], ``total_dimension``, ``note``.
    """
    from largeq.operators.sector_operator import choose_sectors

    sym = problem.symmetries
    if options.symmetry == "off":
        return {"use": False, "reason": "symmetry sectors switched off (symmetry = off)"}
    if problem.scenario.numerics.method != "chebyshev":
        return {"use": False, "reason": "symmetry sectors are used with the Chebyshev method only"}
    if not sym["translation"]:
        return {"use": False, "reason": "H is not translation invariant (open chain or site-dependent terms)"}
    if problem.basis.up_spins is not None and problem.start.up_spins is None:
        return {"use": False, "reason": (f"the run evolves the projection of the initial state on n_up = "
                                         f"{problem.basis.up_spins} (sector.up_spins), not the state itself")}
    conserve = bool(sym["conserves_magnetization"])
    choice = choose_sectors(problem.start.spinors, conserve_magnetization=conserve, reflection=sym["reflection"],
                            spin_flip=sym["spin_flip"])
    total = int(sum(s["dimension"] for s in choice["sectors"]))
    plain = int(problem.basis.dim)
    choice.update(total_dimension=total, plain_dimension=plain, conserve_magnetization=conserve)
    if total > plain // 2:
        choice.update(use=False, reason=(f"the initial state spreads over {len(choice['sectors'])} symmetry sectors "
                                         f"of total dimension {total:,}, not less than half of {plain:,}: "
                                         f"evolving in {problem.basis.label} instead"))
        return choice
    dims = [s["dimension"] for s in choice["sectors"]]
    shown = " + ".join(f"{d:,}" for d in dims[:12]) + (f" + ... ({len(dims)} sectors)" if len(dims) > 12 else "")
    choice.update(use=True, reason=(f"H is translation invariant: the initial state splits into {len(dims)} symmetry "
                                    f"sector(s) of dimensions {shown} = {total:,} (instead of {plain:,}); "
                                    f"{choice['note']}"))
    return choice


def sector_plan(problem: Problem, options: RelaxOptions, available: int, n_times: int) -> dict | None:
    """Momentum (+ reflection, spin-flip) sectors for this run, or None when they do not apply
    (:func:`sector_choice` decides; this enumerates the sectors and splits the state).

    The sector matrices are stored (CSR) when that fits in a third of the memory; otherwise the
    products stay matrix-free.
    """
    from largeq.operators.sector_operator import split_basis_state, split_product_state

    choice = sector_choice(problem, options)
    if not choice["use"]:
        return None
    start = problem.start
    g = choice["group"]
    L = problem.n_sites
    if start.bits is not None and choice["conserve_magnetization"]:
        comps, note = split_basis_state(start.bits, L, reflection=g["reflection"], spin_flip=g["spin_flip"])
    else:
        comps, note = split_product_state(start.spinors, conserve_magnetization=choice["conserve_magnetization"],
                                          reflection=g["reflection"], spin_flip=g["spin_flip"])
    n_up = start.up_spins
    dims = [c.sector.dim for c in comps]
    block = options.block or 8
    n_groups = len(problem.hamiltonian.groups())
    real = all(c.sector.real for c in comps)
    vec = 16 * sum(dims)
    # stored sector matrix: about one entry per state for every other off-diagonal group (flip-flop
    # terms vanish on parallel spins) plus the diagonal; 12 bytes per real entry, 20 per complex one
    stored_bytes = sum(d * (n_groups / 2 + 1) * (12 if real else 20) + 8 * d for d in dims)
    # assembling one sector's matrix: COO arrays sized for every group, then the CSR copy (measured ~1.35x)
    largest = max(dims)
    build_bytes = 1.35 * largest * (n_groups + 1) * (24 if real else 32)
    vectors_bytes = (4 + 2 * block) * vec
    # sectors are assembled one after the other, before the evolution allocates its vectors
    stored_peak = max(stored_bytes * (1 - largest / sum(dims)) + build_bytes, stored_bytes + vectors_bytes)
    store = stored_peak <= 0.8 * available
    # observables across sectors stored as CSR blocks (one per sector pair, rows of the first sector): about
    # L/2 + 1 entries per row for an off-diagonal local term summed over its translates, one for diagonal ones
    n_sec = len(dims)
    rows = (n_sec + 1) / 2 * sum(dims)
    obs_bytes = sum(rows * ((L / 2 + 1) if not o.pauli.is_diagonal() else 1) * (12 if real else 20)
                    for o in problem.observables.values())
    store_obs = store and stored_peak + obs_bytes <= 0.8 * available
    if store_obs:
        stored_peak += obs_bytes
        stored_bytes += obs_bytes
    total = int((stored_peak if store else vectors_bytes) + 400 * 2**20)
    forecast = evolution_forecast(max(dims), L, method="chebyshev", block=block)
    forecast = type(forecast)("chebyshev (sectors)", int(sum(dims)), (4 + 2 * block) * len(dims), max(dims) * 16,
                              int(stored_bytes) if store else 0, total,
                              f"{len(dims)} sector(s) {dims}; stored sector matrices: {'yes' if store else 'no'}; "
                              f"stored observable blocks: {'yes' if store_obs else 'no'}")
    check_fits(forecast, n_sites=L, up_spins=n_up, available=available)
    shown = " + ".join(f"{d:,}" for d in dims[:12]) + (f" + ... ({len(dims)} sectors)" if len(dims) > 12 else "")
    reason = (f"H is translation invariant: the initial state splits into {len(comps)} symmetry sector(s) of "
              f"dimensions {shown} = {sum(dims):,} (instead of {problem.basis.dim:,}); {note}")
    return {"components": comps, "note": note, "block": block, "store": store, "forecast": forecast,
            "reason": reason, "choice": choice, "store_observables": store_obs}


def run_relaxation(scenario: Scenario, folder=None, options: RelaxOptions = RelaxOptions()) -> RelaxRun:
    """Run the relaxation job of ``scenario`` into a run folder (new, or ``folder``).

    Raises MemoryRefusal before allocating anything large when the run does not fit.
    A folder that already holds an unfinished run of the same scenario is refused: use
    :func:`resume_relaxation`.
    """
    text = scenario_to_toml(scenario)
    if folder is not None and (Path(folder) / CHECKPOINT_NAME).exists():
        raise FileExistsError(f"{folder} holds an unfinished run; continue it with 'largeq relax --resume {folder}'")
    problem, times, block, forecast, plan = _prepare(scenario, options)  # refuse before creating the folder
    out = make_run_folder(folder, "relax")
    atomic_write_text(out / SCENARIO_FILE, text)
    if plan is not None:
        return _execute_sectors(problem, text, out, times, plan, options, resume=False)
    return _execute(problem, text, out, times, block, forecast, options, resume=False)


def resume_relaxation(folder, options: RelaxOptions = RelaxOptions()) -> RelaxRun:
    """Continue the run in ``folder`` from its last checkpoint (or from t = 0 if none was written)."""
    folder = Path(folder)
    if not (folder / SCENARIO_FILE).exists():
        raise FileNotFoundError(f"{folder} is not a relaxation run folder (no {SCENARIO_FILE})")
    scenario = load_scenario(folder / SCENARIO_FILE)
    text = scenario_to_toml(scenario)
    problem, times, block, forecast, plan = _prepare(scenario, options)
    if plan is not None:
        return _execute_sectors(problem, text, folder, times, plan, options, resume=True)
    return _execute(problem, text, folder, times, block, forecast, options, resume=True)


def _execute(problem: Problem, text: str, folder: Path, times, block, forecast, options, *, resume: bool) -> RelaxRun:
    scenario = problem.scenario
    fp = fingerprint(text)
    interval = scenario.numerics.checkpoint_seconds if options.checkpoint_seconds is None else options.checkpoint_seconds
    ck = Checkpointer(folder, interval, fingerprint=fp)
    op = problem.operator
    psi_start, captured = problem.initial_vector()
    rec = _Recorder(problem, psi_start, len(times))
    start_index, elapsed_before, matvecs_before = 0, 0.0, 0
    psi = psi_start
    loaded = load_checkpoint(folder, expect_fingerprint=fp) if resume else None
    if loaded is not None:
        state, meta = loaded
        if int(state["block"]) != block:
            block = int(state["block"])  # resume with the block the run started with
        bounds = SpectralBounds(**{k: (int(v) if k == "steps" else float(v)) for k, v in meta["bounds"].items()})
        start_index = int(state["index"])
        psi = np.ascontiguousarray(state["psi"])
        rec.restore(state)
        elapsed_before = float(state["elapsed"])
        matvecs_before = int(state["matvecs"])
    else:
        t0 = time.perf_counter()
        bounds = spectral_bounds(op, rng=np.random.default_rng(BOUNDS_SEED))
        elapsed_before = time.perf_counter() - t0
        matvecs_before = bounds.steps
    last = len(times) - 1
    wall0 = time.perf_counter()
    bar = progress_bar(last, f"relax L={problem.n_sites}", enabled=options.progress)
    bar.update(start_index)
    stats_holder = {}

    def state_at(i, psi_now):
        st = {"psi": psi_now, "index": i, "block": block, "elapsed": elapsed_before + time.perf_counter() - wall0,
              "matvecs": matvecs_before}
        st.update(rec.arrays())
        return st, {"bounds": {k: getattr(bounds, k) for k in ("e_min", "e_max", "ritz_min", "ritz_max",
                                                                "residual_min", "residual_max", "steps")},
                    "time": float(times[i])}

    def on_output(i, t, psi_now):
        rec.record(i, psi_now)
        if i > start_index and (i % block == 0 or i == last) and i < last:
            ck.maybe_save(lambda: state_at(i, psi_now))

    def on_progress(i_done, n_total):
        bar.update(i_done - bar.n)

    if start_index == 0 and loaded is None:
        on_output(0, times[0], psi)
    if start_index < last:
        stats = evolve(op, psi, times, method=scenario.numerics.method, bounds=bounds,
                       tol=scenario.numerics.tolerance, block=block, on_output=on_output,
                       start_index=start_index, progress=on_progress, emit_start=False)
        stats_holder["stats"] = stats
    bar.close()
    wall = elapsed_before + time.perf_counter() - wall0
    stats = stats_holder.get("stats")
    matvecs = matvecs_before + (stats.matvecs if stats else 0)
    summary = _finish(problem, text, folder, times, rec, bounds, block, forecast, stats, matvecs, wall, captured,
                      options)
    ckfile = folder / CHECKPOINT_NAME
    if ckfile.exists():
        ckfile.unlink()  # the run is complete and saved; the checkpoint's state vector is no longer needed
    return RelaxRun(folder, summary)


class _SectorRecorder(_Recorder):
    """The same records from sector components: psi = sum_s psi_s (cross-sector terms included)."""

    def __init__(self, problem: Problem, ops, cross, psi_start: list, n_times: int):
        self.problem, self.ops_h, self.cross, self.psi_start = problem, ops, cross, psi_start
        self.names = list(problem.observables)
        self.values = {n: np.full(n_times, np.nan) for n in self.names}
        self.survival = np.full(n_times, np.nan)
        self.norm = np.full(n_times, np.nan)
        self.energy = np.full(n_times, np.nan)

    def record(self, i: int, vecs: list) -> None:
        nrm2 = sum(vdot(v, v).real for v in vecs)
        self.norm[i] = np.sqrt(nrm2)
        self.survival[i] = abs(sum(vdot(p, v) for p, v in zip(self.psi_start, vecs))) ** 2
        self.energy[i] = sum(op.expectation(v).real for op, v in zip(self.ops_h, vecs)) / nrm2
        for n, val in self.cross(vecs).items():
            self.values[n][i] = val / nrm2


def _execute_sectors(problem: Problem, text: str, folder: Path, times, plan, options, *, resume: bool) -> RelaxRun:
    """The relaxation run with the state split over symmetry sectors, each evolved on its own."""
    from largeq.operators.sector_operator import SymmetricOperator, sector_observables

    scenario = problem.scenario
    fp = fingerprint(text)
    interval = scenario.numerics.checkpoint_seconds if options.checkpoint_seconds is None else options.checkpoint_seconds
    ck = Checkpointer(folder, interval, fingerprint=fp)
    comps, block = plan["components"], plan["block"]
    t0 = time.perf_counter()
    ops = [SymmetricOperator(problem.hamiltonian, c.sector) for c in comps]
    if plan["store"]:
        ops = [op.stored() for op in ops]
    cross = sector_observables([c.sector for c in comps], {n: o.pauli for n, o in problem.observables.items()},
                               store=plan.get("store_observables", False))
    psi_start = [np.ascontiguousarray(c.vector, dtype=np.complex128) for c in comps]
    rec = _SectorRecorder(problem, ops, cross, psi_start, len(times))
    states = [v.copy() for v in psi_start]
    start_index, matvecs = 0, 0
    loaded = load_checkpoint(folder, expect_fingerprint=fp) if resume else None
    bounds = [spectral_bounds(op, rng=np.random.default_rng(BOUNDS_SEED)) for op in ops]
    matvecs += sum(b.steps for b in bounds)
    elapsed_before = time.perf_counter() - t0
    if loaded is not None:
        state, meta = loaded
        block = int(state["block"])
        start_index = int(state["index"])
        states = [np.ascontiguousarray(state[f"psi_{a}"]) for a in range(len(comps))]
        rec.restore(state)
        elapsed_before = float(state["elapsed"])
        matvecs = int(state["matvecs"])
    else:
        rec.record(0, states)
    last = len(times) - 1
    wall0 = time.perf_counter()
    bar = progress_bar(last, f"relax L={problem.n_sites} ({len(comps)} sectors)", enabled=options.progress)
    bar.update(start_index)
    errors = []
    i = start_index
    while i < last:
        j_end = min(last, (i // block + 1) * block)
        outs = [[None] * (j_end - i) for _ in comps]
        for a, op in enumerate(ops):
            def keep(idx, t, psi, a=a):
                outs[a][idx - i - 1] = np.array(psi)
            st = evolve(op, states[a], times[: j_end + 1], bounds=bounds[a], tol=scenario.numerics.tolerance,
                        block=block, on_output=keep, start_index=i, emit_start=False)
            matvecs += st.matvecs
            errors.append(st.max_error_estimate)
        for k in range(j_end - i):
            rec.record(i + 1 + k, [outs[a][k] for a in range(len(comps))])
        states = [outs[a][-1] for a in range(len(comps))]
        bar.update(j_end - i)
        i = j_end
        if i < last:
            def snapshot(i=i):
                st = {f"psi_{a}": v for a, v in enumerate(states)}
                st.update(index=i, block=block, elapsed=elapsed_before + time.perf_counter() - wall0, matvecs=matvecs)
                st.update(rec.arrays())
                return st, {"time": float(times[i])}
            ck.maybe_save(snapshot)
    bar.close()
    wall = elapsed_before + time.perf_counter() - wall0
    stats = SimpleNamespace(max_error_estimate=max(errors, default=0.0), total_error_estimate=float(sum(errors)))
    sector_info = {"note": plan["note"], "reason": plan["reason"], "stored_matrices": plan["store"],
                   "stored_observables": plan.get("store_observables", False),
                   "sectors": [{"label": c.sector.label, "key": list(c.sector.full_key), "dimension": int(c.sector.dim),
                                "weight": float(c.weight)}
                               for c in comps]}
    summary = _finish(problem, text, folder, times, rec, bounds[0], block, plan["forecast"], stats, matvecs, wall,
                      1.0, options, sectors=sector_info)
    ckfile = folder / CHECKPOINT_NAME
    if ckfile.exists():
        ckfile.unlink()
    return RelaxRun(folder, summary)


def _finish(problem, text, folder, times, rec, bounds, block, forecast, stats, matvecs, wall, captured,
            options, sectors: dict | None = None) -> dict:
    scenario = problem.scenario
    analyses = {n: analyse_curve(times, rec.values[n]) for n in rec.names}
    eq = equilibration_report(problem, times, rec.survival, analyses, mode=options.equilibration,
                              seed=options.seed, energy=float(rec.energy[0]))
    norm_drift = float(np.max(np.abs(rec.norm - 1.0)))
    energy_drift = float(np.max(np.abs(rec.energy - rec.energy[0])))
    obs_meta = {n: problem.observables[n] for n in rec.names}
    tree = {
        "curves": {
            "times": Quantity(times, "1/J", "output times (inverse energy units)"),
            **{n: Quantity(rec.values[n], "1", obs_meta[n].description) for n in rec.names},
            "survival_probability": Quantity(rec.survival, "1", "|<psi(0)|psi(t)>|^2"),
            "norm": Quantity(rec.norm, "1", "||psi(t)||"),
            "energy": Quantity(rec.energy, "J", "<psi(t)|H|psi(t)>"),
        },
        "analysis": {
            n: {
                "equilibrium": a.equilibrium,
                "equilibrium_err": a.equilibrium_err,
                "temporal_variance": a.variance,
                "tau_int": a.tau_int,
                "relaxation_time": a.relaxation_time,
                "settled": a.settled,
                "window_start": a.window_start,
                "window_end": a.window_end,
                "running_average": a.running_average,
                "distance": a.distance,
                "verdict": a.verdict,
            }
            for n, a in analyses.items()
        },
        "observables": {
            n: {"description": o.description, "norm": o.norm, "a_min": o.a_min, "a_max": o.a_max,
                "norm_exact": o.norm_exact}
            for n, o in obs_meta.items()
        },
        "hamiltonian": {
            "x_mask": problem.hamiltonian.x_mask,
            "z_mask": problem.hamiltonian.z_mask,
            "coeff": problem.hamiltonian.coeff,
        },
        "fields": {k: v for k, v in _field_values(problem).items()},
    }
    numerics = {
        "method": scenario.numerics.method,
        "tolerance": scenario.numerics.tolerance,
        "block": block,
        "bounds": [bounds.e_min, bounds.e_max],
        "matvecs": matvecs,
        "max_step_error_estimate": stats.max_error_estimate if stats else 0.0,
        "total_error_estimate": stats.total_error_estimate if stats else 0.0,
        "memory_forecast_bytes": forecast.total_bytes,
    }
    attrs = {
        "largeq_version": __version__,
        "scenario_toml": text,
        "title": scenario.title,
        "conventions": spin_conventions(),
        "versions": package_versions(),
        "machine": run_metadata(),
        "basis": _basis_summary(problem, sectors),
        "basis_reason": problem.basis_reason if sectors is None else sectors["reason"],
        "symmetry_sectors": sectors or {},
        "symmetries": problem.symmetries,
        "initial_state": problem.start.label,
        "initial_weight_in_basis": captured,
        "numerics": numerics,
        "wall_seconds": wall,
        "norm_drift": norm_drift,
        "energy_drift": energy_drift,
        "seeds": {"bounds_lanczos": BOUNDS_SEED, "estimators": options.seed, **_seeds(scenario)},
        "equilibration": eq["summary"],
    }
    write_results(folder / "results.h5", tree, attrs=attrs)
    summary = {
        "title": scenario.title,
        "sites": problem.n_sites,
        "basis": _basis_summary(problem, sectors),
        "symmetry_sectors": sectors,
        "initial_state": problem.start.label,
        "initial_energy": float(rec.energy[0]),
        "energy_drift": energy_drift,
        "norm_drift": norm_drift,
        "wall_seconds": wall,
        "matvecs": matvecs,
        "method": scenario.numerics.method,
        "tolerance": scenario.numerics.tolerance,
        "block": block,
        "memory_forecast_bytes": forecast.total_bytes,
        "observables": {
            n: {
                "equilibrium": a.equilibrium,
                "equilibrium_err": a.equilibrium_err,
                "temporal_variance": a.variance,
                "relaxation_time": a.relaxation_time,
                "settled": a.settled,
                "window": [a.window_start, a.window_end],
                "verdict": a.verdict,
                **eq["per_observable"][n],
            }
            for n, a in analyses.items()
        },
        "equilibration": eq["summary"],
    }
    write_summary(folder / "summary.json", summary)
    _plots_and_report(problem, folder, times, rec, analyses, summary, eq["rows"])
    return summary


def _basis_summary(problem, sectors: dict | None) -> dict:
    """The basis the run evolved in: the magnetization sector / full space, or the symmetry sectors
    (kind "symmetry-sector", their total dimension, each sector's label and dimension, and the basis
    they replace)."""
    if sectors is None:
        return problem.basis.describe() | {"reason": problem.basis_reason}
    dims = [s["dimension"] for s in sectors["sectors"]]
    return {"kind": "symmetry-sector", "sites": problem.n_sites, "up_spins": problem.basis.up_spins,
            "dimension": int(sum(dims)), "sector_count": len(dims), "sector_dimensions": dims,
            "sector_labels": [s["label"] for s in sectors["sectors"]],
            "replaces": problem.basis.describe(), "reason": sectors["reason"]}


def _field_values(problem):
    from largeq.model.build import field_values

    return {axis: np.asarray(v, float) for axis, v in field_values(problem.scenario).items()}


def _seeds(scenario) -> dict:
    return {f"field_{f.axis}": f.seed for f in scenario.fields if getattr(f, "seed", None) is not None}


def _plots_and_report(problem, folder: Path, times, rec, analyses, summary, eq_rows) -> None:
    names = rec.names
    plots.plot_relaxation(
        folder / "relaxation.png", times, {n: rec.values[n] for n in names},
        running_average={n: a.running_average for n, a in analyses.items()},
        equilibrium={n: (a.equilibrium, a.band_halfwidth) for n, a in analyses.items()},
        window=(analyses[names[0]].window_start, analyses[names[0]].window_end),
        title=problem.scenario.title,
    )
    plots.plot_distance(folder / "distance.png", times, {n: a.distance for n, a in analyses.items()},
                        fluctuation_level={n: a.variance for n, a in analyses.items()})
    plots.plot_survival(folder / "survival.png", times, rec.survival)
    rows = []
    for n, a in analyses.items():
        rows.append((f"{n}: equilibrium value", html.format_value_error(a.equilibrium, a.equilibrium_err),
                     f"window t = {a.window_start:.3g} .. {a.window_end:.3g}"))
        rows.append((f"{n}: temporal variance σ²", html.format_number(a.variance), ""))
        rows.append((f"{n}: relaxation time", html.format_number(a.relaxation_time),
                     "settled" if a.settled else "not settled"))
    sections = [
        html.Section("Relaxation curves", images=["relaxation.png"], table=rows,
                     paragraphs=[f"{n}: {a.verdict}" for n, a in analyses.items()]),
        html.Section("Distance to equilibrium", images=["distance.png"],
                     table=[(f"{n}: σ²", html.format_number(a.variance), "") for n, a in analyses.items()]),
        html.Section("Effective dimension, fluctuation bound, thermal values",
                     table=eq_rows or [("equilibration analysis", summary["equilibration"]["method"],
                                        summary["equilibration"].get("note", ""))]),
        html.Section("Survival probability", images=["survival.png"], table=[
            ("initial energy ⟨H⟩", html.format_number(summary["initial_energy"]), ""),
            ("energy drift", html.format_number(summary["energy_drift"]), ""),
            ("norm drift", html.format_number(summary["norm_drift"]), ""),
        ]),
        html.Section("Run", table=[
            ("basis", problem.basis.label if summary["basis"]["kind"] != "symmetry-sector" else
             f"{summary['basis']['sector_count']} symmetry sector(s), dimension {summary['basis']['dimension']:,}",
             summary["basis"]["reason"]),
            ("initial state", problem.start.label, ""),
            ("method", summary["method"], f"tolerance {summary['tolerance']:g}"),
            ("matrix-vector products", str(summary["matvecs"]), ""),
            ("wall time (s)", html.format_number(summary["wall_seconds"]), ""),
            ("memory forecast", format_bytes(summary["memory_forecast_bytes"]), "peak, forecast before the run"),
        ]),
    ]
    html.write_report(folder / "report.html", title=problem.scenario.title, sections=sections,
                      subtitle=f"largeq {__version__}: relaxation of L = {problem.n_sites}")
