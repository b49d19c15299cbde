"""``largeq thermal``: canonical and microcanonical values at the initial state's energy."""

from __future__ import annotations

from largeq.cli.common import (add_overwrite_argument, add_progress_arguments, add_scenario_arguments, check_seed,
                               refuse_finished_folder, resolve_scenario)
from largeq.workflows.thermal import ThermalOptions, run_thermal


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("thermal", help="canonical and microcanonical values at the initial state's energy "
                                              "(thermal pure quantum states); saved as a run folder")
    add_scenario_arguments(p)
    p.add_argument("--out", default=None, metavar="DIR", help="run folder (default: runs/thermal-<timestamp>)")
    add_overwrite_argument(p)
    p.add_argument("--vectors", type=int, default=ThermalOptions.vectors, metavar="R",
                   help=f"random vectors (default {ThermalOptions.vectors})")
    p.add_argument("--betas", type=float, nargs="+", default=None, metavar="BETA",
                   help="inverse temperatures of the grid (1/J; default: chosen to cover the state's energy; "
                        "extended when it does not)")
    p.add_argument("--window", type=float, default=None, metavar="W",
                   help="standard deviation of the microcanonical energy window (J; default 2%% of the spectral width)")
    p.add_argument("--seed", type=int, default=None, metavar="S", help="seed of the random vectors (default: drawn, "
                                                                       "and written to the outputs)")
    add_progress_arguments(p)
    p.set_defaults(func=run)


def run(args) -> int:
    check_seed(args.seed)
    refuse_finished_folder(args.out, args.overwrite)
    options = ThermalOptions(vectors=args.vectors, betas=tuple(args.betas) if args.betas else None,
                             window=args.window, seed=args.seed, progress=args.progress)
    result = run_thermal(resolve_scenario(args.scenario, args.sites), args.out, options)
    s = result.summary
    print(s["title"])
    print(f"  L = {s['sites']}, {s['basis']['kind']} basis, dimension {s['dimension']:,}; {s['vectors']} random "
          f"vectors (seed {s['seed']}); {s['wall_seconds']:.1f} s")
    print(f"  state energy {s['state_energy']:.6g}: beta* = {s['beta']:.5g} +- {s['beta_err']:.2g} "
          f"(T* = {s['temperature']:.5g}); microcanonical window sigma = {s['microcanonical_window']['width']:.3g}")
    for name, o in s["observables"].items():
        print(f"  {name:18s} canonical {o['canonical']:+.5f} +- {o['canonical_err']:.1e}   "
              f"microcanonical {o['microcanonical']:+.5f} +- {o['microcanonical_err']:.1e}")
    print(f"  {s['ensemble_note']}")
    print(f"  results: {result.folder}/ (results.h5, summary.json, thermal.png, report.html)")
    return 0
