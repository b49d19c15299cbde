"""``largeq crosscheck``: every estimator against exact diagonalization, size by size."""

from __future__ import annotations

from largeq.cli.common import (UsageError, add_overwrite_argument, add_progress_arguments, add_scenario_arguments,
                               add_window_argument,
                               check_seed, refuse_finished_folder, resolve_scenario)
from largeq.workflows.crosscheck import CrosscheckOptions, run_crosscheck
from largeq.constants import CROSSCHECK_SEED, MAX_DENSE_DIM


def run(args) -> int:
    check_seed(args.seed)
    if args.max_dim < 1:
        raise UsageError(f"--max-dim: got {args.max_dim}; allowed: an integer >= 1")
    refuse_finished_folder(args.out, args.overwrite)
    scenario = resolve_scenario(args.scenario, args.sites)
    sizes = args.sizes or [scenario.n_sites]
    try:
        options = CrosscheckOptions(args.moments, args.vectors, args.seed, args.max_dim, args.progress,
                                    window_start=args.window_start, dos_vectors=args.dos_vectors)
    except ValueError as exc:
        raise UsageError(str(exc)) from None
    folder, summary = run_crosscheck(scenario, sizes, args.out, options)
    if not any(r["status"] == "ok" for r in summary["sizes"]):
        raise UsageError("no size fitted the dense limit; choose smaller --sizes or raise --max-dim")
    print(f"results: {folder}/ (results.h5, summary.json, crosscheck.png, report.html)")
    return 0


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("crosscheck", help="check the d_eff, equilibrium, fluctuation and thermal estimators "
                                                 "against exact diagonalization at small sizes")
    add_scenario_arguments(p)
    p.add_argument("--sizes", type=int, nargs="+", default=None, metavar="L",
                   help="chain lengths to check (default: the scenario's)")
    p.add_argument("--out", default=None, metavar="FOLDER", help="run folder (default: runs/crosscheck-<timestamp>)")
    add_overwrite_argument(p)
    p.add_argument("--moments", type=int, default=256, metavar="N", help="KPM moments (default 256)")
    p.add_argument("--vectors", type=int, default=20, metavar="R",
                   help="random vectors for the DOS trace and thermal averages (default 20)")
    p.add_argument("--seed", type=int, default=CROSSCHECK_SEED, metavar="S", help="seed of all random draws")
    p.add_argument("--dos-vectors", type=int, default=None, metavar="R",
                   help="random vectors of the KPM density of states in the d_eff estimate (default: --vectors)")
    add_window_argument(p)
    p.add_argument("--max-dim", type=int, default=MAX_DENSE_DIM, metavar="D",
                   help=f"largest dense diagonalization (default {MAX_DENSE_DIM})")
    add_progress_arguments(p)
    p.set_defaults(func=run)
