"""Energy-weight distribution and density of states of a scenario, saved as a run folder.

``run_spectra`` builds the problem, refuses up front when the forecast memory does not fit,
and then computes, in the basis the initial state lives in (a magnetization sector when the
Hamiltonian conserves the magnetization and the state has a definite one):

* the local density of states (LDOS) ``rho_psi(E) = sum_m |c_m|^2 delta(E - E_m)`` of the
  initial state by the kernel polynomial method, with the exact ``<H>`` and variance (one
  direct product ``H psi``) next to the values the moments imply;
* the density of states (DOS) ``rho(E) = sum_m delta(E - E_m)`` of the same basis by a
  stochastic trace over R random vectors, with error bars from their spread, and the
  integrated DOS (counting function) ``N(E)``;
* the energy resolution of the kernel (standard deviation of a broadened delta peak).

A checkpoint is written after the LDOS and after every random vector; ``resume_spectra``
continues a killed run and gives the same numbers as an uninterrupted one (vector ``i`` is
drawn from its own spawned generator).  Outputs: ``results.h5``, ``summary.json``,
``spectra.png`` and ``report.html``.

Method: A. Weisse, G. Wellein, A. Alvermann and H. Fehske, Rev. Mod. Phys. 78, 275 (2006).
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from largeq import __version__
from largeq.operators.problem import Problem, build_problem
from largeq.engines.bounds import SpectralBounds, spectral_bounds
from largeq.engines.kpm import counting_function, density_of_states, dos_on_grid, local_density
from largeq.workflows.planning import (MemoryForecast, available_bytes, check_basis_fits, check_fits, format_bytes,
                                       kpm_forecast)
from largeq.reports.progress import progress_bar
from largeq.reports import html
from largeq.reports import plots
from largeq.reports.checkpoint import CHECKPOINT_NAME, Checkpointer, load_checkpoint
from largeq.reports.run_record import run_attributes, summary_head
from largeq.reports.store import (Quantity, atomic_write_text, make_run_folder, read_summary,
                                  write_results, write_summary)
from largeq.workflows.errors import OptionError
from largeq.scenario.spec import Scenario, load_scenario, scenario_to_toml
from largeq.constants import BOUNDS_SEED

__all__ = ["SpectraOptions", "SpectraRun", "run_spectra", "resume_spectra", "sector_note",
           "BOUNDS_SEED", "KERNELS"]

SCENARIO_FILE = "scenario.toml"
SETTINGS_FILE = "spectra_settings.json"
KERNELS = ("jackson", "lorentz")
LORENTZ_LAMBDA = 4.0    # the engine's Lorentz kernel parameter (largeq.engines.kpm.lorentz_kernel)


@dataclass(frozen=True)
class SpectraOptions:
    """Settings of one spectra run that are not part of the physics scenario.

    Attributes
    ----------
    moments : int
        Chebyshev moments N (resolution ~ pi a / N for Jackson, a = half the spectral width).
    vectors : int
        Random vectors R of the stochastic trace (DOS error ~ 1/sqrt(R D)).
    kernel : str
        'jackson' (default, positive, near-Gaussian broadening) or 'lorentz' (lambda = 4).
    seed : int or None
        Seed of the random vectors; None draws one (it is written to the outputs).
    progress : bool or None
        Progress bar on/off; None: on when stderr is a terminal.
    memory_available : int or None
        Override of the available memory in bytes (forecasts for another machine, tests).
    """

    moments: int = 512
    vectors: int = 8
    kernel: str = "jackson"
    seed: int | None = None
    progress: bool | None = None
    memory_available: int | None = None

    def validated(self) -> "SpectraOptions":
        if int(self.moments) != self.moments or self.moments < 16:
            raise OptionError(f"spectra option 'moments': got {self.moments!r}; allowed: an integer >= 16")
        if int(self.vectors) != self.vectors or self.vectors < 1:
            raise OptionError(f"spectra option 'vectors': got {self.vectors!r}; allowed: an integer >= 1 "
                                "(>= 2 for error bars)")
        if self.kernel not in KERNELS:
            raise OptionError(f"spectra option 'kernel': got {self.kernel!r}; allowed: {', '.join(KERNELS)}")
        seed = self.seed
        if seed is None:
            seed = int(np.random.SeedSequence().entropy % (2**63))
        if int(seed) != seed or seed < 0:
            raise OptionError(f"spectra option 'seed': got {seed!r}; allowed: an integer >= 0")
        return dataclasses.replace(self, moments=int(self.moments), vectors=int(self.vectors), seed=int(seed))

    def settings(self) -> dict:
        """The options that change the numbers (saved in the run folder and its fingerprint)."""
        return {"moments": self.moments, "vectors": self.vectors, "kernel": self.kernel, "seed": self.seed}


@dataclass(frozen=True)
class SpectraRun:
    folder: Path
    summary: dict


# ---------------------------------------------------------------------------- shared helpers
def fingerprint(scenario_text: str, settings: dict) -> str:
    blob = scenario_text + "\n" + json.dumps(settings, sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()[:24]


def sector_note(problem: Problem) -> str:
    """Which Hilbert space the spectra and ensembles live in, and which conserved quantity they leave out."""
    from largeq.analysis.equilibration import conserved_left_out

    b = problem.basis
    if b.is_sector:
        out = (f"All densities and ensembles are those of the magnetization sector n_up = {b.up_spins} "
               f"(sum of sigma^z = {2 * b.up_spins - b.n_sites}, dimension {b.dim:,}) that the initial state "
               "lives in: the Hamiltonian conserves the magnetization, so the dynamics never leave it.")
    else:
        out = (f"All densities and ensembles are those of the full space (dimension {b.dim:,}): "
               f"{problem.basis_reason}.")
    left = conserved_left_out(problem)
    return out + (f" Conserved quantity the ensembles leave out: {left}." if left else "")


def vector_dtype(problem: Problem):
    """Random vectors are real when the Hamiltonian is real (half the memory and work)."""
    return np.float64 if np.dtype(problem.operator.dtype) == np.float64 else np.complex128


def state_vector(problem: Problem) -> tuple[np.ndarray, float]:
    """The initial state, made real when H is real and the state's amplitudes are real."""
    psi, captured = problem.initial_vector()
    if vector_dtype(problem) == np.float64 and not np.any(psi.imag):
        psi = np.ascontiguousarray(psi.real)
    return psi, captured


def bounds_to_meta(bounds: SpectralBounds) -> dict:
    return {k: getattr(bounds, k) for k in ("e_min", "e_max", "ritz_min", "ritz_max", "residual_min",
                                            "residual_max", "steps")}


def bounds_from_meta(meta: dict) -> SpectralBounds:
    return SpectralBounds(**{k: (int(v) if k == "steps" else float(v)) for k, v in meta.items()})


def spectra_forecast(problem: Problem) -> MemoryForecast:
    """Peak memory: the KPM recursion (start vector and two recursion vectors, complex)."""
    return kpm_forecast(problem.basis.dim, problem.basis.n_sites)


def kernel_halfwidth(kernel: str, scale: float, n_moments: int) -> float:
    """Broadening at the band centre in energy units: Jackson pi a / N (standard deviation of
    the near-Gaussian), Lorentz lambda a / N (half width at half maximum)."""
    return (np.pi if kernel == "jackson" else LORENTZ_LAMBDA) * scale / n_moments


# ---------------------------------------------------------------------------- the run
def _prepare(scenario: Scenario, options: SpectraOptions):
    avail = available_bytes() if options.memory_available is None else int(options.memory_available)
    check_basis_fits(scenario, kpm_forecast, avail)  # by counting, before any table is built
    problem = build_problem(scenario)
    forecast = spectra_forecast(problem)
    check_fits(forecast, n_sites=problem.basis.n_sites, up_spins=problem.basis.up_spins, available=avail)
    return problem, forecast


def run_spectra(scenario: Scenario, folder=None, options: SpectraOptions = SpectraOptions()) -> SpectraRun:
    """LDOS of the initial state, DOS and integrated DOS of its basis, saved as a run folder.

    Raises MemoryRefusal before allocating anything large when the run does not fit, and
    FileExistsError when ``folder`` holds an unfinished run (continue it with
    :func:`resume_spectra`).

    Parameters
    ----------
    scenario : Scenario
    folder : path-like or None (default: runs/spectra-<timestamp>)
    options : SpectraOptions (moments N, vectors R, kernel, seed)

    Returns
    -------
    SpectraRun with the folder and the summary dict (also in ``summary.json``).
    """
    options = options.validated()
    text = scenario_to_toml(scenario)
    if folder is not None and (Path(folder) / CHECKPOINT_NAME).exists():
        raise FileExistsError(f"{folder} holds an unfinished run; continue it with 'largeq spectra --resume {folder}'")
    problem, forecast = _prepare(scenario, options)  # refuse before mkdir
    out = make_run_folder(folder, "spectra")
    atomic_write_text(out / SCENARIO_FILE, text)
    atomic_write_text(out / SETTINGS_FILE, json.dumps(options.settings(), indent=2, sort_keys=True) + "\n")
    return _execute(problem, text, out, options, forecast, resume=False)


def resume_spectra(folder, options: SpectraOptions = SpectraOptions()) -> SpectraRun:
    """Continue the spectra run in ``folder`` from its last checkpoint.

    The numerical settings (moments, vectors, kernel, seed) are those saved in the folder;
    only ``progress`` and ``memory_available`` are taken from ``options``.
    """
    folder = Path(folder)
    if not (folder / SCENARIO_FILE).exists() or not (folder / SETTINGS_FILE).exists():
        raise FileNotFoundError(f"{folder} is not a spectra run folder (no {SCENARIO_FILE} / {SETTINGS_FILE})")
    scenario = load_scenario(folder / SCENARIO_FILE)
    text = scenario_to_toml(scenario)
    saved = read_summary(folder / SETTINGS_FILE)
    options = dataclasses.replace(options, **saved).validated()
    problem, forecast = _prepare(scenario, options)
    return _execute(problem, text, folder, options, forecast, resume=True)


def _execute(problem: Problem, text: str, folder: Path, options: SpectraOptions, forecast, *, resume: bool):
    settings = options.settings()
    fp = fingerprint(text, settings)
    ck = Checkpointer(folder, 0.0, fingerprint=fp)
    op = problem.operator
    R, N = options.vectors, options.moments
    loaded = load_checkpoint(folder, expect_fingerprint=fp) if resume else None
    timings = {"bounds_seconds": 0.0, "ldos_seconds": 0.0, "dos_seconds": 0.0}
    done = np.empty((0, N))
    ldos_moments = None
    if loaded is not None:
        state, meta = loaded
        bounds = bounds_from_meta(meta["bounds"])
        timings.update(meta["timings"])
        if int(state["n_done"]):
            done = np.asarray(state["vector_moments"], dtype=float).reshape(-1, N)
        ldos_moments = np.asarray(state["ldos_moments"], dtype=float)
    else:
        t0 = time.perf_counter()
        bounds = spectral_bounds(op, rng=np.random.default_rng(BOUNDS_SEED))
        timings["bounds_seconds"] = time.perf_counter() - t0

    def save(rows):
        state = {"ldos_moments": ldos.moments, "n_done": len(rows)}
        if len(rows):  # (the checkpoint layer cannot hash a zero-size array: leave the key out)
            state["vector_moments"] = np.asarray(rows, dtype=float).reshape(-1, N)
        ck.force_save((state, {"bounds": bounds_to_meta(bounds), "timings": timings, "settings": settings}))

    psi, captured = state_vector(problem)
    t0 = time.perf_counter()
    ldos = local_density(op, psi, N, bounds, kernel=options.kernel)
    del psi
    if ldos_moments is None:
        timings["ldos_seconds"] = time.perf_counter() - t0
        save(done)
    elif not np.allclose(ldos_moments, ldos.moments, rtol=1e-9, atol=1e-9):  # same operator and state
        raise RuntimeError("the LDOS moments differ from the checkpointed ones; the operator has changed")

    rows = [r for r in done]
    bar = progress_bar(R, f"spectra L={problem.n_sites}", enabled=options.progress)
    bar.update(len(rows))
    t_dos = time.perf_counter()
    dos_before = timings["dos_seconds"]

    def on_vector(i, mu_i):
        rows.append(mu_i)
        timings["dos_seconds"] = dos_before + time.perf_counter() - t_dos
        if len(rows) < R:
            save(rows)
        bar.update(1)

    try:
        dos = density_of_states(op, N, bounds, R, np.random.default_rng(options.seed), kernel=options.kernel,
                                dtype=vector_dtype(problem), on_vector=on_vector,
                                done_moments=done if done.shape[0] else None)
    finally:
        bar.close()
    timings["dos_seconds"] = dos_before + time.perf_counter() - t_dos
    summary = _finish(problem, text, folder, options, bounds, ldos, dos, timings, forecast, captured)
    ckfile = folder / CHECKPOINT_NAME
    if ckfile.exists():
        ckfile.unlink()
    return SpectraRun(folder, summary)


def _per_vector_count(dos, energy: float) -> tuple[float, float]:
    """N(E) from the mean moments and its standard error over the random vectors."""
    value = float(counting_function(dos, [energy])[0])
    if dos.n_vectors < 2:
        return value, float("nan")
    each = [float(counting_function(dataclasses.replace(dos, moments=m), [energy])[0]) for m in dos.vector_moments]
    return value, float(np.std(each, ddof=1) / np.sqrt(dos.n_vectors))


def _finish(problem, text, folder, options, bounds, ldos, dos, timings, forecast, captured) -> dict:
    scenario = problem.scenario
    E = ldos.mean_exact
    width = float(np.sqrt(max(ldos.variance_exact, 0.0)))
    res_at_state = float(np.interp(E, ldos.energies, ldos.resolution))
    res_center = kernel_halfwidth(options.kernel, ldos.scale, options.moments)
    dos_at = float(dos_on_grid(dos, [E])[0])
    dos_at_err = float(np.interp(E, dos.energies, dos.density_err)) if dos.n_vectors > 1 else float("nan")
    below, below_err = _per_vector_count(dos, E)
    D = problem.basis.dim
    infinite_t_energy = float(dos.scale * dos.moments[1] / dos.moments[0] + dos.shift)
    narrow = width < 2.0 * res_at_state
    timings = dict(timings, total_seconds=float(sum(timings.values())))
    note = sector_note(problem)
    flags = []
    if narrow:
        flags.append("the energy width of the state is below twice the kernel resolution: the LDOS shape is not "
                     "resolved (raise --moments)")
    tree = {
        "grid": {
            "energies": Quantity(ldos.energies, "J", "energies of the Chebyshev nodes, E = a x + b"),
            "resolution": Quantity(ldos.resolution, "J",
                                   "standard deviation of a kernel-broadened delta peak at each energy"),
        },
        "ldos": {
            "density": Quantity(ldos.density, "1/J", "rho_psi(E) = sum_m |c_m|^2 delta(E - E_m), broadened; integrates to 1"),
            "cumulative": Quantity(ldos.cumulative, "1", "integral of rho_psi from the lower end of the rescaled interval"),
            "moments": Quantity(ldos.moments, "1", "mu_n = <psi|T_n((H - b)/a)|psi>, normalised state, undamped"),
        },
        "dos": {
            "density": Quantity(dos.density, "1/J", "rho(E) = sum_m delta(E - E_m), broadened; integrates to the dimension"),
            "density_err": Quantity(dos.density_err, "1/J", "standard error over the random vectors"),
            "counting": Quantity(dos.cumulative, "1", "integrated DOS N(E): number of states below E (broadened)"),
            "counting_err": Quantity(dos.cumulative_err, "1", "standard error of N(E) over the random vectors"),
            "moments": Quantity(dos.moments, "1", "mean over vectors of <r|T_n((H - b)/a)|r>, ||r||^2 = D"),
            "vector_moments": Quantity(dos.vector_moments, "1", "per-vector moments (rows: vectors)"),
        },
        "kernel_factors": Quantity(ldos.kernel_factors, "1", f"{options.kernel} damping factors g_n"),
    }
    kpm_meta = {
        "kernel": options.kernel,
        "lorentz_lambda": LORENTZ_LAMBDA if options.kernel == "lorentz" else None,
        "n_moments": options.moments,
        "n_vectors": options.vectors,
        "vector_dtype": np.dtype(vector_dtype(problem)).name,
        "vector_kind": dos.vector_kind,
        "scale_a": ldos.scale,
        "shift_b": ldos.shift,
        "rescaling": "Ht = (H - b) / a, a = (E_max - E_min) / (2 - 0.01), b = (E_max + E_min) / 2",
        "bounds": [bounds.e_min, bounds.e_max],
        "resolution_center": res_center,
        "resolution_center_meaning": ("pi a / N: standard deviation of the Jackson broadening at the band centre"
                                      if options.kernel == "jackson" else
                                      "lambda a / N: half width at half maximum of the Lorentz broadening"),
        "resolution_at_state_energy": res_at_state,
        "ldos_mean_exact": ldos.mean_exact,
        "ldos_variance_exact": ldos.variance_exact,
        "ldos_mean_from_moments": ldos.mean_moments,
        "ldos_variance_from_moments": ldos.variance_moments,
        "memory_forecast_bytes": forecast.total_bytes,
    }
    attrs = {
        **run_attributes("spectra", text, scenario.title, problem=problem),
        "ensemble_note": note,
        "initial_weight_in_basis": captured,
        "kpm": kpm_meta,
        "timings": timings,
        "seeds": {"random_vectors": options.seed, "bounds_lanczos": BOUNDS_SEED,
                  "vector_rule": "vector i is drawn from numpy.random.default_rng(seed).spawn(R)[i]"},
        "method_reference": "A. Weisse, G. Wellein, A. Alvermann, H. Fehske, Rev. Mod. Phys. 78, 275 (2006)",
    }
    write_results(folder / "results.h5", tree, attrs=attrs)
    summary = {
        **summary_head("spectra", problem, D, note),
        "state_energy": E,
        "state_energy_from_moments": ldos.mean_moments,
        "state_width": width,
        "state_width_from_moments": float(np.sqrt(max(ldos.variance_moments, 0.0))),
        "kernel": options.kernel,
        "moments": options.moments,
        "vectors": options.vectors,
        "seed": options.seed,
        "resolution_at_state": res_at_state,
        "resolution_center": res_center,
        "bounds": [bounds.e_min, bounds.e_max],
        "dos_at_state": dos_at,
        "dos_at_state_err": dos_at_err,
        "states_below_state_energy": below,
        "states_below_state_energy_err": below_err,
        "fraction_below_state_energy": below / D,
        "infinite_temperature_energy": infinite_t_energy,
        "dos_total": dos.total,
        "ldos_narrower_than_resolution": narrow,
        "flags": flags,
        "timings": timings,
        "wall_seconds": timings["total_seconds"],
        "memory_forecast_bytes": forecast.total_bytes,
    }
    write_summary(folder / "summary.json", summary)
    _plots_and_report(problem, folder, ldos, dos, summary)
    return summary


def _plots_and_report(problem, folder: Path, ldos, dos, s) -> None:
    plots.plot_spectra(folder / "spectra.png", ldos.energies, ldos.density, dos.density,
                       dos_err=dos.density_err if dos.n_vectors > 1 else None,
                       state_energy=s["state_energy"], state_width=s["state_width"],
                       title=f"{problem.scenario.title} (L = {problem.n_sites})")
    rows = [
        ("state energy ⟨ψ|H|ψ⟩ (exact)", html.format_number(s["state_energy"], 8), "J"),
        ("… from the moments", html.format_number(s["state_energy_from_moments"], 8), "a μ₁ + b"),
        ("energy width ΔE (exact)", html.format_number(s["state_width"], 6), "J"),
        ("… from the moments", html.format_number(s["state_width_from_moments"], 6), ""),
        ("kernel resolution at ⟨H⟩", html.format_number(s["resolution_at_state"]),
         f"{s['kernel']}, N = {s['moments']} moments"),
        ("DOS at ⟨H⟩", html.format_value_error(s["dos_at_state"], s["dos_at_state_err"]), "states / J"),
        ("states below ⟨H⟩", html.format_value_error(s["states_below_state_energy"],
                                                     s["states_below_state_energy_err"]),
         f"of {s['dimension']:,} ({100 * s['fraction_below_state_energy']:.3g} %)"),
        ("infinite-temperature energy Tr H / D", html.format_number(s["infinite_temperature_energy"]), "J"),
    ]
    sections = [
        html.Section("Energy-weight distribution over the density of states", images=["spectra.png"], table=rows,
                     paragraphs=[s["ensemble_note"],
                                 f"DOS from {s['vectors']} random vectors (seed {s['seed']}); error bands are "
                                 "standard errors over the vectors, relative size ~ 1/sqrt(R D)."] + s["flags"]),
        html.Section("Run", table=[
            ("basis", problem.basis.label, problem.basis_reason),
            ("initial state", problem.start.label, ""),
            ("spectral bounds", f"[{s['bounds'][0]:.6g}, {s['bounds'][1]:.6g}]", "Lanczos, padded"),
            ("wall time (s)", html.format_number(s["wall_seconds"]),
             ", ".join(f"{k.replace('_seconds', '')} {v:.3g}" for k, v in s["timings"].items()
                       if k != "total_seconds")),
            ("memory forecast", format_bytes(s["memory_forecast_bytes"]), ""),
        ]),
    ]
    html.write_report(folder / "report.html", title=problem.scenario.title, sections=sections,
                      subtitle=f"largeq {__version__}: energy spectra of L = {problem.n_sites}")


# ---------------------------------------------------------------------------- command line
