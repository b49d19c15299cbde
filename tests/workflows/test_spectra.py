"""``largeq spectra``: run folders, resume, and the KPM densities against outside references.

References
----------
* Kernel polynomial method (moments, Jackson kernel, resolution ~ pi a / N, stochastic trace
  with error ~ 1/sqrt(R D)): A. Weisse, G. Wellein, A. Alvermann, H. Fehske,
  Rev. Mod. Phys. 78, 275 (2006).
* Outside reference for the spectrum: numpy.linalg.eigvalsh of the dense sector matrix
  (LAPACK), and dense matrix products for <H>, <H^2>.
* Neel state in the J1-J2 XXZ ring (S units): <H> = L(-J1 Delta1 + J2 Delta2)/4,
  <H^2> - <H>^2 = L J1^2 / 4 (derived by hand, DESIGN.md section 5).
"""

import json

import h5py
import numpy as np
import pytest

from largeq import cli
from largeq.operators.problem import build_problem
from largeq.workflows.planning import MemoryRefusal
from largeq.reports.checkpoint import CHECKPOINT_NAME, load_checkpoint
from largeq.reports.store import read_results
from largeq.scenario.spec import parse_scenario
from largeq.workflows.spectra import SpectraOptions, resume_spectra, run_spectra


def ring(L=10, j2=0.3, **over):
    base = {
        "title": "spectra test ring",
        "chain": {"sites": L, "boundary": "periodic"},
        "model": {"preset": "j1j2_ring", "j1": 1.0, "j2": j2, "delta1": 1.0, "delta2": 1.0},
        "start": {"state": "neel"},
        "observe": [{"name": "stag", "kind": "sum", "axis": "z", "signs": "staggered"}],
        "time": {"t_max": 1.0, "points": 11},
    }
    base.update(over)
    return parse_scenario(base)


FILES = ("results.h5", "summary.json", "spectra.png", "report.html", "scenario.toml")


def test_command_writes_a_complete_run_folder(tmp_path, capsys):
    out = tmp_path / "run"
    rc = cli.main(["spectra", "neel_j1j2", "--sites", "10", "--out", str(out), "--moments", "128",
                   "--vectors", "3", "--seed", "5", "--no-progress"])
    assert rc == 0
    for name in FILES:
        assert (out / name).stat().st_size > 0, name
    assert not (out / CHECKPOINT_NAME).exists()  # finished runs drop their checkpoint
    s = json.loads((out / "summary.json").read_text())
    L, D = 10, 252
    assert s["dimension"] == D and s["basis"]["up_spins"] == 5
    # Neel state in the J1-J2 ring (DESIGN.md section 5, derived): <H> = L(-J1 + J2)/4, Var = L/4
    assert s["state_energy"] == pytest.approx(L * (-1.0 + 0.3) / 4, abs=1e-12)
    assert s["state_width"] ** 2 == pytest.approx(L / 4, abs=1e-12)
    assert s["dos_total"] == pytest.approx(D, rel=1e-9)  # every random vector is scaled to ||r||^2 = D
    assert 0 < s["states_below_state_energy"] < D
    assert s["states_below_state_energy_err"] > 0 and s["dos_at_state_err"] > 0
    # Jackson width ~ (pi a / N) sqrt(1 - x^2) (Weisse et al. 2006): at most the band-centre value
    assert 0.3 * s["resolution_center"] < s["resolution_at_state"] <= 1.01 * s["resolution_center"]
    assert "magnetization sector n_up = 5" in s["ensemble_note"]
    tree, attrs = read_results(out / "results.h5")
    assert attrs["kpm"]["kernel"] == "jackson" and attrs["kpm"]["n_moments"] == 128
    assert attrs["seeds"]["random_vectors"] == 5
    assert "hbar = 1" in attrs["conventions"]["units"]
    assert "j1j2_ring" in attrs["scenario_toml"]
    assert set(attrs["timings"]) >= {"bounds_seconds", "ldos_seconds", "dos_seconds", "total_seconds"}
    with h5py.File(out / "results.h5") as fh:
        assert fh["grid/energies"].attrs["units"] == "J"
        assert fh["dos/density"].attrs["units"] == "1/J"
        assert fh["dos/vector_moments"].shape == (3, 128)
    ldos = np.asarray(tree["ldos"]["density"].value)
    e = np.asarray(tree["grid"]["energies"].value)
    assert np.trapezoid(ldos, e) == pytest.approx(1.0, abs=1e-2)
    text = capsys.readouterr().out
    assert "state energy" in text and "states below" in text


def test_lorentz_kernel_and_full_space_scenario(tmp_path):
    # mixed-field Ising example: no conserved magnetization, full space, complex start state
    scen = cli.resolve_scenario("ising_tilted", 8)
    run = run_spectra(scen, tmp_path / "r", SpectraOptions(moments=64, vectors=2, kernel="lorentz", seed=2,
                                                           progress=False))
    s = run.summary
    assert s["dimension"] == 256 and s["kernel"] == "lorentz"
    assert "full space" in s["ensemble_note"]
    _, attrs = read_results(run.folder / "results.h5")
    a = attrs["kpm"]["scale_a"]
    assert s["resolution_center"] == pytest.approx(4.0 * a / 64)  # lambda a / N with lambda = 4
    # the first two moments reproduce the exact mean and variance for any kernel
    assert s["state_energy_from_moments"] == pytest.approx(s["state_energy"], abs=1e-9)
    assert s["state_width_from_moments"] == pytest.approx(s["state_width"], rel=1e-8)


def test_memory_refusal_comes_before_the_folder(tmp_path):
    with pytest.raises(MemoryRefusal):
        run_spectra(ring(10), tmp_path / "never", SpectraOptions(vectors=1, seed=0, memory_available=10_000))
    assert not (tmp_path / "never").exists()


def test_bad_options_are_one_line_errors(tmp_path, capsys):
    rc = cli.main(["spectra", "neel_j1j2", "--sites", "8", "--out", str(tmp_path / "x"), "--moments", "4"])
    assert rc == 2 and "moments" in capsys.readouterr().err
    rc = cli.main(["spectra", "neel_j1j2", "--resume", str(tmp_path / "x")])
    assert rc == 2


def test_resume_after_interruption_gives_identical_moments(tmp_path, monkeypatch):
    import largeq.engines.kpm as kpm

    scen = ring(10)
    opts = SpectraOptions(moments=96, vectors=5, seed=11, progress=False)
    ref = run_spectra(scen, tmp_path / "straight", opts)
    ref_tree, _ = read_results(ref.folder / "results.h5")

    real = kpm.chebyshev_moments
    calls = {"n": 0}

    def interrupted(*args, **kw):
        calls["n"] += 1
        if calls["n"] == 4:  # call 1 is the LDOS, calls 2-3 the first two random vectors
            raise KeyboardInterrupt
        return real(*args, **kw)

    monkeypatch.setattr(kpm, "chebyshev_moments", interrupted)
    with pytest.raises(KeyboardInterrupt):
        run_spectra(scen, tmp_path / "cut", opts)
    state, meta = load_checkpoint(tmp_path / "cut")
    assert state["n_done"] == 2 and state["vector_moments"].shape == (2, 96)
    monkeypatch.setattr(kpm, "chebyshev_moments", real)
    with pytest.raises(FileExistsError):  # a fresh run may not overwrite an unfinished one
        run_spectra(scen, tmp_path / "cut", opts)
    resumed = resume_spectra(tmp_path / "cut", SpectraOptions(progress=False))
    tree, _ = read_results(resumed.folder / "results.h5")
    np.testing.assert_array_equal(tree["dos"]["vector_moments"].value, ref_tree["dos"]["vector_moments"].value)
    np.testing.assert_allclose(tree["ldos"]["moments"].value, ref_tree["ldos"]["moments"].value, rtol=0, atol=1e-12)
    assert resumed.summary["states_below_state_energy"] == ref.summary["states_below_state_energy"]
    assert not (tmp_path / "cut" / CHECKPOINT_NAME).exists()


@pytest.fixture(scope="module")
def l12(tmp_path_factory):
    """L = 12 J1-J2 ring, Neel start, zero-magnetization sector (D = 924), and its dense spectrum."""
    scen = ring(12)
    problem = build_problem(scen)
    H = problem.operator.to_dense()
    evals = np.linalg.eigvalsh(H)  # outside reference: LAPACK
    run = run_spectra(scen, tmp_path_factory.mktemp("l12"), SpectraOptions(moments=256, vectors=10, seed=7,
                                                                            progress=False))
    tree, attrs = read_results(run.folder / "results.h5")
    return problem, H, evals, run, tree, attrs


def test_integrated_dos_matches_dense_diagonalization_within_resolution(l12):
    # Weisse et al. (2006): the kernel broadens each level by ~ the resolution; the stochastic
    # trace adds a statistical error. So N_KPM(E) must lie between the exact counts at
    # E -+ 4 sigma_res, widened by 5 standard errors.
    problem, H, evals, run, tree, attrs = l12
    D = evals.size
    e = np.asarray(tree["grid"]["energies"].value)
    res = np.asarray(tree["grid"]["resolution"].value)
    count = np.asarray(tree["dos"]["counting"].value)
    err = np.asarray(tree["dos"]["counting_err"].value)
    inside = (e > evals[0] + 0.2) & (e < evals[-1] - 0.2)
    lo = np.searchsorted(evals, e - 4 * res)
    hi = np.searchsorted(evals, e + 4 * res)
    assert np.all(count[inside] >= lo[inside] - 5 * err[inside] - 1)
    assert np.all(count[inside] <= hi[inside] + 5 * err[inside] + 1)
    # at the state energy (summary value, exact counting function of the moments)
    s = run.summary
    E, r = s["state_energy"], s["resolution_at_state"]
    n_lo, n_hi = np.searchsorted(evals, E - 4 * r), np.searchsorted(evals, E + 4 * r)
    tol = 5 * s["states_below_state_energy_err"] + 1
    assert n_lo - tol <= s["states_below_state_energy"] <= n_hi + tol
    assert s["states_below_state_energy_err"] < 0.1 * D  # 1/sqrt(R D) scale, not O(D)
    # the stochastic mean energy Tr H / D against the exact trace
    assert s["infinite_temperature_energy"] == pytest.approx(evals.mean(), abs=5 * evals.std() / np.sqrt(10 * D / 2))
    # spectral bounds enclose the exact spectrum
    assert s["bounds"][0] < evals[0] and s["bounds"][1] > evals[-1]


def test_ldos_first_moments_are_the_exact_energy_and_second_moment(l12):
    problem, H, evals, run, tree, attrs = l12
    psi, _ = problem.initial_vector()
    h1 = float(np.vdot(psi, H @ psi).real)           # dense reference <H>
    h2 = float(np.vdot(H @ psi, H @ psi).real)       # dense reference <H^2>
    s = run.summary
    assert s["state_energy"] == pytest.approx(h1, abs=1e-10)
    assert s["state_energy_from_moments"] == pytest.approx(h1, abs=1e-10)
    assert s["state_width_from_moments"] ** 2 + h1**2 == pytest.approx(h2, rel=1e-10)
    assert h1 == pytest.approx(12 * (-1.0 + 0.3) / 4, abs=1e-12)       # Neel formula (DESIGN.md 5)
    assert h2 - h1**2 == pytest.approx(12 / 4, abs=1e-12)
    # the broadened LDOS itself against the exact weights |c_m|^2 smeared by the same kernel
    w, V = np.linalg.eigh(H)  # LAPACK eigenvectors for the exact weights |c_m|^2
    c2 = np.abs(V.conj().T @ psi) ** 2
    e = np.asarray(tree["grid"]["energies"].value)
    ldos = np.asarray(tree["ldos"]["density"].value)
    a, b = attrs["kpm"]["scale_a"], attrs["kpm"]["shift_b"]
    g = np.asarray(tree["kernel_factors"].value)
    N = g.size
    x = (e - b) / a
    xm = (w - b) / a
    n = np.arange(N)
    # exact moments of the exact weights, then the same kernel series (Weisse et al. eq. for rho)
    mu = (c2[None, :] * np.cos(n[:, None] * np.arccos(xm[None, :]))).sum(axis=1)
    series = mu[0] * g[0] + 2 * (mu[1:, None] * g[1:, None] * np.cos(n[1:, None] * np.arccos(x[None, :]))).sum(0)
    exact = series / (np.pi * np.sqrt(1 - x**2)) / a
    np.testing.assert_allclose(ldos, exact, atol=1e-8 * exact.max())
