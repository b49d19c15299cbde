"""Command line: ``largeq <command> ...`` (thin: parse, call the library, save, print)."""

from __future__ import annotations

import argparse
import importlib
import json
import sys
from importlib import resources
from pathlib import Path

from largeq import __version__

EXAMPLES_PACKAGE = "largeq.scenario.builtin"
#: modules that add their own sub-commands through ``register(subparsers)``
COMMAND_MODULES = ("largeq.workflows.spectra", "largeq.workflows.thermal", "largeq.workflows.crosscheck", "largeq.workflows.sweep")


class UsageError(Exception):
    """A problem with the command line itself (printed without a traceback)."""


def builtin_examples() -> dict[str, Path]:
    folder = resources.files(EXAMPLES_PACKAGE)
    return {p.name[:-5]: Path(str(p)) for p in folder.iterdir() if p.name.endswith(".toml")}


def resolve_scenario(arg: str, sites: int | None = None):
    """A scenario from a file path or the name of a built-in example, optionally resized to ``sites``."""
    from largeq.scenario.spec import load_scenario

    path = Path(arg)
    if not path.exists():
        examples = builtin_examples()
        name = arg[:-5] if arg.endswith(".toml") else arg
        if name not in examples:
            raise UsageError(f"scenario {arg!r}: no such file and no built-in example of that name; "
                             f"built-in examples: {', '.join(sorted(examples))}")
        path = examples[name]
    scenario = load_scenario(path)
    if sites is not None:
        scenario = scenario.with_length(sites)
    return scenario


# ---------------------------------------------------------------------------- commands
def cmd_examples(args) -> int:
    from largeq.scenario.spec import load_scenario

    for name, path in sorted(builtin_examples().items()):
        s = load_scenario(path)
        print(f"{name:24s} L = {s.n_sites:<3d} {s.title}")
    return 0


def cmd_describe(args) -> int:
    from largeq.workflows.describe import describe_scenario

    scenario = resolve_scenario(args.scenario, args.sites)
    info = describe_scenario(scenario)
    if args.json:
        print(json.dumps(info["data"], indent=2, default=str))
    else:
        print(info["text"])
    return 0


def cmd_relax(args) -> int:
    from largeq.workflows.relax import RelaxOptions, resume_relaxation, run_relaxation

    options = RelaxOptions(checkpoint_seconds=args.checkpoint_every, progress=args.progress, block=args.block,
                           equilibration=args.equilibration, seed=args.seed, symmetry=args.symmetry)
    if args.resume:
        if args.scenario:
            raise UsageError("relax --resume takes a run folder and no scenario")
        run = resume_relaxation(args.resume, options)
    else:
        if not args.scenario:
            raise UsageError("relax needs a scenario (a TOML file or a built-in example name) or --resume FOLDER")
        if args.realizations < 1:
            raise UsageError("--realizations must be >= 1")
        if args.realizations > 1:
            from largeq.workflows.disorder import run_disorder_relaxation

            run = run_disorder_relaxation(resolve_scenario(args.scenario, args.sites), args.realizations, args.out,
                                          options, echo=print)
            _print_disorder_summary(run)
            return 0
        run = run_relaxation(resolve_scenario(args.scenario, args.sites), args.out, options)
    _print_relax_summary(run)
    return 0


def _print_disorder_summary(run) -> None:
    s = run.summary
    print(f"{s['title']}")
    print(f"  L = {s['sites']}, {s['realizations']} disorder realisations (seeds derived from {s['base_seed']}); "
          f"{s['matvecs']} products in {s['wall_seconds']:.1f} s")
    for name, o in s["observables"].items():
        e, v = o["equilibrium"], o["temporal_variance"]
        print(f"  {name:18s} equilibrium {e['mean']:+.5f} +- {e['stderr']:.1e} (spread {e['spread']:.2e})   "
              f"sigma^2 {v['mean']:.2e} +- {v['stderr']:.1e}")
    print(f"  results: {run.folder}/ (realization-*/, results.h5, summary.json, report.html)")


def _print_relax_summary(run) -> None:
    s = run.summary
    print(f"{s['title']}")
    b = s["basis"]
    where = (f"{b['kind']} basis, dimension {b['dimension']:,}" if b["kind"] != "symmetry-sector" else
             f"{b['sector_count']} symmetry sector(s) of dimensions "
             f"{' + '.join(f'{d:,}' for d in b['sector_dimensions'][:8])}{' + ...' if b['sector_count'] > 8 else ''}"
             f" = {b['dimension']:,} (instead of {b['replaces']['kind']} dimension {b['replaces']['dimension']:,})")
    print(f"  L = {s['sites']}, {where}; "
          f"{s['method']} (tolerance {s['tolerance']:g}); {s['matvecs']} products in {s['wall_seconds']:.1f} s")
    print(f"  initial energy {s['initial_energy']:.6g}; energy drift {s['energy_drift']:.2g}; norm drift {s['norm_drift']:.2g}")
    eq = s.get("equilibration", {})
    if eq.get("d_eff") is not None:
        lo, hi = eq["d_eff_range"]
        rng = "" if lo == hi else f" [{lo:.3g}, {hi:.3g}]"
        print(f"  effective dimension d_eff = {eq['d_eff']:.4g}{rng} ({eq['method']})")
    elif eq.get("note"):
        print(f"  effective dimension: {eq['note']}")
    for name, o in s["observables"].items():
        state = "settled" if o["settled"] else "NOT settled"
        print(f"  {name:18s} equilibrium {o['equilibrium']:+.5f} +- {o['equilibrium_err']:.1e}   "
              f"sigma^2 {o['temporal_variance']:.2e}   t_relax {o['relaxation_time']:.3g}   ({state})")
        extra = []
        if "diagonal_ensemble" in o:
            extra.append(f"diagonal ensemble {o['diagonal_ensemble']:+.5f}")
        if o.get("bound") is not None:
            extra.append(f"bound on sigma^2 {o['bound']:.3g}")
        if o.get("canonical") is not None:
            extra.append(f"canonical {o['canonical']:+.5f}")
        if o.get("microcanonical") is not None:
            extra.append(f"microcanonical {o['microcanonical']:+.5f}")
        if extra:
            print("      " + "; ".join(extra))
    print(f"  results: {run.folder}/ (results.h5, summary.json, report.html)")


def add_scenario_arguments(p, *, scenario_optional=False):
    p.add_argument("scenario", nargs="?" if scenario_optional else None,
                   help="scenario TOML file, or the name of a built-in example (see 'largeq examples')")
    p.add_argument("--sites", type=int, default=None, metavar="L",
                   help="run the scenario at another chain length L (patterns are rescaled)")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="largeq",
        description="Relaxation of isolated spin-1/2 chains after a quench, past the exact-diagonalization wall.",
    )
    parser.add_argument("--version", action="version", version=f"largeq {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    p = sub.add_parser("examples", help="list the built-in example scenarios")
    p.set_defaults(func=cmd_examples)

    p = sub.add_parser("describe", help="print a scenario's model, basis, dimension and memory needs (nothing is run)")
    add_scenario_arguments(p)
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    p.set_defaults(func=cmd_describe)

    p = sub.add_parser("relax", help="main job: relaxation curves, equilibrium values, fluctuations, saved as a run folder")
    add_scenario_arguments(p, scenario_optional=True)
    p.add_argument("--out", default=None, metavar="FOLDER", help="run folder (default: runs/relax-<timestamp>)")
    p.add_argument("--resume", default=None, metavar="FOLDER", help="continue an interrupted run from its checkpoint")
    p.add_argument("--checkpoint-every", type=float, default=None, metavar="SECONDS",
                   help="checkpoint interval (default: the scenario's numerics.checkpoint_seconds)")
    p.add_argument("--block", type=int, default=None, metavar="K",
                   help="output times sharing one Chebyshev expansion (default: chosen from free memory)")
    p.add_argument("--equilibration", choices=("auto", "exact", "estimate", "off"), default="auto",
                   help="effective dimension, fluctuation bound and thermal values: exact diagonalization where it "
                        "fits, KPM/typical-state estimates up to dimension 300,000, skipped beyond (auto)")
    p.add_argument("--seed", type=int, default=20261201, help="seed of the estimators' random vectors (recorded)")
    p.add_argument("--symmetry", choices=("auto", "off"), default="auto",
                   help="evolve in momentum/reflection/spin-flip sectors when the model, the start and the "
                        "observables allow it (auto), or always in the magnetization sector (off)")
    p.add_argument("--realizations", type=int, default=1, metavar="N",
                   help="disorder realisations (random fields only): one sub-folder each plus their average")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--progress", dest="progress", action="store_true", default=None, help="always show a progress bar")
    g.add_argument("--no-progress", dest="progress", action="store_false", help="never show a progress bar")
    p.set_defaults(func=cmd_relax)
    for name in COMMAND_MODULES:
        try:
            module = importlib.import_module(name)
        except ModuleNotFoundError as exc:
            if exc.name == name:
                continue  # that command is not part of this version
            raise
        module.register(sub)
    return parser


def main(argv=None) -> int:
    from largeq.workflows.planning import MemoryRefusal
    from largeq.reports.checkpoint import CheckpointError
    from largeq.scenario.spec import ScenarioError

    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except (ScenarioError, UsageError, MemoryRefusal, CheckpointError, FileExistsError, FileNotFoundError) as exc:
        print(f"largeq {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"largeq {args.command}: interrupted; a run with checkpoints can be continued with --resume",
              file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
