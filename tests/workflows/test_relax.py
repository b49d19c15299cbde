"""The main job end to end: physics against outside references, run folders, resume, refusal.

References
----------
* Free fermions on a finite XX ring (Jordan-Wigner): n_j(t) = sum_l |G_jl(t)|^2 n_l(0),
  G_jl = (1/L) sum_k e^{ik(j-l)} e^{-i J cos(k) t}, k = 2 pi (n + s)/L with s = 0 for an odd and
  s = 1/2 for an even number of fermions; e.g. M. Flesch et al., Phys. Rev. A 78, 033608 (2008).
* Infinite XX chain from the Neel state: <sigma^z_j(t)> = (-1)^j J_0(2 J t) (same reference),
  compared with scipy.special.j0.
* Dense propagation with scipy.linalg.expm.
"""

import json
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
import scipy.linalg
from scipy.special import j0

from largeq.operators.problem import build_problem
from largeq.engines.propagate import evolve
from largeq.workflows.planning import MemoryRefusal
from largeq.workflows.relax import RelaxOptions, resume_relaxation, run_relaxation
from largeq.reports.store import read_results
from largeq.scenario.spec import parse_scenario


def scenario(**over):
    base = {
        "title": "test ring",
        "chain": {"sites": 10, "boundary": "periodic"},
        "model": {"preset": "j1j2_ring", "j1": 1.0, "j2": 0.3, "delta1": 1.0, "delta2": 1.0},
        "start": {"state": "neel"},
        "observe": [
            {"name": "stag", "kind": "sum", "axis": "z", "signs": "staggered"},
            {"name": "z0", "kind": "site", "axis": "z", "site": 0},
            {"name": "x1", "kind": "site", "axis": "x", "site": 1},
            {"name": "bond", "kind": "bond", "sites": [0, 1]},
        ],
        "time": {"t_max": 4.0, "points": 41},
    }
    for k, v in over.items():
        base[k] = v
    return parse_scenario(base)


def curves(problem, times, **kw):
    psi, _ = problem.initial_vector()
    ops = {n: problem.observable_operator(n) for n in problem.observables}
    out = {n: np.zeros(len(times)) for n in ops}

    def record(i, t, v):
        for n, op in ops.items():
            out[n][i] = op.expectation(v)

    evolve(problem.operator, psi, times, on_output=record, **kw)
    return out


def free_fermion_sz(L, J, times):
    """<sigma^z_j(t)> on a finite XX ring from the Neel state 1010... (site 0 up = occupied)."""
    N = L // 2
    s = 0.0 if N % 2 == 1 else 0.5
    k = 2 * np.pi * (np.arange(L) + s) / L
    j = np.arange(L)
    occupied = (j % 2 == 0)
    out = np.zeros((len(times), L))
    for a, t in enumerate(times):
        # G_jl = (1/L) sum_k e^{ik(j-l)} e^{-i J cos k t}   (hopping J/2 per bond -> epsilon_k = J cos k)
        phase = np.exp(1j * np.outer(j, k)) * np.exp(-1j * J * np.cos(k) * t)
        G = phase @ np.exp(-1j * np.outer(k, j)) / L
        n = (np.abs(G) ** 2) @ occupied
        out[a] = 2 * n - 1
    return out


def xx_scenario(L, t_max, points):
    return scenario(chain={"sites": L, "boundary": "periodic"}, model={"preset": "xx_chain", "j": 1.0},
                    observe=[{"name": f"z{j}", "kind": "site", "axis": "z", "site": j} for j in range(2)],
                    time={"t_max": t_max, "points": points})


@pytest.mark.parametrize("L", [16, 18])
def test_xx_ring_matches_free_fermions(L):
    sc = xx_scenario(L, 8.0, 17)
    problem = build_problem(sc)
    times = sc.time.times()
    got = curves(problem, times, tol=1e-12)
    ref = free_fermion_sz(L, 1.0, times)
    for j in range(2):
        assert np.max(np.abs(got[f"z{j}"] - ref[:, j])) < 1e-8


def test_xx_ring_wrong_boundary_sign_is_visibly_wrong():
    # guards the reference itself: the other boundary condition must disagree clearly
    L = 16
    sc = xx_scenario(L, 8.0, 17)
    times = sc.time.times()
    got = curves(build_problem(sc), times)
    N = L // 2
    s_wrong = 0.5 if N % 2 == 1 else 0.0
    k = 2 * np.pi * (np.arange(L) + s_wrong) / L
    j = np.arange(L)
    errs = []
    for a, t in enumerate(times):
        G = (np.exp(1j * np.outer(j, k)) * np.exp(-1j * np.cos(k) * t)) @ np.exp(-1j * np.outer(k, j)) / L
        errs.append(abs(2 * (np.abs(G[0]) ** 2) @ (j % 2 == 0) - 1 - got["z0"][a]))
    assert max(errs) > 1e-3


def test_xx_ring_l24_follows_bessel_before_revivals():
    # infinite-chain result (-1)^j J0(2Jt); finite-size revivals start near t ~ L/(4J) = 6
    L = 24
    sc = xx_scenario(L, 4.0, 9)
    times = sc.time.times()
    got = curves(build_problem(sc), times)
    assert np.max(np.abs(got["z0"] - j0(2 * times))) < 1e-6
    assert np.max(np.abs(got["z1"] + j0(2 * times))) < 1e-6


@pytest.mark.parametrize("preset,start", [
    ({"preset": "j1j2_ring", "j1": 1.0, "j2": 0.3, "delta1": 0.8, "delta2": 1.2}, {"state": "neel"}),
    ({"preset": "mixed_field_ising", "j": 1.0, "g": -1.05, "h": 0.5}, {"state": "tilted", "theta": 1.1, "phi": 0.4}),
    ({"preset": "random_field_heisenberg", "j": 1.0, "w": 3.0, "seed": 11}, {"state": "domain_wall"}),
    ({"preset": "xx_chain", "j": 1.0}, {"state": "bits", "bits": "1100101001"}),
])
@pytest.mark.parametrize("method", ["chebyshev", "lanczos"])
def test_every_preset_matches_dense_expm(preset, start, method):
    L = 10
    sc = scenario(chain={"sites": L, "boundary": "periodic"}, model=preset, start=start,
                  observe=[{"name": "z0", "kind": "site", "axis": "z", "site": 0},
                           {"name": "x1", "kind": "site", "axis": "x", "site": 1},
                           {"name": "bond", "kind": "bond", "sites": [0, 1]}],
                  time={"t_max": 3.0, "points": 7})
    problem = build_problem(sc)
    times = sc.time.times()
    got = curves(problem, times, method=method)
    H = problem.operator.to_dense()
    psi, _ = problem.initial_vector()
    states = [scipy.linalg.expm(-1j * H * t) @ psi for t in times]
    for name in problem.observables:
        A = problem.observable_operator(name).to_dense()
        for a, v in enumerate(states):
            assert abs(np.vdot(v, A @ v).real - got[name][a]) < 1e-9


def test_run_folder_contents_and_conservation(tmp_path):
    sc = scenario()
    run = run_relaxation(sc, tmp_path / "run", RelaxOptions(progress=False))
    folder = run.folder
    for name in ("results.h5", "summary.json", "report.html", "relaxation.png", "distance.png", "survival.png",
                 "scenario.toml"):
        assert (folder / name).stat().st_size > 0
    summary = json.loads((folder / "summary.json").read_text())
    assert summary["norm_drift"] < 1e-9 and summary["energy_drift"] < 1e-8
    # Neel energy in S units: L(-J1 D1 + J2 D2)/4 (design notes, section 5)
    assert abs(summary["initial_energy"] - 10 * (-1 + 0.3) / 4) < 1e-12
    tree, attrs = read_results(folder / "results.h5", quantities=False)
    assert "scenario_toml" in attrs and "conventions" in attrs and "versions" in attrs
    assert tree["curves"]["stag"].shape == (41,)
    # sigma^x_1 leaves the magnetization sector: its expectation stays exactly 0
    assert np.all(tree["curves"]["x1"] == 0)
    html = (folder / "report.html").read_text()
    assert "stag" in html and "data:image/png;base64" in html


def test_memory_refusal_names_estimate_and_alternatives(tmp_path):
    sc = scenario(chain={"sites": 24, "boundary": "periodic"})
    # the magnetization-sector path (the symmetric path would fit: 2 sectors of ~28,000 states)
    with pytest.raises(MemoryRefusal) as err:
        run_relaxation(sc, tmp_path / "r", RelaxOptions(memory_available=500 * 2**20, symmetry="off"))
    msg = str(err.value)
    assert "needs about" in msg and "Cheaper options" in msg and "L = 20" in msg
    assert not (tmp_path / "r").exists()  # refused before creating anything


KILL_SCENARIO = """
title = "kill and resume"
[chain]
sites = 16
boundary = "periodic"
[model]
preset = "j1j2_ring"
j1 = 1.0
j2 = 0.3
delta1 = 1.0
delta2 = 1.0
[start]
state = "neel"
[[observe]]
name = "stag"
kind = "sum"
axis = "z"
signs = "staggered"
[time]
t_max = 30.0
points = 301
"""


@pytest.mark.parametrize("symmetry", ["auto", "off"])
def test_sigkill_then_resume_reproduces_uninterrupted_run(tmp_path, symmetry):
    path = tmp_path / "s.toml"
    path.write_text(KILL_SCENARIO)
    killed = tmp_path / "killed"
    env = dict(os.environ, LARGEQ_PROGRESS="0")
    proc = subprocess.Popen([sys.executable, "-m", "largeq", "relax", str(path), "--out", str(killed),
                             "--checkpoint-every", "0", "--block", "2", "--no-progress", "--symmetry", symmetry,
                             "--equilibration", "off"], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    ck = killed / "checkpoint.h5"
    deadline = time.time() + 120
    while not ck.exists() and time.time() < deadline and proc.poll() is None:
        time.sleep(0.02)
    time.sleep(0.3)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    if proc.returncode != -signal.SIGKILL:
        pytest.fail(f"the run finished before it could be killed (rc {proc.returncode}); make it longer")
    assert ck.exists() and not (killed / "results.h5").exists()
    opts = dict(progress=False, symmetry=symmetry, equilibration="off")
    resumed = resume_relaxation(killed, RelaxOptions(**opts))
    clean = run_relaxation(parse_scenario_file(path), tmp_path / "clean", RelaxOptions(block=2, **opts))
    assert (resumed.summary["symmetry_sectors"] is not None) == (symmetry == "auto")
    a, _ = read_results(resumed.folder / "results.h5", quantities=False)
    b, _ = read_results(clean.folder / "results.h5", quantities=False)
    for key in ("stag", "survival_probability", "norm", "energy"):
        assert np.max(np.abs(a["curves"][key] - b["curves"][key])) < 1e-12
    assert not (killed / "checkpoint.h5").exists()


def parse_scenario_file(path):
    from largeq.scenario.spec import load_scenario

    return load_scenario(path)


def test_cli_errors_are_one_line_without_traceback(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text(KILL_SCENARIO.replace("sites = 16", "sites = -4"))
    r = subprocess.run([sys.executable, "-m", "largeq", "describe", str(bad)], capture_output=True, text=True)
    assert r.returncode == 2
    assert "chain.sites" in r.stderr and "-4" in r.stderr and "Traceback" not in r.stderr
    r = subprocess.run([sys.executable, "-m", "largeq", "relax", "no_such_example"], capture_output=True, text=True)
    assert r.returncode == 2 and "built-in examples" in r.stderr and "Traceback" not in r.stderr


def test_summary_carries_effective_dimension_bound_and_thermal_values(tmp_path):
    # at L = 10 the exact engine runs: the bound (Reimann, PRL 101, 190403 (2008)) must hold for
    # the exact infinite-time variance, and d_eff lies between 1 and the subspace dimension
    run = run_relaxation(scenario(), tmp_path / "eq", RelaxOptions(progress=False))
    eq = run.summary["equilibration"]
    assert eq["method"] == "exact diagonalization"
    assert 1.0 <= eq["d_eff"] <= eq["details"]["diagonalized_dimension"]
    for name, o in run.summary["observables"].items():
        assert o["bound_holds"] and o["exact_variance"] <= o["bound"] * (1 + 1e-10)
        assert "canonical" in o and "microcanonical" in o
    off = run_relaxation(scenario(), tmp_path / "off", RelaxOptions(progress=False, equilibration="off"))
    assert off.summary["equilibration"]["method"] == "skipped"


def test_symmetry_sectors_reproduce_the_magnetization_sector_run(tmp_path):
    # the Neel state of a translation-invariant ring splits into momentum sectors (k = 0, pi);
    # diagonal observables evaluated across sectors must equal the plain sector-free run
    sc = scenario(chain={"sites": 16, "boundary": "periodic"},
                  observe=[{"name": "stag", "kind": "sum", "axis": "z", "signs": "staggered"},
                           {"name": "z0", "kind": "site", "axis": "z", "site": 0},
                           {"name": "zz2", "kind": "zz", "distance": 2, "site": "average"}],
                  time={"t_max": 6.0, "points": 31})
    opts = dict(progress=False, equilibration="off")
    split = run_relaxation(sc, tmp_path / "split", RelaxOptions(symmetry="auto", **opts))
    plain = run_relaxation(sc, tmp_path / "plain", RelaxOptions(symmetry="off", **opts))
    assert split.summary["symmetry_sectors"] and len(split.summary["symmetry_sectors"]["sectors"]) >= 2
    assert plain.summary["symmetry_sectors"] is None
    a, _ = read_results(split.folder / "results.h5", quantities=False)
    b, _ = read_results(plain.folder / "results.h5", quantities=False)
    for key in ("stag", "z0", "zz2", "survival_probability", "energy", "norm"):
        assert np.max(np.abs(a["curves"][key] - b["curves"][key])) < 1e-9, key


@pytest.mark.parametrize("case", ["neel_bond", "tilted_ising_ring"])
def test_symmetry_sectors_with_offdiagonal_observables_and_tilted_starts(tmp_path, case):
    # bond energies, sigma^x sums and site-resolved sigma^x across sectors (Neel, J1-J2 ring), and a
    # tilted start of the mixed-field Ising ring evolved in its full-space k = 0 sector: the default
    # run uses the sectors, names them in summary.json, and equals the sector-free run to 1e-9
    obs = [{"name": "stag", "kind": "sum", "axis": "z", "signs": "staggered"},
           {"name": "x1", "kind": "site", "axis": "x", "site": 1},
           {"name": "mx", "kind": "sum", "axis": "x", "signs": "uniform"},
           {"name": "bond", "kind": "bond", "sites": [0, 1]},
           {"name": "zz1", "kind": "zz", "distance": 1, "site": "average"}]
    over = dict(chain={"sites": 14 if case == "neel_bond" else 12, "boundary": "periodic"}, observe=obs,
                time={"t_max": 4.0, "points": 21})
    if case == "tilted_ising_ring":
        over.update(model={"preset": "mixed_field_ising", "j": 1.0, "g": -1.05, "h": 0.5},
                    start={"state": "tilted", "theta": 1.0471975511965976, "phi": 0.0})
    sc = scenario(**over)
    opts = dict(progress=False, equilibration="off")
    split = run_relaxation(sc, tmp_path / "split", RelaxOptions(**opts))
    plain = run_relaxation(sc, tmp_path / "plain", RelaxOptions(symmetry="off", **opts))
    basis = json.loads((split.folder / "summary.json").read_text())["basis"]
    assert basis["kind"] == "symmetry-sector" and basis["dimension"] == sum(basis["sector_dimensions"])
    assert basis["dimension"] < plain.summary["basis"]["dimension"] // 10
    # the prediction describe / forecast use (no enumeration) is exactly what the run did
    from largeq.workflows.relax import sector_choice

    choice = sector_choice(build_problem(sc))
    assert choice["use"] and [c["dimension"] for c in choice["sectors"]] == basis["sector_dimensions"]
    assert sector_choice(build_problem(sc), RelaxOptions(symmetry="off"))["use"] is False
    if case == "tilted_ising_ring":
        assert basis["sector_count"] == 1 and "all magnetizations" in basis["sector_labels"][0]
        assert "k = 2pi*0/12" in basis["sector_labels"][0]
    a, _ = read_results(split.folder / "results.h5", quantities=False)
    b, _ = read_results(plain.folder / "results.h5", quantities=False)
    for key in ("stag", "x1", "mx", "bond", "zz1", "survival_probability", "energy", "norm"):
        assert np.max(np.abs(a["curves"][key] - b["curves"][key])) < 1e-9, key
