"""``largeq examples``: list the built-in example scenarios, print one, or copy one to a file."""

from __future__ import annotations

from pathlib import Path

from largeq.cli.common import UsageError
from largeq.scenario import builtin_examples, load_scenario


def add_parser(sub) -> None:
    p = sub.add_parser("examples", help="list the built-in example scenarios, print one (--show) or copy one (--copy)")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--show", metavar="NAME", default=None, help="print the scenario file of example NAME")
    g.add_argument("--copy", nargs=2, metavar=("NAME", "DEST"), default=None,
                   help="write example NAME to DEST (a file, or a folder to put NAME.toml in); never overwrites")
    p.set_defaults(func=run)


def _example(name: str) -> Path:
    examples = builtin_examples()
    key = name[:-5] if name.endswith(".toml") else name
    if key not in examples:
        raise UsageError(f"no built-in example {name!r}; built-in examples: {', '.join(sorted(examples))}")
    return examples[key]


def run(args) -> int:
    if args.show:
        print(_example(args.show).read_text(encoding="utf-8"), end="")
        return 0
    if args.copy:
        name, dest = args.copy
        src = _example(name)
        target = Path(dest)
        if target.is_dir():
            target = target / src.name
        if target.exists():
            raise UsageError(f"{target} exists; choose another name (nothing was overwritten)")
        target.write_text(src.read_text(encoding="utf-8"), encoding="utf-8")
        print(f"wrote {target}: run it with 'largeq relax {target}'")
        return 0
    examples = builtin_examples()
    for name, path in sorted(examples.items()):
        s = load_scenario(path)
        print(f"{name:24s} L = {s.n_sites:<3d} {s.title}")
    print("\nshow one with 'largeq examples --show NAME', copy it with 'largeq examples --copy NAME FILE'")
    return 0
