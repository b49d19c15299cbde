"""``largeq thermal``: run folders, beta grid extension, and the typicality estimates against exact
dense thermal averages in the same magnetization sector.

References
----------
* Thermal pure quantum states e^{-beta H/2}|r>: S. Sugiura & A. Shimizu, PRL 108, 240401 (2012);
  PRL 111, 010401 (2013).
* Chebyshev filters / KPM for the microcanonical window: A. Weisse, G. Wellein, A. Alvermann,
  H. Fehske, Rev. Mod. Phys. 78, 275 (2006).
* Outside reference: numpy.linalg.eigh of the dense sector matrix; canonical averages
  sum_m A_mm e^{-beta E_m} / sum_m e^{-beta E_m} and Gaussian-window averages computed from it.
* Neel state in the J1-J2 XXZ ring: <H> = L(-J1 Delta1 + J2 Delta2)/4 (derived, DESIGN.md section 5).
"""

import json

import h5py
import numpy as np
import pytest
import scipy.optimize

from largeq import cli
from largeq.operators.problem import build_problem
from largeq.workflows.planning import MemoryRefusal
from largeq.reports.store import read_results
from largeq.scenario.spec import parse_scenario
from largeq.workflows.thermal import ThermalOptions, default_beta_grid, run_thermal


def ring(L=10):
    return parse_scenario({
        "title": "thermal test ring",
        "chain": {"sites": L, "boundary": "periodic"},
        "model": {"preset": "j1j2_ring", "j1": 1.0, "j2": 0.3, "delta1": 1.0, "delta2": 1.0},
        "start": {"state": "neel"},
        "observe": [
            {"name": "zz_nn", "kind": "zz", "distance": 1, "site": "average"},
            {"name": "bond", "kind": "bond", "sites": [0, 1]},
            {"name": "stag", "kind": "sum", "axis": "z", "signs": "staggered", "normalize": True},
        ],
        "time": {"t_max": 1.0, "points": 11},
    })


def test_command_writes_a_complete_run_folder(tmp_path, capsys):
    out = tmp_path / "run"
    rc = cli.main(["thermal", "neel_j1j2", "--sites", "10", "--out", str(out), "--vectors", "4",
                   "--window", "0.3", "--seed", "2", "--no-progress"])
    assert rc == 0
    for name in ("results.h5", "summary.json", "thermal.png", "report.html", "scenario.toml"):
        assert (out / name).stat().st_size > 0, name
    s = json.loads((out / "summary.json").read_text())
    assert s["state_energy"] == pytest.approx(10 * (-1.0 + 0.3) / 4, abs=1e-12)  # Neel formula
    assert s["canonical_energy_at_beta"] == pytest.approx(s["state_energy"], abs=1e-6)
    assert s["beta"] > 0 and s["beta_err"] > 0 and s["temperature"] == pytest.approx(1 / s["beta"])
    assert s["microcanonical_window"]["width"] == 0.3
    assert "magnetization sector n_up = 5" in s["ensemble_note"] and "never leave" in s["ensemble_note"]
    scen = cli.resolve_scenario("neel_j1j2", 10)
    assert set(s["observables"]) == {o.name for o in scen.observables}
    for o in s["observables"].values():
        for key in ("canonical", "canonical_err", "microcanonical", "microcanonical_err", "infinite_temperature"):
            assert np.isfinite(o[key]), key
        assert o["canonical_err"] >= o["canonical_err_statistical"]
        assert -1.0 - 1e-9 <= o["canonical"] <= 1.0 + 1e-9  # Pauli observables, ||A|| <= 1 here
    tree, attrs = read_results(out / "results.h5")
    assert attrs["seeds"]["random_vectors"] == 2 and "Sugiura" in attrs["methods"]["canonical"]
    assert "j1j2_ring" in attrs["scenario_toml"] and "units" in attrs["conventions"]
    with h5py.File(out / "results.h5") as fh:
        assert fh["canonical/betas"].attrs["units"] == "1/J"
        assert fh["canonical/energy"].attrs["units"] == "J"
    e = np.asarray(tree["canonical"]["energy"].value)
    assert np.all(np.diff(e) < 0)  # <H>_beta decreases with beta (d<H>/dbeta = -Var <= 0)
    assert "canonical" in capsys.readouterr().out


def test_grid_is_extended_until_it_covers_the_state_energy(tmp_path):
    run = run_thermal(ring(8), tmp_path / "r", ThermalOptions(vectors=3, betas=(0.0, 0.05), seed=4, progress=False))
    s = run.summary
    assert s["beta_grid"]["extensions"] >= 1 and s["beta_grid"]["max"] > s["beta"] > 0.05
    assert s["canonical_energy_at_beta"] == pytest.approx(s["state_energy"], abs=1e-6)


def test_default_grid_brackets_the_high_temperature_guess():
    # <H>_beta ~ E0 - beta sigma0^2 at high temperature: the guess is (E0 - E)/sigma0^2
    g = default_beta_grid(-2.0, 0.0, 4.0)
    assert g.min() == 0.0 and g.max() >= 2 * 0.5 and 0.0 in g
    g = default_beta_grid(1.0, 0.0, 1.0)  # above the infinite-temperature energy: negative betas
    assert g.min() <= -2.0 and g.max() >= 0.0


def test_options_and_memory_are_checked_first(tmp_path, capsys):
    with pytest.raises(MemoryRefusal):
        run_thermal(ring(8), tmp_path / "never", ThermalOptions(vectors=2, seed=0, memory_available=10_000))
    assert not (tmp_path / "never").exists()
    rc = cli.main(["thermal", "neel_j1j2", "--sites", "8", "--window", "-1", "--out", str(tmp_path / "x")])
    assert rc == 2 and "window" in capsys.readouterr().err


@pytest.fixture(scope="module")
def l12(tmp_path_factory):
    """L = 12 ring, zero-magnetization sector (D = 924): dense eigen-decomposition and a thermal run."""
    scen = ring(12)
    problem = build_problem(scen)
    w, V = np.linalg.eigh(problem.operator.to_dense())  # outside reference: LAPACK
    diag = {n: np.real((V.conj() * (problem.observable_operator(n).to_dense() @ V)).sum(axis=0))
            for n in problem.observables}  # A_mm = <m|A|m>
    run = run_thermal(scen, tmp_path_factory.mktemp("th12"), ThermalOptions(vectors=8, seed=17, window=0.25,
                                                                           progress=False))
    tree, attrs = read_results(run.folder / "results.h5")
    return problem, w, diag, run, tree


def _canonical(w, a, beta):
    x = -beta * (w - w.min())
    p = np.exp(x - x.max())
    return float((p * a).sum() / p.sum())


def test_canonical_energy_matches_exact_sector_averages(l12):
    # Sugiura & Shimizu (2012): TPQ averages equal Tr(A e^{-beta H})/Z up to errors ~ 1/sqrt(R D_eff)
    problem, w, diag, run, tree = l12
    betas = np.asarray(tree["canonical"]["betas"].value)
    e = np.asarray(tree["canonical"]["energy"].value)
    err = np.asarray(tree["canonical"]["energy_err"].value)
    picks = [k for k in range(betas.size) if betas[k] in (betas[0], betas[betas.size // 3],
                                                          betas[2 * betas.size // 3], betas[-1])]
    assert len(picks) == 4 and betas[-1] > 0.5
    for k in picks:
        exact = _canonical(w, w, betas[k])
        assert abs(e[k] - exact) < 4 * err[k] + 1e-9, (betas[k], e[k], exact, err[k])
    assert np.all(err > 0) and np.all(err < 0.1 * np.abs(w).max())


def test_matched_beta_and_observables_match_exact_thermal_values(l12):
    problem, w, diag, run, tree = l12
    s = run.summary
    E = s["state_energy"]
    beta_exact = scipy.optimize.brentq(lambda b: _canonical(w, w, b) - E, 0.0, 20.0)
    assert abs(s["beta"] - beta_exact) < 4 * s["beta_err"] + 1e-6
    for n, o in s["observables"].items():
        exact = _canonical(w, diag[n], beta_exact)
        assert abs(o["canonical"] - exact) < 4 * o["canonical_err"] + 1e-9, (n, o, exact)
        # microcanonical: Gaussian eigenstate weights exp(-(E_m - E)^2 / (2 sigma^2)), same sector
        sigma = s["microcanonical_window"]["width"]
        wt = np.exp(-((w - E) ** 2) / (2 * sigma**2))
        micro = float((wt * diag[n]).sum() / wt.sum())
        assert abs(o["microcanonical"] - micro) < 4 * o["microcanonical_err"] + 1e-9, (n, o, micro)
    wt = np.exp(-((w - E) ** 2) / (2 * s["microcanonical_window"]["width"] ** 2))
    assert s["microcanonical_window"]["states_in_window"] == pytest.approx(wt.sum(), rel=0.3)
