"""``largeq relax``: the main job (relaxation curves, equilibrium values, fluctuations) as a run folder."""

from __future__ import annotations

from largeq.cli.common import add_window_argument, UsageError, add_progress_arguments, add_scenario_arguments, resolve_scenario
from largeq.workflows.disorder import run_disorder_relaxation
from largeq.workflows.relax import RelaxOptions, resume_relaxation, run_relaxation
from largeq.constants import ESTIMATOR_SEED
from largeq.reports.headline import ENERGY_ACCURACY, basis_text, fmt, fmt_error, headline_text, relax_headline
from largeq.reports.phases import process_start_time


def add_parser(sub) -> None:
    p = sub.add_parser("relax", help="main job: relaxation curves, equilibrium values, fluctuations, saved as a run folder")
    add_scenario_arguments(p, scenario_optional=True)
    p.add_argument("--out", default=None, metavar="FOLDER", help="run folder (default: runs/relax-<timestamp>)")
    p.add_argument("--overwrite", action="store_true", help="replace a finished run already in --out FOLDER")
    p.add_argument("--resume", default=None, metavar="FOLDER", help="continue an interrupted run from its checkpoint")
    p.add_argument("--checkpoint-every", type=float, default=None, metavar="SECONDS",
                   help="checkpoint interval (default: the scenario's numerics.checkpoint_seconds)")
    p.add_argument("--block", type=int, default=None, metavar="K",
                   help="output times sharing one Chebyshev expansion (default: chosen from free memory)")
    p.add_argument("--equilibration", choices=("auto", "exact", "estimate", "off"), default=None,
                   help="effective dimension, fluctuation bound and thermal values: exact diagonalization where it "
                        "fits, KPM/typical-state estimates up to dimension 300,000, skipped beyond (auto)")
    p.add_argument("--seed", type=int, default=None,
                   help=f"seed of the estimators' random vectors (default {ESTIMATOR_SEED}; recorded, restored by --resume)")
    p.add_argument("--symmetry", choices=("auto", "off"), default=None,
                   help="evolve in momentum/reflection/spin-flip sectors when the model, the start and the "
                        "observables allow it (auto), or always in the magnetization sector (off)")
    add_window_argument(p)
    p.add_argument("--realizations", type=int, default=1, metavar="N",
                   help="disorder realizations (random fields only): one sub-folder each plus their average")
    add_progress_arguments(p)
    p.set_defaults(func=run)


def run(args) -> int:
    # options that change the numbers: only those given on the command line count on a resume
    given = {k: getattr(args, k) for k in ("equilibration", "seed", "symmetry", "block", "window_start")
             if getattr(args, k) is not None}
    options = RelaxOptions(checkpoint_seconds=args.checkpoint_every, progress=args.progress,
                           started=process_start_time(), **given)
    if args.resume:
        if args.scenario:
            raise UsageError("relax --resume takes a run folder and no scenario")
        if args.out is not None or args.overwrite:
            raise UsageError("relax --resume continues in its own folder: drop --out / --overwrite")
        result = resume_relaxation(args.resume, options, given=set(given))
        if result.already_finished:
            print(f"{args.resume}: this run is already finished (summary.json); nothing recomputed")
    else:
        if not args.scenario:
            raise UsageError("relax needs a scenario (a TOML file or a built-in example name) or --resume FOLDER")
        if args.realizations < 1:
            raise UsageError("--realizations must be >= 1")
        if args.realizations > 1:
            result = run_disorder_relaxation(resolve_scenario(args.scenario, args.sites), args.realizations, args.out,
                                          options, echo=print)
            _print_disorder_summary(result)
            return 0
        result = run_relaxation(resolve_scenario(args.scenario, args.sites), args.out, options,
                                overwrite=args.overwrite)
    _print_relax_summary(result)
    return 0


def _print_disorder_summary(result) -> None:
    s = result.summary
    print(f"{s['title']}")
    print(f"  L = {s['sites']}, {s['realizations']} disorder realizations (seeds derived from {s['base_seed']}); "
          f"{s['matvecs']} products in {s['wall_seconds']:.1f} s")
    for name, o in s["observables"].items():
        e, v = o["equilibrium"], o["temporal_variance"]
        print(f"  {name:18s} late-window mean {fmt_error(e['mean'], e['stderr'])} (spread {fmt(e['spread'], digits=2)}); "
              f"σ² {fmt_error(v['mean'], v['stderr'])}")
    print(f"  results: {result.folder}/ (realization-*/, results.h5, summary.json, report.html)")


def _print_relax_summary(result) -> None:
    """The run in a few lines: what was run, then the headline (the same lines as report.html's answer)."""
    s = result.summary
    print(f"{s['title']}")
    print(f"  L = {s['sites']}, {basis_text(s['basis'])}; "
          f"{s['method']} (tolerance {s['tolerance']:g}); initial energy {fmt(s['initial_energy'], ENERGY_ACCURACY, digits=6)}")
    print("\n".join(headline_text(relax_headline(s))))
    print(f"  results: {result.folder}/ (results.h5, summary.json, report.html)")
