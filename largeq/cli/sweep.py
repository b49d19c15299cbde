"""``largeq sweep``: a scenario over several chain lengths, fitted and extrapolated (Dask tasks)."""

from __future__ import annotations

from largeq.cli.common import add_window_argument, UsageError, check_seed, resolve_scenario
from largeq.workflows.sweep import SweepOptions, format_table, run_sweep
from largeq.constants import MAX_DENSE_DIM, SWEEP_SEED


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("sweep", help="run a scenario over several chain lengths (Dask tasks), fit and extrapolate")
    p.add_argument("scenario", help="scenario TOML file, or the name of a built-in example")
    p.add_argument("--sizes", type=int, nargs="+", required=True, metavar="L", help="chain lengths")
    p.add_argument("--out", default=None, metavar="FOLDER", help="run folder (default: runs/sweep-<timestamp>); "
                   "rerunning into the same folder skips sizes already done")
    p.add_argument("--target", type=int, default=None, metavar="L", help="chain length to extrapolate to")
    p.add_argument("--realizations", type=int, default=1, metavar="N", help="disorder realizations per size")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--workers", type=int, default=None, metavar="N", help="workers of the embedded local cluster")
    g.add_argument("--scheduler", default=None, metavar="ADDRESS", help="connect to a running Dask scheduler")
    g.add_argument("--serial", action="store_true", help="run every task in this process, one after another")
    p.add_argument("--max-dim", type=int, default=MAX_DENSE_DIM, metavar="D",
                   help=f"largest dense diagonalization (default {MAX_DENSE_DIM})")
    p.add_argument("--moments", type=int, default=256, metavar="N", help="KPM moments of the d_eff estimate")
    p.add_argument("--vectors", type=int, default=20, metavar="R", help="random vectors of the d_eff estimate")
    p.add_argument("--no-thermal", action="store_true", help="skip canonical and microcanonical values")
    p.add_argument("--kpm-everywhere", action="store_true", help="also estimate d_eff by KPM where it is exact")
    p.add_argument("--seed", type=int, default=SWEEP_SEED, metavar="S", help="seed of the random vectors")
    add_window_argument(p)
    p.set_defaults(func=run)


def run(args) -> int:
    check_seed(args.seed)
    if args.moments < 16:
        raise UsageError(f"--moments: got {args.moments}; allowed: an integer >= 16")
    if args.vectors < 1:
        raise UsageError(f"--vectors: got {args.vectors}; allowed: an integer >= 1")
    if args.max_dim < 1:
        raise UsageError(f"--max-dim: got {args.max_dim}; allowed: an integer >= 1")
    if args.realizations < 1:
        raise UsageError("--realizations must be >= 1")
    if args.workers is not None and args.workers < 1:
        raise UsageError("--workers must be >= 1")
    scenario = resolve_scenario(args.scenario)
    opts = SweepOptions(target=args.target, realizations=args.realizations, max_dim=args.max_dim,
                        n_moments=args.moments, n_vectors=args.vectors, thermal=not args.no_thermal,
                        seed=args.seed, kpm_everywhere=args.kpm_everywhere, window_start=args.window_start)
    mode = "serial" if args.serial else ("scheduler" if args.scheduler else "local")
    print(f"{scenario.title}: sweep over L = {' '.join(map(str, sorted(set(args.sizes))))} ({mode})")
    folder, summary = run_sweep(scenario, args.sizes, args.out, opts, mode=mode, workers=args.workers,
                                scheduler=args.scheduler)
    names = [o.name for o in scenario.observables]
    print(format_table(summary["table"], names))
    for key, t in summary["fits"]["trends"].items():
        print(f"  {key}: {t['form']}: {t['rate_name']} = {t['rate']:.4g} +- {t['rate_err']:.2g}")
        for where, e in summary["fits"]["extrapolations"].get(key, {}).items():
            print(f"      L = {where}: {e['value']:.4g}  (1-sigma band {e['low']:.4g} .. {e['high']:.4g})")
    for n in summary["fits"]["notes"]:
        print(f"  note: {n}")
    print(f"  results: {folder}/ (table.csv, results.h5, summary.json, report.html)")
    return 0
