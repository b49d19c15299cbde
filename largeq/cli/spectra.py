"""``largeq spectra``: energy-weight distribution of the initial state and the density of states (KPM)."""

from __future__ import annotations

from largeq.cli.common import (UsageError, add_overwrite_argument, add_progress_arguments, add_scenario_arguments,
                               check_seed, refuse_finished_folder, resolve_scenario)
from largeq.workflows.spectra import KERNELS, SpectraOptions, resume_spectra, run_spectra


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("spectra", help="energy-weight distribution (LDOS) of the initial state and the "
                                              "density of states of its sector, by KPM; saved as a run folder")
    add_scenario_arguments(p, scenario_optional=True)
    p.add_argument("--out", default=None, metavar="DIR", help="run folder (default: runs/spectra-<timestamp>)")
    p.add_argument("--moments", type=int, default=SpectraOptions.moments, metavar="N",
                   help=f"Chebyshev moments (default {SpectraOptions.moments}); resolution ~ pi a / N")
    p.add_argument("--vectors", type=int, default=SpectraOptions.vectors, metavar="R",
                   help=f"random vectors of the DOS trace (default {SpectraOptions.vectors})")
    p.add_argument("--kernel", choices=KERNELS, default="jackson", help="damping kernel (default jackson)")
    p.add_argument("--seed", type=int, default=None, metavar="S", help="seed of the random vectors (default: drawn, "
                                                                       "and written to the outputs)")
    p.add_argument("--resume", default=None, metavar="DIR", help="continue an interrupted spectra run")
    add_overwrite_argument(p)
    add_progress_arguments(p)
    p.set_defaults(func=run)


def run(args) -> int:
    check_seed(args.seed)
    if not args.resume:
        refuse_finished_folder(args.out, args.overwrite)
    options = SpectraOptions(moments=args.moments, vectors=args.vectors, kernel=args.kernel, seed=args.seed,
                             progress=args.progress)
    if args.resume:
        if args.scenario:
            raise UsageError("spectra --resume takes a run folder and no scenario")
        result = resume_spectra(args.resume, options)
    else:
        if not args.scenario:
            raise UsageError("spectra needs a scenario (a TOML file or a built-in example name) or --resume DIR")
        result = run_spectra(resolve_scenario(args.scenario, args.sites), args.out, options)
    s = result.summary
    print(s["title"])
    print(f"  L = {s['sites']}, {s['basis']['kind']} basis, dimension {s['dimension']:,}; {s['kernel']} kernel, "
          f"{s['moments']} moments, {s['vectors']} random vectors (seed {s['seed']}); {s['wall_seconds']:.1f} s")
    print(f"  state energy {s['state_energy']:.6g} (moments: {s['state_energy_from_moments']:.6g}), "
          f"width {s['state_width']:.4g}; resolution {s['resolution_at_state']:.3g} at that energy")
    print(f"  DOS there {s['dos_at_state']:.4g} +- {s['dos_at_state_err']:.2g} per J; states below "
          f"{s['states_below_state_energy']:.5g} +- {s['states_below_state_energy_err']:.2g} "
          f"({100 * s['fraction_below_state_energy']:.3g} %)")
    for f in s["flags"]:
        print(f"  note: {f}")
    print(f"  {s['ensemble_note']}")
    print(f"  results: {result.folder}/ (results.h5, summary.json, spectra.png, report.html)")
    return 0
