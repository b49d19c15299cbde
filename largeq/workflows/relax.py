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
import json
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from largeq import __version__
from largeq.analysis.curves import analyse_curve
from largeq.operators.problem import Problem, build_problem
from largeq.engines.bounds import SpectralBounds, spectral_bounds
from largeq.engines.propagate import evolve
from largeq.engines.sector_evolution import advance_sectors
from largeq.workflows.equilibration_step import equilibration_report
from largeq.workflows.relax_report import draw_relax_plots, known_curve_summary, write_relax_report
from largeq.workflows.planning import (available_bytes, check_fits, choose_block, format_bytes, plan_run,
                                      sector_decision)
from largeq.reports.progress import progress_bar
from largeq.machine import peak_rss_bytes
from largeq.reports.checkpoint import CHECKPOINT_NAME, Checkpointer, load_checkpoint
from largeq.reports.run_record import run_attributes
from largeq.reports.store import (Quantity, atomic_write_text, make_run_folder, write_results,
                                  write_summary)
from largeq.scenario.spec import Scenario, load_scenario, scenario_to_toml
from largeq.operators.vectors import vdot
from largeq.constants import BOUNDS_SEED, ESTIMATOR_SEED
from largeq.engines.threads import compiled_kernels
from largeq.reports.phases import PhaseClock
from largeq.reports.store import read_summary
from largeq.workflows.errors import OptionError, WorkflowError

__all__ = ["RelaxOptions", "RelaxRun", "run_relaxation", "resume_relaxation", "choose_block", "sector_choice",
           "sector_plan"]

SCENARIO_FILE = "scenario.toml"


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
    window_start : float or None
        Start of the late averaging window (time units); None takes the scenario's ``time.window_start``
        (itself default: the last half of the run).
    started : float or None
        When the command started (seconds since the epoch, e.g. the process start); ``wall_seconds`` counts from
        there.  None: from the call of :func:`run_relaxation` / :func:`resume_relaxation`.

    Values outside the allowed ones raise OptionError (:func:`check_relax_options`).
    """

    checkpoint_seconds: float | None = None
    progress: bool | None = None
    block: int | None = None
    memory_available: int | None = None
    equilibration: str = "auto"
    seed: int = ESTIMATOR_SEED
    symmetry: str = "auto"
    window_start: float | None = None
    started: float | None = None

    def __post_init__(self):
        check_relax_options(self)


def window_start_of(scenario, override: float | None = None) -> float | None:
    """The late window's start: ``override`` if given, else the scenario's ``time.window_start`` (or None)."""
    ws = override if override is not None else scenario.time.window_start
    if ws is not None and not (0.0 <= ws < scenario.time.t_max):
        raise OptionError(f"window start: got {ws!r}; allowed: a time in [0, {scenario.time.t_max:g}) "
                          "(the scenario's time grid)")
    return ws


#: options that change the numbers of a run: recorded in the run folder and restored by a resume
NUMBER_OPTIONS = ("equilibration", "seed", "symmetry", "block", "window_start")
OPTIONS_FILE = "options.json"


def check_relax_options(o: RelaxOptions) -> None:
    """OptionError naming the option and its allowed values for any value outside them."""
    from largeq.workflows.equilibration_step import MODES

    if o.checkpoint_seconds is not None and not (isinstance(o.checkpoint_seconds, (int, float))
                                                 and np.isfinite(o.checkpoint_seconds) and o.checkpoint_seconds >= 0):
        raise OptionError(f"checkpoint interval: got {o.checkpoint_seconds!r}; allowed: a number of seconds >= 0 "
                          f"(0: at every block)")
    if o.block is not None and (isinstance(o.block, bool) or not isinstance(o.block, (int, np.integer)) or o.block < 1):
        raise OptionError(f"block: got {o.block!r}; allowed: an integer >= 1 (output times per Chebyshev expansion)")
    if isinstance(o.seed, bool) or not isinstance(o.seed, (int, np.integer)) or o.seed < 0:
        raise OptionError(f"seed: got {o.seed!r}; allowed: an integer >= 0")
    if o.equilibration not in MODES:
        raise OptionError(f"equilibration: got {o.equilibration!r}; allowed: {', '.join(MODES)}")
    if o.symmetry not in ("auto", "off"):
        raise OptionError(f"symmetry: got {o.symmetry!r}; allowed: auto, off")
    if o.memory_available is not None and o.memory_available <= 0:
        raise OptionError(f"memory_available: got {o.memory_available!r}; allowed: bytes > 0")


def recorded_options(folder) -> dict | None:
    """The number-changing options a run folder was started with (None for folders without the record)."""
    path = Path(folder) / OPTIONS_FILE
    if not path.exists():
        return None
    return json.loads(path.read_text(encoding="utf-8"))["options"]


def _record_options(folder: Path, options: RelaxOptions) -> None:
    rec = {"options": {k: getattr(options, k) for k in NUMBER_OPTIONS}, "largeq_version": __version__,
           "note": "options that change the numbers; 'largeq relax --resume' restores them"}
    atomic_write_text(folder / OPTIONS_FILE, json.dumps(rec, indent=2) + "\n")


def restore_options(folder, options: RelaxOptions, given=None) -> RelaxOptions:
    """``options`` with the number-changing ones taken from the run folder's record.

    ``given``: names of options set explicitly (None: those differing from the defaults); a given value that
    differs from the recorded one raises OptionError naming both.
    """
    rec = recorded_options(folder)
    if rec is None:
        return options
    defaults = RelaxOptions()
    if given is None:
        given = {k for k in NUMBER_OPTIONS if getattr(options, k) != getattr(defaults, k)}
    conflicts = [f"{k}: the run was started with {rec[k]!r}, this command asks for {getattr(options, k)!r}"
                 for k in NUMBER_OPTIONS if k in given and k in rec and getattr(options, k) != rec[k]]
    if conflicts:
        raise OptionError(f"{folder}: a resume continues with the run's own options; conflicting: "
                          + "; ".join(conflicts) + " (drop the option, or start a new run)")
    return replace(options, **{k: rec[k] for k in NUMBER_OPTIONS if k in rec})


def run_is_finished(folder) -> bool:
    """A run folder whose results are complete: summary.json written and no checkpoint left."""
    folder = Path(folder)
    return (folder / "summary.json").exists() and not (folder / CHECKPOINT_NAME).exists()


@dataclass(frozen=True)
class RelaxRun:
    folder: Path
    summary: dict
    already_finished: bool = False


def fingerprint(scenario_text: str) -> str:
    return hashlib.sha256(scenario_text.encode()).hexdigest()[:24]


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
    """Plan by counting, refuse when the forecast does not fit, and only then build tables and sectors."""
    avail = available_bytes() if options.memory_available is None else int(options.memory_available)
    plan = plan_run(scenario, symmetry=options.symmetry, block=options.block, available=avail)
    check_fits(plan.forecast, n_sites=plan.n_sites, up_spins=plan.up_spins, available=avail)
    problem = build_problem(scenario)
    times = scenario.time.times()
    if plan.path != "sectors":
        return problem, times, plan.block, plan.forecast, None
    return problem, times, plan.block, plan.forecast, sector_plan(problem, plan)


def sector_choice(problem: Problem, options: RelaxOptions = RelaxOptions()) -> dict:
    """Whether ``relax`` evolves ``problem`` in symmetry sectors, and in which ones, decided without
    enumerating any sector: :func:`largeq.workflows.planning.sector_decision` (the rule ``plan_run``, hence
    describe, forecast and relax, applies) on the built problem."""
    return sector_decision(symmetry=options.symmetry, method=problem.scenario.numerics.method,
                           symmetries=problem.symmetries, start=problem.start, basis_up_spins=problem.basis.up_spins,
                           plain_dimension=int(problem.basis.dim), basis_label=problem.basis.label)


def sector_plan(problem: Problem, plan) -> dict:
    """The sector components of the initial state for a plan on the sector path (enumerates the sectors:
    call it after the memory check).  z-basis starts with a conserved magnetization are split by
    ``split_basis_state``, any other product start (tilted spins, full-space sectors) by
    ``split_product_state``.  The counted sectors of the plan are checked against the built ones."""
    from largeq.operators.sector_operator import split_basis_state, split_product_state

    start, g, L = problem.start, plan.sector_group, problem.n_sites
    if start.bits is not None and g["conserve_magnetization"]:
        comps, note = split_basis_state(start.bits, L, reflection=g["reflection"], spin_flip=g["spin_flip"])
    else:
        comps, note = split_product_state(start.spinors, conserve_magnetization=g["conserve_magnetization"],
                                          reflection=g["reflection"], spin_flip=g["spin_flip"])
    built = sorted(((c.sector.full_key, int(c.sector.dim)) for c in comps), key=repr)
    counted = sorted(((c.full_key, c.dimension) for c in plan.sectors), key=repr)
    if built != counted:
        raise RuntimeError(f"sector plan {counted} differs from the built sectors {built} (bug)")
    return {"components": comps, "note": note, "block": plan.block, "store": plan.store, "forecast": plan.forecast,
            "reason": plan.reason, "store_observables": plan.store_observables}


def sector_run_observables(problem: Problem, comps) -> tuple[dict, dict]:
    """The Pauli sums a sector run evaluates: for a z-basis start each observable's average over the
    symmetry operations that fix the start (the same curve, fewer and smaller sector blocks; see
    ``observables_for_start``), with a note for each one replaced."""
    from largeq.operators.sector_operator import observables_for_start

    obs = {n: o.pauli for n, o in problem.observables.items()}
    if problem.start.bits is None or not comps:
        return obs, {}
    return observables_for_start(obs, problem.start.bits, comps[0].sector.group)


def _announcer(options: RelaxOptions):
    """Phase lines on stderr when progress is shown (``--progress``, or a terminal), else None."""
    from largeq.reports.phases import stderr_announcer
    from largeq.reports.progress import progress_enabled

    return stderr_announcer("largeq relax") if progress_enabled(options.progress) else None


def run_relaxation(scenario: Scenario, folder=None, options: RelaxOptions = RelaxOptions(), *,
                   overwrite: bool = False) -> RelaxRun:
    """Run the relaxation job of ``scenario`` into a run folder (new, or ``folder``).

    Raises MemoryRefusal before allocating anything large when the run does not fit.
    A folder that already holds an unfinished run is refused (use :func:`resume_relaxation`); one that holds
    a finished run is refused unless ``overwrite``.
    """
    window_start_of(scenario, options.window_start)  # a window outside the time grid is refused up front
    clock = PhaseClock(options.started, announce=_announcer(options))
    text = scenario_to_toml(scenario)
    if folder is not None and (Path(folder) / CHECKPOINT_NAME).exists():
        raise WorkflowError(f"{folder} holds an unfinished run; continue it with 'largeq relax --resume {folder}'")
    if folder is not None and (Path(folder) / SCENARIO_FILE).exists() and not overwrite:
        state = "a finished run" if run_is_finished(folder) else "a run"
        raise WorkflowError(f"{folder} already holds {state}; choose another --out, or pass --overwrite to replace it")
    with clock.phase("plan and build"):
        problem, times, block, forecast, plan = _prepare(scenario, options)  # refuse before creating the folder
    out = make_run_folder(folder, "relax")
    if overwrite:
        for name in ("summary.json", "results.h5", OPTIONS_FILE, "report.html"):
            if (out / name).exists():
                (out / name).unlink()
    atomic_write_text(out / SCENARIO_FILE, text)
    _record_options(out, options)
    if plan is not None:
        return _execute_sectors(problem, text, out, times, plan, options, resume=False, clock=clock)
    return _execute(problem, text, out, times, block, forecast, options, resume=False, clock=clock)


def resume_relaxation(folder, options: RelaxOptions = RelaxOptions(), *, given=None) -> RelaxRun:
    """Continue the run in ``folder`` from its last checkpoint (or from t = 0 if none was written), with the
    options it was started with (see :func:`restore_options`).  A finished run is returned as it is
    (``already_finished``), nothing recomputed."""
    folder = Path(folder)
    if not (folder / SCENARIO_FILE).exists():
        raise WorkflowError(f"{folder} is not a relaxation run folder (no {SCENARIO_FILE})")
    options = restore_options(folder, options, given)
    if run_is_finished(folder):
        return RelaxRun(folder, read_summary(folder / "summary.json"), already_finished=True)
    clock = PhaseClock(options.started, announce=_announcer(options))
    scenario = load_scenario(folder / SCENARIO_FILE)
    text = scenario_to_toml(scenario)
    with clock.phase("plan and build"):
        problem, times, block, forecast, plan = _prepare(scenario, options)
    if recorded_options(folder) is None:
        _record_options(folder, options)
    if plan is not None:
        return _execute_sectors(problem, text, folder, times, plan, options, resume=True, clock=clock)
    return _execute(problem, text, folder, times, block, forecast, options, resume=True, clock=clock)


def _execute(problem: Problem, text: str, folder: Path, times, block, forecast, options, *, resume: bool,
             clock: PhaseClock) -> RelaxRun:
    scenario = problem.scenario
    fp = fingerprint(text)
    interval = scenario.numerics.checkpoint_seconds if options.checkpoint_seconds is None else options.checkpoint_seconds
    ck = Checkpointer(folder, interval, fingerprint=fp)
    op = problem.operator
    psi_start, captured = problem.initial_vector()
    rec = _Recorder(problem, psi_start, len(times))
    start_index, matvecs_before = 0, 0
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
        clock.before = float(state["elapsed"])
        matvecs_before = int(state["matvecs"])
    else:
        with clock.phase("spectral bounds"), compiled_kernels():
            bounds = spectral_bounds(op, rng=np.random.default_rng(BOUNDS_SEED))
        matvecs_before = bounds.steps
    last = len(times) - 1
    bar = progress_bar(last, f"relax L={problem.n_sites}", enabled=options.progress)
    bar.update(start_index)
    stats_holder = {}

    def state_at(i, psi_now):
        st = {"psi": psi_now, "index": i, "block": block, "elapsed": clock.total(),
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
        with clock.phase("evolution"), compiled_kernels():
            stats = evolve(op, psi, times, method=scenario.numerics.method, bounds=bounds,
                           tol=scenario.numerics.tolerance, block=block, on_output=on_output,
                           start_index=start_index, progress=on_progress, emit_start=False)
        stats_holder["stats"] = stats
    bar.close()
    stats = stats_holder.get("stats")
    matvecs = matvecs_before + (stats.matvecs if stats else 0)
    summary = _finish(problem, text, folder, times, rec, bounds, block, forecast, stats, matvecs, clock, captured,
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


def _execute_sectors(problem: Problem, text: str, folder: Path, times, plan, options, *, resume: bool,
                     clock: PhaseClock) -> RelaxRun:
    """The relaxation run with the state split over symmetry sectors, each evolved on its own."""
    from largeq.operators.sector_operator import SymmetricOperator, sector_observables

    scenario = problem.scenario
    fp = fingerprint(text)
    interval = scenario.numerics.checkpoint_seconds if options.checkpoint_seconds is None else options.checkpoint_seconds
    ck = Checkpointer(folder, interval, fingerprint=fp)
    comps, block = plan["components"], plan["block"]
    if clock.announce is not None:
        clock.announce(f"{plan['reason']}; memory forecast {format_bytes(plan['forecast'].total_bytes)}")
    with clock.phase("sector matrices"), compiled_kernels():
        ops = [SymmetricOperator(problem.hamiltonian, c.sector) for c in comps]
        if plan["store"]:
            ops = [op.stored() for op in ops]
        evaluated, equivalent = sector_run_observables(problem, comps)
        cross = sector_observables([c.sector for c in comps], evaluated, store=plan.get("store_observables", False))
    psi_start = [np.ascontiguousarray(c.vector, dtype=np.complex128) for c in comps]
    rec = _SectorRecorder(problem, ops, cross, psi_start, len(times))
    states = [v.copy() for v in psi_start]
    start_index, matvecs = 0, 0
    loaded = load_checkpoint(folder, expect_fingerprint=fp) if resume else None
    with clock.phase("spectral bounds"), compiled_kernels():
        bounds = [spectral_bounds(op, rng=np.random.default_rng(BOUNDS_SEED)) for op in ops]
    matvecs += sum(b.steps for b in bounds)
    if loaded is not None:
        state, meta = loaded
        block = int(state["block"])
        start_index = int(state["index"])
        states = [np.ascontiguousarray(state[f"psi_{a}"]) for a in range(len(comps))]
        rec.restore(state)
        clock.before = float(state["elapsed"])
        matvecs = int(state["matvecs"])
    else:
        rec.record(0, states)
    last = len(times) - 1
    bar = progress_bar(last, f"relax L={problem.n_sites} ({len(comps)} sectors)", enabled=options.progress)
    bar.update(start_index)

    def on_outputs(i, vecs):
        rec.record(i, vecs)
        bar.update(1)

    def snapshot_at(progress):
        def snapshot():
            st = {f"psi_{a}": v for a, v in enumerate(progress.states)}
            st.update(index=progress.index, block=block, elapsed=clock.total(),
                      matvecs=progress.matvecs)
            st.update(rec.arrays())
            return st, {"time": float(times[progress.index])}
        ck.maybe_save(snapshot)

    with clock.phase("evolution"), compiled_kernels():
        progress = advance_sectors(ops, states, times, bounds=bounds, tol=scenario.numerics.tolerance, block=block,
                                   start_index=start_index, on_outputs=on_outputs, on_block_end=snapshot_at,
                                   matvecs=matvecs)
    matvecs = progress.matvecs
    bar.close()
    stats = progress
    sector_info = {"note": plan["note"], "reason": plan["reason"], "stored_matrices": plan["store"],
                   "stored_observables": plan.get("store_observables", False),
                   "observables_by_stabiliser_average": equivalent,
                   "sectors": [{"label": c.sector.label, "key": list(c.sector.full_key), "dimension": int(c.sector.dim),
                                "weight": float(c.weight)}
                               for c in comps]}
    summary = _finish(problem, text, folder, times, rec, bounds[0], block, plan["forecast"], stats, matvecs, clock,
                      1.0, options, sectors=sector_info)
    ckfile = folder / CHECKPOINT_NAME
    if ckfile.exists():
        ckfile.unlink()
    return RelaxRun(folder, summary)


def _finish(problem, text, folder, times, rec, bounds, block, forecast, stats, matvecs, clock, captured,
            options, sectors: dict | None = None) -> dict:
    scenario = problem.scenario
    ws = window_start_of(scenario, options.window_start)
    with clock.phase("curve analysis"):
        analyses = {n: analyse_curve(times, rec.values[n], window_start=ws) for n in rec.names}
    with clock.phase("equilibration"):
        eq = equilibration_report(problem, times, rec.survival, analyses, mode=options.equilibration,
                                  seed=options.seed, energy=float(rec.energy[0]), progress=options.progress)
        exact_de = {n: eq["per_observable"].get(n, {}).get("diagonal_ensemble") for n in rec.names}
        if any(v is not None for v in exact_de.values()):
            # the diagonal ensemble is known: the verdict must agree with it (see analysis.curves)
            analyses = {n: analyse_curve(times, rec.values[n], window_start=ws, exact_equilibrium=exact_de[n])
                        for n in rec.names}
    wall = clock.total()
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
                "relaxation_threshold": a.relaxation_threshold,
                "settled": a.settled,
                "status": a.status,
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
    attrs = run_attributes(
        "relax", text, scenario.title, problem=problem,
        basis=_basis_summary(problem, sectors),
        basis_reason=problem.basis_reason if sectors is None else sectors["reason"],
        symmetry_sectors=sectors or {},
        initial_weight_in_basis=captured,
        numerics=numerics,
        wall_seconds=wall,
        norm_drift=norm_drift,
        energy_drift=energy_drift,
        seeds={"bounds_lanczos": BOUNDS_SEED, "estimators": options.seed, **_seeds(scenario)},
        equilibration=eq["summary"],
    )
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
        "peak_rss_bytes": peak_rss_bytes(),
        "observables": {
            n: {
                "equilibrium": a.equilibrium,
                "equilibrium_err": a.equilibrium_err,
                "temporal_variance": a.variance,
                "relaxation_time": a.relaxation_time,
                "relaxation_time_definition": a.relaxation_note,
                "settled": a.settled,
                "status": a.status,
                "window": [a.window_start, a.window_end],
                "verdict": a.verdict,
                **eq["per_observable"][n],
            }
            for n, a in analyses.items()
        },
        "equilibration": eq["summary"],
        "time_grid": {"t_max": float(times[-1]), "points": int(len(times)),
                      "step": float(times[1] - times[0]) if len(times) > 1 else None},
        "seeds": attrs["seeds"],
    }
    for n, kc in known_curve_summary(scenario, times, rec.values).items():
        summary["observables"][n]["known_curve"] = kc
    summary["options"] = {k: getattr(options, k) for k in NUMBER_OPTIONS}
    with clock.phase("results file"):
        attrs["wall_seconds"] = clock.total()
        write_results(folder / "results.h5", tree, attrs=attrs)
    summary["wall_seconds"] = clock.total()
    summary["phases"] = summary["phase_seconds"] = clock.as_dict()
    write_summary(folder / "summary.json", summary)
    with clock.phase("plots and report"):
        draw_relax_plots(folder)
    # written again so that the wall time covers the whole command; the page (milliseconds) comes last and
    # shows exactly the numbers of summary.json
    summary["wall_seconds"] = clock.total()
    summary["phases"] = summary["phase_seconds"] = clock.as_dict()
    write_summary(folder / "summary.json", summary)
    write_relax_report(folder, draw=False)
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
