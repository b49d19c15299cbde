"""``largeq forecast``: sectors, memory and predicted wall time of a bigger run, before paying for it."""

from __future__ import annotations

from largeq.cli.common import (UsageError, add_overwrite_argument, add_scenario_arguments, refuse_finished_folder,
                               resolve_scenario)
from largeq.reports.store import atomic_write_text, make_run_folder, write_summary
from largeq.workflows.forecast import forecast, format_forecast


def add_parser(subparsers) -> None:
    p = subparsers.add_parser("forecast", help="sectors, memory and predicted wall time of a scenario at a target length")
    add_scenario_arguments(p)
    p.add_argument("--from-sweep", default=None, metavar="FOLDER", help="predict d_eff and sigma_A from a sweep's fits")
    p.add_argument("--out", default=None, metavar="FOLDER", help="run folder (default: runs/forecast-<timestamp>)")
    add_overwrite_argument(p)
    p.add_argument("--block", type=int, default=None, metavar="K", help="output times per Chebyshev expansion")
    p.add_argument("--no-calibration", action="store_true", help="skip the timing measurement (memory only)")
    p.set_defaults(func=run)


def run(args) -> int:

    if args.sites is None:
        raise UsageError("forecast needs --sites L (the target chain length)")
    refuse_finished_folder(args.out, args.overwrite, marker="forecast.json")
    scenario = resolve_scenario(args.scenario, args.sites)
    f = forecast(scenario, from_sweep=args.from_sweep, calibrate_here=not args.no_calibration, block=args.block)
    text = format_forecast(f)
    print(text)
    out = make_run_folder(args.out, "forecast")
    write_summary(out / "forecast.json", f)
    atomic_write_text(out / "forecast.txt", text + "\n")
    print(f"  saved: {out}/forecast.json, forecast.txt")
    return 0
