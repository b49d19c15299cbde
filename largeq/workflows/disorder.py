"""Disorder averages: N realizations of a scenario with random fields, each with its own recorded seed.

Seeds.  The realization seeds are derived deterministically from the scenario's own seed (the preset's
``seed`` or the random field's ``seed``) with ``numpy.random.SeedSequence(base).spawn(N)``; realization k gets
``spawn(N)[k].generate_state(1)[0]`` (a 32-bit integer, written into its scenario).  Asking for more
realizations later keeps the first ones: SeedSequence children do not depend on N.

Statistics.  For every number x_k over realizations k = 1..N: the mean, the standard error of the mean
std(x, ddof=1) / sqrt(N) and the spread std(x, ddof=1) (sample-to-sample fluctuation); curves point by point.

``run_disorder_relaxation`` runs ``largeq.workflows.relax.run_relaxation`` once per realization (sub-folders
``realization-000`` ...; a rerun skips realizations already finished) and writes the aggregate
``results.h5``, ``summary.json``, ``relaxation.png`` and ``report.html`` in the parent folder.
"""

from __future__ import annotations

import dataclasses
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from largeq import __version__
from largeq.reports import html
from largeq.reports import plots
from largeq.reports.run_record import run_attributes
from largeq.reports.store import (Quantity, atomic_write_text, make_run_folder, read_results,
                                  read_summary, write_results, write_summary)
from largeq.scenario.spec import Scenario, ScenarioError, parse_scenario, scenario_to_dict, scenario_to_toml

__all__ = ["is_disordered", "base_seed", "realization_seeds", "with_seed", "aggregate", "aggregate_curves",
           "DisorderRun", "run_disorder_relaxation", "realization_folder"]


def _random_fields(scenario: Scenario):
    return [f for f in scenario.fields if f.pattern == "random"]


def is_disordered(scenario: Scenario) -> bool:
    """True when the Hamiltonian has a random field (the only random ingredient of a scenario)."""
    return bool(_random_fields(scenario))


def base_seed(scenario: Scenario) -> int:
    """The scenario's recorded disorder seed (preset parameter ``seed`` or the first random field's)."""
    if scenario.model is not None and "seed" in dict(scenario.model.params):
        return int(scenario.model.param("seed"))
    fields = _random_fields(scenario)
    if not fields:
        raise ScenarioError("field", None, "a random field (pattern = 'random') for disorder realizations",
                            scenario.source)
    return int(fields[0].seed)


def realization_seeds(seed: int, n: int) -> list[int]:
    """Seeds of realizations 0..n-1 derived from ``seed`` (SeedSequence spawn; prefix-stable in n)."""
    if int(n) != n or n < 1:
        raise ValueError(f"number of realizations must be an integer >= 1, got {n!r}")
    return [int(c.generate_state(1, np.uint32)[0]) for c in np.random.SeedSequence(int(seed)).spawn(int(n))]


def with_seed(scenario: Scenario, seed: int) -> Scenario:
    """The same scenario with its disorder drawn from ``seed``.

    A preset with a ``seed`` parameter gets it replaced; otherwise the single random field gets ``seed`` and
    further random fields (other axes) get ``SeedSequence([seed, k])``-derived seeds (k = their order).
    """
    if not is_disordered(scenario):
        raise ScenarioError("field", None, "a random field (pattern = 'random') for disorder realizations",
                            scenario.source)
    data = scenario_to_dict(scenario)
    if scenario.model is not None and "seed" in data.get("model", {}):
        data["model"]["seed"] = int(seed)
    else:
        for k, f in enumerate(_random_fields(scenario)):
            s = int(seed) if k == 0 else int(np.random.SeedSequence([int(seed), k]).generate_state(1, np.uint32)[0])
            data["field"][f.axis]["seed"] = s
    return parse_scenario(data, source=scenario.source)


def aggregate(values) -> dict:
    """Mean, standard error of the mean, spread (sample std, ddof 1), min, max and count of finite values."""
    v = np.asarray([x for x in values if x is not None], dtype=float)
    v = v[np.isfinite(v)]
    n = int(v.size)
    if n == 0:
        return {"mean": float("nan"), "stderr": float("nan"), "spread": float("nan"), "min": float("nan"),
                "max": float("nan"), "n": 0}
    spread = float(np.std(v, ddof=1)) if n > 1 else float("nan")
    return {"mean": float(v.mean()), "stderr": spread / np.sqrt(n) if n > 1 else float("nan"), "spread": spread,
            "min": float(v.min()), "max": float(v.max()), "n": n}


def aggregate_curves(curves) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(mean, standard error, spread) point by point of equal-length curves (rows = realizations)."""
    a = np.asarray(curves, dtype=float)
    if a.ndim != 2 or a.shape[0] < 1:
        raise ValueError(f"curves must be a 2-d array (realizations x times), got shape {a.shape}")
    n = a.shape[0]
    mean = a.mean(axis=0)
    if n < 2:
        nan = np.full(a.shape[1], np.nan)
        return mean, nan, nan
    spread = a.std(axis=0, ddof=1)
    return mean, spread / np.sqrt(n), spread


def realization_folder(folder, k: int) -> Path:
    return Path(folder) / f"realization-{k:03d}"


@dataclass(frozen=True)
class DisorderRun:
    folder: Path
    summary: dict


OBS_KEYS = ("equilibrium", "equilibrium_err", "temporal_variance", "relaxation_time")


def run_disorder_relaxation(scenario: Scenario, n_realizations: int, folder=None, options=None, *,
                            echo=None) -> DisorderRun:
    """Relaxation of ``n_realizations`` disorder realizations and their average (see the module docstring).

    Each realization is a complete ``relax`` run folder; realizations already finished in ``folder``
    (their ``summary.json`` exists and their recorded seed matches) are not run again.
    """
    from largeq.workflows.relax import RelaxOptions, run_relaxation

    options = RelaxOptions() if options is None else options
    started = options.started
    options = dataclasses.replace(options, started=None)  # each realization times itself; the total from `started`
    seed0 = base_seed(scenario)
    seeds = realization_seeds(seed0, n_realizations)
    out = make_run_folder(folder, "relax-disorder")
    atomic_write_text(out / "scenario.toml", scenario_to_toml(scenario))
    t0 = time.perf_counter()
    summaries = []
    for k, seed in enumerate(seeds):
        sub = realization_folder(out, k)
        sc = with_seed(scenario, seed)
        if (sub / "summary.json").exists() and (sub / "results.h5").exists():
            _, attrs = read_results(sub / "results.h5", quantities=False)
            if attrs.get("scenario_toml") == scenario_to_toml(sc):
                summaries.append(read_summary(sub / "summary.json"))
                if echo:
                    echo(f"  realization {k} (seed {seed}): already done, kept")
                continue
        run = run_relaxation(sc, sub, options, overwrite=True)  # a stale realization of this run: redone
        summaries.append(run.summary)
        if echo:
            echo(f"  realization {k} (seed {seed}): {run.summary['wall_seconds']:.1f} s")
    wall = time.time() - started if started is not None else time.perf_counter() - t0
    summary = _aggregate_relax(scenario, out, seeds, summaries, wall, window_start=options.window_start)
    return DisorderRun(out, summary)


def _aggregate_relax(scenario, out: Path, seeds, summaries, wall, window_start=None) -> dict:
    from largeq.analysis.curves import analyse_curve
    from largeq.workflows.relax import window_start_of

    trees = [read_results(realization_folder(out, k) / "results.h5", quantities=False)[0] for k in range(len(seeds))]
    times = np.asarray(trees[0]["curves"]["times"], dtype=float)
    names = list(summaries[0]["observables"])
    curves = {}
    tree_curves = {"times": Quantity(times, "1/J", "output times")}
    for n in names:
        m, se, sp = aggregate_curves([np.real(t["curves"][n]) for t in trees])
        curves[n] = (m, se, sp)
        tree_curves[n] = Quantity(m, "1", f"disorder mean of <{n}(t)>")
        tree_curves[f"{n}_stderr"] = Quantity(se, "1", "standard error of the mean over realizations")
        tree_curves[f"{n}_spread"] = Quantity(sp, "1", "standard deviation between realizations")
        tree_curves[f"{n}_realizations"] = Quantity(np.array([np.real(t["curves"][n]) for t in trees]), "1",
                                                     "every realization (rows)")
    obs = {n: {key: aggregate([s["observables"][n][key] for s in summaries]) for key in OBS_KEYS} for n in names}
    ws = window_start_of(scenario, window_start)
    for n in names:
        # the disorder-averaged curve analysed like one curve: its 1/e relaxation time (physical units)
        a = analyse_curve(times, curves[n][0], window_start=ws)
        obs[n]["average_curve"] = {"equilibrium": a.equilibrium, "equilibrium_err": a.equilibrium_err,
                                   "relaxation_time": a.relaxation_time, "relaxation_time_definition":
                                   a.relaxation_note, "status": a.status, "window": [a.window_start, a.window_end]}
    cost = {"wall_seconds": aggregate([s["wall_seconds"] for s in summaries]),
            "matvecs": aggregate([s["matvecs"] for s in summaries])}
    summary = {
        "title": scenario.title, "command": "relax", "sites": summaries[0]["sites"],
        "realizations": len(seeds), "base_seed": base_seed(scenario), "seeds": list(seeds),
        "seed_rule": "numpy.random.SeedSequence(base_seed).spawn(N)[k].generate_state(1, uint32)[0]",
        "basis": summaries[0]["basis"], "method": summaries[0]["method"], "tolerance": summaries[0]["tolerance"],
        "wall_seconds": wall, "matvecs": int(sum(s["matvecs"] for s in summaries)),
        "observables": obs, "cost_per_realization": cost,
        "statistics": "mean, stderr = std(ddof=1)/sqrt(N), spread = std(ddof=1) over realizations",
        "folders": [realization_folder(out, k).name for k in range(len(seeds))],
    }
    attrs = run_attributes("relax", scenario_to_toml(scenario), scenario.title, seeds=list(seeds),
                           base_seed=base_seed(scenario), realizations=len(seeds))
    write_results(out / "results.h5", {"curves": tree_curves, "observables": {
        n: {k: {kk: vv for kk, vv in v.items() if not isinstance(vv, (str, list))} for k, v in o.items()}
        for n, o in obs.items()}}, attrs=attrs)
    write_summary(out / "summary.json", summary)
    plots.plot_relaxation(out / "relaxation.png", times, {n: c[0] for n, c in curves.items()},
                          equilibrium={n: (obs[n]["equilibrium"]["mean"], obs[n]["equilibrium"]["spread"])
                                       for n in names},
                          equilibrium_label="late-window mean ± spread over realizations",
                          title=f"{scenario.title} (mean of {len(seeds)} realizations)")
    rows = []
    for n in names:
        e = obs[n]["equilibrium"]
        v = obs[n]["temporal_variance"]
        rows.append((f"{n}: equilibrium value (mean ± s.e.)", e["mean"], e["stderr"]))
        rows.append((f"{n}: spread between realizations", html.format_number(e["spread"]), ""))
        rows.append((f"{n}: temporal variance σ² (mean ± s.e.)", v["mean"], v["stderr"]))
        ac = obs[n]["average_curve"]
        rows.append((f"{n}: relaxation time of the averaged curve", html.format_number(ac["relaxation_time"]),
                     ac["relaxation_time_definition"]))
    html.write_report(out / "report.html", title=scenario.title, subtitle=(
        f"largeq {__version__}: disorder average of {len(seeds)} realizations, L = {summary['sites']}"), sections=[
        html.Section("Disorder-averaged relaxation", images=["relaxation.png"], table=rows,
                     paragraphs=["Shaded band: spread (standard deviation) between realizations; the standard "
                                 "error of the mean is smaller by √N."]),
        html.Section("Realizations", table=[(f"realization {k}", f"seed {s}", realization_folder(out, k).name)
                                            for k, s in enumerate(seeds)]),
    ])
    return summary
