#!/usr/bin/env python3
"""Set up largeq in a local virtual environment and run the demo or the test suite.

    python3 bootstrap.py demo    # built-in example: Neel quench of a J1-J2 ring, report in runs/demo/
    python3 bootstrap.py test    # the default test suite (slow checks are skipped; add -m slow for them)

Needs only Python >= 3.11 with the standard venv module; everything else comes from PyPI.
"""

from __future__ import annotations

import hashlib
import subprocess
import sys
import venv
from pathlib import Path

ROOT = Path(__file__).resolve().parent
ENV = ROOT / ".venv"
BIN = ENV / ("Scripts" if sys.platform == "win32" else "bin")
PY = BIN / ("python.exe" if sys.platform == "win32" else "python")


def ensure_environment() -> None:
    """Create .venv and install largeq with its test extras (skipped when pyproject.toml is unchanged)."""
    if sys.version_info < (3, 11):
        sys.exit(f"largeq needs Python >= 3.11; this is {sys.version.split()[0]}")
    stamp = ENV / ".largeq-installed"
    digest = hashlib.sha256((ROOT / "pyproject.toml").read_bytes()).hexdigest()
    if stamp.exists() and stamp.read_text() == digest and PY.exists():
        return
    if not PY.exists():
        print(f"creating virtual environment in {ENV}", flush=True)
        venv.create(ENV, with_pip=True)
    print("installing largeq and its dependencies (first time: a minute or two)", flush=True)
    subprocess.run([str(PY), "-m", "pip", "install", "--quiet", "--upgrade", "pip"], check=True)
    subprocess.run([str(PY), "-m", "pip", "install", "--quiet", "-e", f"{ROOT}[test]"], check=True)
    stamp.write_text(digest)


def main(argv: list[str]) -> int:
    if not argv or argv[0] not in ("demo", "test"):
        print(__doc__)
        return 2
    ensure_environment()
    if argv[0] == "demo":
        out = ROOT / "runs" / "demo"
        cmd = [str(PY), "-m", "largeq", "relax", "neel_j1j2", "--out", str(out)]
        if (out / "checkpoint.h5").exists():
            cmd = [str(PY), "-m", "largeq", "relax", "--resume", str(out)]
        rc = subprocess.run(cmd + argv[1:], cwd=ROOT).returncode
        if rc == 0:
            print(f"open {out / 'report.html'} to see the plots and numbers")
        return rc
    rc = subprocess.run([str(PY), "-m", "pytest", "-q", *argv[1:]], cwd=ROOT).returncode
    if rc == 5:
        print("pytest collected no tests: treating this as a failure", file=sys.stderr)
        return 1
    return rc


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
