"""Command line: ``largeq <command> ...`` (argument parsing, printing and exit codes only).

Each command lives in its own module with ``add_parser(subparsers)`` and ``run(args) -> int``; the
work itself is a library function in :mod:`largeq.workflows`.
"""

from __future__ import annotations

import argparse
import sys

import importlib

from largeq import __version__
from largeq.cli.common import UsageError, resolve_scenario
from largeq.reports.checkpoint import CheckpointError
from largeq.scenario import ScenarioError
from largeq.workflows.errors import WorkflowError
from largeq.workflows.planning import MemoryRefusal

__all__ = ["main", "build_parser", "UsageError", "resolve_scenario"]

#: command modules (largeq.cli.<name>) in the order ``largeq --help`` lists them
COMMAND_NAMES = ("examples", "describe", "relax", "spectra", "thermal", "crosscheck", "sweep", "forecast")


def build_parser(only: str | None = None) -> argparse.ArgumentParser:
    """The parser of every command, or of the command ``only`` alone (its module is then the only one imported,
    so a quick command such as ``describe`` does not pay for the imports of the others)."""
    parser = argparse.ArgumentParser(
        prog="largeq",
        description="Relaxation of isolated spin-1/2 chains after a quench, past the exact-diagonalization wall.",
    )
    parser.add_argument("--version", action="version", version=f"largeq {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)
    for name in COMMAND_NAMES if only is None else (only,):
        importlib.import_module(f"largeq.cli.{name}").add_parser(sub)
    return parser


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    parser = build_parser(argv[0] if argv and argv[0] in COMMAND_NAMES else None)
    args = parser.parse_args(argv)
    try:
        return args.func(args)
    except (ScenarioError, WorkflowError, UsageError, MemoryRefusal, CheckpointError) as exc:
        print(f"largeq {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:
        if getattr(exc, "filename", None):  # unwritable or read-only folders, full disks: the path and the reason
            import os

            path = str(exc.filename)
            where = "" if os.path.isabs(path) else f" (in the working folder {os.getcwd()})"
            out = getattr(args, "out", None)
            folder = (out is not None and str(out).startswith(path)) or (out is None and path.startswith("runs"))
            hint = "; give a writable folder with --out" if folder and hasattr(args, "out") else ""
            print(f"largeq {args.command}: error: cannot use {path}{where}: {exc.strerror or exc}{hint}",
                  file=sys.stderr)
        else:  # a message of our own (e.g. a folder that is not a run folder)
            print(f"largeq {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"largeq {args.command}: interrupted; a run with checkpoints can be continued with --resume",
              file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
