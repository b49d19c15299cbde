"""``largeq describe``: model, basis, dimension and memory needs of a scenario (runs nothing)."""

from __future__ import annotations

import json

from largeq.cli.common import add_scenario_arguments, resolve_scenario
from largeq.workflows.describe import describe_scenario


def add_parser(sub) -> None:
    p = sub.add_parser("describe", help="print a scenario's model, basis, dimension and memory needs (nothing is run)")
    add_scenario_arguments(p)
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    p.set_defaults(func=run)


def run(args) -> int:
    info = describe_scenario(resolve_scenario(args.scenario, args.sites))
    if args.json:
        print(json.dumps(info["data"], indent=2, default=str))
    else:
        print(info["text"])
    return 0
