"""The built-in example scenarios shipped inside the package (``largeq/scenario/builtin/*.toml``)."""

from __future__ import annotations

from importlib import resources
from pathlib import Path

from largeq.scenario.spec import Scenario, ScenarioError, load_scenario

__all__ = ["EXAMPLES_PACKAGE", "ScenarioNotFound", "builtin_examples", "resolve_scenario", "examples_markdown"]

EXAMPLES_PACKAGE = "largeq.scenario.builtin"


class ScenarioNotFound(ScenarioError):
    """Neither a file nor a built-in example of that name (a ScenarioError, printed in one line)."""

    def __init__(self, arg: str, names: list[str]):
        self.arg, self.names = arg, list(names)
        self.path, self.value, self.source = "SCENARIO", arg, "<command line>"
        self.allowed = "an existing TOML file or the name of a built-in example"
        ValueError.__init__(self, f"scenario {arg!r}: no such file and no built-in example of that name; "
                                  f"built-in examples: {', '.join(self.names)}")

    def __reduce__(self):
        return (type(self), (self.arg, self.names))


def builtin_examples() -> dict[str, Path]:
    """Name -> path of every built-in example scenario."""
    folder = resources.files(EXAMPLES_PACKAGE)
    return {p.name[:-5]: Path(str(p)) for p in folder.iterdir() if p.name.endswith(".toml")}


def resolve_scenario(arg: str, sites: int | None = None) -> Scenario:
    """A scenario from a file path or the name of a built-in example, optionally resized to ``sites``.

    Raises ScenarioError (a ValueError) naming the built-in examples when ``arg`` is neither.
    """
    path = Path(arg)
    if not path.exists():
        examples = builtin_examples()
        name = arg[:-5] if arg.endswith(".toml") else arg
        if name not in examples:
            raise ScenarioNotFound(arg, sorted(examples))
        path = examples[name]
    scenario = load_scenario(path)
    if sites is not None:
        scenario = scenario.with_length(sites)
    return scenario


def examples_markdown() -> str:
    """The built-in examples as a Markdown table (name, L, title): the list in README.md is this text."""
    lines = ["| name | L | what it runs |", "| --- | --- | --- |"]
    for name, path in sorted(builtin_examples().items()):
        s = load_scenario(path)
        lines.append(f"| `{name}` | {s.n_sites} | {s.title} |")
    return "\n".join(lines) + "\n"
