"""What every command shares: the usage error, the scenario arguments and the progress switch."""

from __future__ import annotations

from largeq.scenario import resolve_scenario

__all__ = ["UsageError", "add_scenario_arguments", "add_progress_arguments", "resolve_scenario"]


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
