"""The package's import graph: no cycles, and no import from a lower layer to a higher one.

Layers, lowest first (docs/architecture.md): constants -> scenario -> model -> basis -> operators ->
engines / backends -> analysis -> reports -> workflows -> cli.  A module may import modules of its own
layer or of lower layers only; every import counts, also those inside functions.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "largeq"
LAYERS = ["constants", "machine", "scenario", "model", "basis", "operators", "engines", "backends", "analysis", "reports",
          "workflows", "cli"]
#: layers that sit side by side (neither imports the other)
SAME_RANK = {"backends": "engines"}


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def import_graph() -> dict[str, set[str]]:
    """module -> the largeq modules it imports (relative imports resolved, submodule imports included)."""
    modules = {_module_name(p): p for p in PACKAGE.rglob("*.py")}
    graph: dict[str, set[str]] = {}
    for name, path in modules.items():
        is_pkg = path.name == "__init__.py"
        deps: set[str] = set()
        for node in ast.walk(ast.parse(path.read_text(), str(path))):
            if isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                if node.level:
                    base = name.split(".") if is_pkg else name.split(".")[:-1]
                    base = base[: len(base) - (node.level - 1)]
                    mod = ".".join(base + ([node.module] if node.module else []))
                else:
                    mod = node.module or ""
                targets = [mod] + [f"{mod}.{a.name}" for a in node.names]
            else:
                continue
            for t in targets:
                if t in modules and t != name:
                    deps.add(t)
        graph[name] = deps
    return graph


def layer_of(module: str) -> str:
    parts = module.split(".")
    if len(parts) == 1 or parts[1] == "__main__":
        return "top"
    return parts[1]


def rank(module: str) -> int:
    layer = layer_of(module)
    if layer == "top":  # largeq/__init__.py (version only) and __main__
        return -1 if module == "largeq" else len(LAYERS)
    layer = SAME_RANK.get(layer, layer)
    return LAYERS.index(layer)


def test_every_module_is_in_a_layer():
    unknown = sorted(m for m in import_graph() if layer_of(m) not in LAYERS and layer_of(m) != "top")
    assert not unknown, f"modules outside the agreed layers {LAYERS}: {unknown}"


def test_no_import_goes_up_a_layer():
    bad = [f"{m} ({layer_of(m)}) imports {d} ({layer_of(d)})" for m, deps in import_graph().items()
           for d in sorted(deps) if rank(d) > rank(m)]
    assert not bad, "imports from a lower layer to a higher one:\n" + "\n".join(bad)


def _cycles(graph):
    index, low, stack, on, out = {}, {}, [], set(), []

    def visit(v):
        index[v] = low[v] = len(index)
        stack.append(v)
        on.add(v)
        for w in graph.get(v, ()):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                out.append(sorted(comp))

    for v in graph:
        if v not in index:
            visit(v)
    return out


def test_no_import_cycles():
    graph = import_graph()
    # a package's __init__ re-exporting its own modules is not a cycle of the design: leave those edges out
    pruned = {m: {d for d in deps if not (m == d.rsplit(".", 1)[0] and m in graph)} for m, deps in graph.items()}
    cycles = _cycles(pruned)
    assert not cycles, f"import cycles: {cycles}"


def test_the_checker_sees_a_planted_violation():
    """The checks above can fail: a graph with an upward import and a cycle is caught."""
    graph = {"largeq.engines.a": {"largeq.cli.x"}, "largeq.cli.x": {"largeq.engines.a"}}
    assert _cycles(graph) == [["largeq.cli.x", "largeq.engines.a"]]
    assert rank("largeq.cli.x") > rank("largeq.engines.a")


#: layers that are one module, not a package
SINGLE_MODULE = {"constants", "machine"}


@pytest.mark.parametrize("layer", [x for x in LAYERS if x not in SINGLE_MODULE])
def test_layer_exists(layer):
    assert (PACKAGE / layer).is_dir(), f"largeq/{layer}/ is missing"
