"""What every command shares: the usage error, the scenario arguments and the progress switch."""

from __future__ import annotations

from pathlib import Path

from largeq.scenario import resolve_scenario

__all__ = ["UsageError", "add_scenario_arguments", "add_progress_arguments", "resolve_scenario",
           "add_overwrite_argument", "refuse_finished_folder", "check_seed"]


class UsageError(Exception):
    """A problem with the command line itself (printed in one line, exit status 2)."""


def add_scenario_arguments(p, *, scenario_optional: bool = False) -> None:
    """The positional SCENARIO and ``--sites L``."""
    p.add_argument("scenario", nargs="?" if scenario_optional else None,
                   help="scenario TOML file, or the name of a built-in example (see 'largeq examples')")
    p.add_argument("--sites", type=int, default=None, metavar="L",
                   help="run the scenario at another chain length L (patterns are rescaled)")


def add_progress_arguments(p) -> None:
    """``--progress`` / ``--no-progress`` (default: a bar when stderr is a terminal)."""
    g = p.add_mutually_exclusive_group()
    g.add_argument("--progress", dest="progress", action="store_true", default=None, help="always show a progress bar")
    g.add_argument("--no-progress", dest="progress", action="store_false", help="never show a progress bar")


def add_overwrite_argument(p) -> None:
    """``--overwrite``: allow ``--out`` onto a folder that holds a finished run."""
    p.add_argument("--overwrite", action="store_true", help="replace a finished run already in the --out folder")


def refuse_finished_folder(folder, overwrite: bool, marker: str = "summary.json") -> None:
    """UsageError when ``folder`` already holds finished results (``marker``) and ``overwrite`` is not set."""
    if folder is not None and not overwrite and (Path(folder) / marker).exists():
        raise UsageError(f"{folder} already holds a finished run ({marker}); choose another --out, or pass "
                         f"--overwrite to replace it")


def check_seed(seed) -> None:
    """UsageError for a seed numpy cannot take (negative)."""
    if seed is not None and seed < 0:
        raise UsageError(f"--seed: got {seed}; allowed: an integer >= 0")


def _window_start(text: str) -> float:
    import argparse
    import math

    try:
        value = float(text)
    except ValueError:
        value = float("nan")
    if not (math.isfinite(value) and value >= 0):
        raise argparse.ArgumentTypeError(f"got {text!r}; allowed: a time >= 0 below the scenario's t_max")
    return value


def add_window_argument(p) -> None:
    """``--window-start T``: where the late averaging window begins (overrides the scenario's time.window_start)."""
    p.add_argument("--window-start", type=_window_start, default=None, metavar="T",
                   help="start of the late averaging window (time units; default: the scenario's time.window_start, "
                        "else the last half of the run)")
