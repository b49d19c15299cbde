"""A plain ``pip install .`` runs every command: every third-party module the package imports is a
declared dependency (jax alone stays an optional extra)."""

from __future__ import annotations

import ast
import importlib.metadata as md
import os
import re
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "largeq"
#: modules imported only behind an optional backend (installed with the extra of the same name)
OPTIONAL = {"jax": "jax"}


def third_party_imports() -> dict[str, set[str]]:
    """top-level module name -> the largeq files importing it (every import, also inside functions)."""
    found: dict[str, set[str]] = {}
    for path in PACKAGE.rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(), str(path))):
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and not node.level and node.module:
                names = [node.module]
            else:
                continue
            for name in names:
                top = name.split(".")[0]
                if top == "largeq" or top in sys.stdlib_module_names:
                    continue
                found.setdefault(top, set()).add(str(path.relative_to(ROOT)))
    return found


def _requirement_name(req: str) -> str:
    return re.split(r"[\s\[<>=!~;]", req, maxsplit=1)[0].lower().replace("_", "-")


def declared() -> tuple[set[str], dict[str, set[str]]]:
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    deps = {_requirement_name(r) for r in project["dependencies"]}
    extras = {k: {_requirement_name(r) for r in v} for k, v in project.get("optional-dependencies", {}).items()}
    return deps, extras


def test_every_import_is_a_dependency():
    deps, extras = declared()
    dists = md.packages_distributions()
    missing = []
    for module, files in sorted(third_party_imports().items()):
        names = {d.lower().replace("_", "-") for d in dists.get(module, [module])}
        if module in OPTIONAL:
            assert names & extras.get(OPTIONAL[module], set()), f"{module} is not in the '{OPTIONAL[module]}' extra"
            continue
        if not names & deps:
            missing.append(f"{module} (distribution {sorted(names)}; imported in {sorted(files)[:3]})")
    assert not missing, "imported but not in [project] dependencies: " + "; ".join(missing)


def test_the_scan_sees_the_runtime_imports():
    # the check above is only as good as the scan: the modules every command needs must be found
    found = third_party_imports()
    for module in ("numpy", "scipy", "numba", "h5py", "tomli_w", "dask", "threadpoolctl"):
        assert module in found, module


def test_dask_extra_declared_for_distributed():
    # the default sweep mode needs dask.distributed, which the bare 'dask' distribution does not bring
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    assert any(r.replace(" ", "").startswith("dask[distributed]") for r in project["dependencies"])


@pytest.mark.slow
def test_fresh_virtual_environment_without_extras(tmp_path):
    """Build a fresh venv, ``pip install .`` without extras, run describe and a small relax (needs the
    package index; skipped when pip cannot reach it)."""
    import shutil

    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", str(venv)], check=True)
    py = venv / "bin" / "python"
    src = tmp_path / "src"  # a copy: the build writes egg-info next to the sources
    shutil.copytree(ROOT, src, ignore=shutil.ignore_patterns(".git", ".venv", "runs", "*.egg-info", "__pycache__"))
    res = subprocess.run([str(py), "-m", "pip", "install", "--quiet", str(src)], capture_output=True, text=True,
                         timeout=1800)
    if res.returncode != 0 and ("Could not find" in res.stderr or "connection" in res.stderr.lower()):
        pytest.skip("package index not reachable: " + res.stderr.strip().splitlines()[-1])
    assert res.returncode == 0, res.stderr
    env = dict(os.environ, PYTHONPATH="")
    out = tmp_path / "run"
    for cmd in (["describe", "xx_neel", "--sites", "8"],
                ["relax", "xx_neel", "--sites", "8", "--out", str(out), "--no-progress"]):
        r = subprocess.run([str(venv / "bin" / "largeq"), *cmd], capture_output=True, text=True, cwd=tmp_path,
                           env=env, timeout=600)
        assert r.returncode == 0, r.stderr
