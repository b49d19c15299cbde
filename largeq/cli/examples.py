"""``largeq examples``: the built-in example scenarios."""

from __future__ import annotations

from largeq.scenario import builtin_examples, load_scenario


def add_parser(sub) -> None:
    p = sub.add_parser("examples", help="list the built-in example scenarios")
    p.set_defaults(func=run)


def run(args) -> int:
    for name, path in sorted(builtin_examples().items()):
        s = load_scenario(path)
        print(f"{name:24s} L = {s.n_sites:<3d} {s.title}")
    return 0
