"""Tests of the ``largeq crosscheck`` command and its helpers."""

from __future__ import annotations

import json

import h5py
import numpy as np

from largeq.cli import main
from largeq.workflows.crosscheck import format_table, ks_distances


def test_crosscheck_writes_a_complete_run_folder(tmp_path, capsys):
    out = tmp_path / "cc"
    rc = main(["crosscheck", "neel_j1j2", "--sizes", "8", "--out", str(out), "--moments", "64",
               "--vectors", "4", "--seed", "3", "--no-progress"])
    assert rc == 0
    for name in ("results.h5", "summary.json", "crosscheck.png", "report.html", "scenario.toml"):
        assert (out / name).is_file() and (out / name).stat().st_size > 0, name
    s = json.loads((out / "summary.json").read_text())
    assert s["complete"] and s["options"]["n_moments"] == 64
    row = s["sizes"][0]
    assert row["status"] == "ok" and row["sites"] == 8
    assert row["d_eff_exact"] >= 1 and row["d_eff_kpm"] > 0 and "chaotic" in row["assumption"]
    for o in row["observables"].values():
        assert o["bound_holds"]  # Reimann, PRL 101, 190403 (2008)
    with h5py.File(out / "results.h5") as f:
        assert "L8" in f and "ldos_kpm" in f["L8"] and "scenario_toml" in f.attrs
    text = capsys.readouterr().out
    assert "d_eff (raw KPM formula)" in text and "N(0)" in text and "<r>" in text


def test_crosscheck_skips_sizes_beyond_the_dense_limit(tmp_path, capsys):
    rc = main(["crosscheck", "neel_j1j2", "--sizes", "8", "--max-dim", "3", "--out", str(tmp_path / "x"),
               "--no-progress"])
    assert rc == 2  # no size fitted: a usage error, not a traceback
    assert "skipped" in capsys.readouterr().out


def test_ks_distance_of_exact_moments_is_zero_and_of_a_shift_is_not():
    """KPM counting function rebuilt from exact moments equals the damped exact one (Weisse et al.,
    Rev. Mod. Phys. 78, 275 (2006)); shifting the levels makes the step-function distance large."""
    from types import SimpleNamespace

    from largeq.engines.kpm import jackson_kernel, reconstruct_cumulative

    rng = np.random.default_rng(0)
    e = np.sort(rng.normal(0, 1, 400))
    w = np.full(e.size, 1 / e.size)
    a, b, N = 5.0, 0.0, 128
    x = e / a
    mu = np.cos(np.outer(np.arange(N), np.arccos(x))) @ w
    g = jackson_kernel(N)
    xs, cum = reconstruct_cumulative(mu * g, 2 * N)
    dens = SimpleNamespace(scale=a, shift=b, n_moments=N, energies=a * xs + b)
    ks, ks_damped = ks_distances(a * xs + b, cum, e, w, dens)
    assert ks_damped < 1e-10
    assert ks < 0.1
    ks2, _ = ks_distances(a * xs + b, cum, e + 1.0, w, dens)
    assert ks2 > 0.3


def test_format_table_of_a_skipped_size():
    assert "skipped" in format_table({"sites": 30, "status": "skipped", "reason": "too big"})
