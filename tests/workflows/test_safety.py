"""Safe at any size: plans by counting before building anything, options that survive a resume, honest
timing, and one clear line (non-zero exit) for every bad request."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from largeq.reports.store import read_results
from largeq.scenario import resolve_scenario
from largeq.workflows.planning import count_state_sectors, format_bytes, plan_run

ROOT = Path(__file__).resolve().parents[2]
ENV = dict(os.environ, PYTHONPATH=str(ROOT), LARGEQ_PROGRESS="0")


def largeq(*args, cwd=None, timeout=300):
    return subprocess.run([sys.executable, "-m", "largeq", *map(str, args)], capture_output=True, text=True,
                          cwd=cwd, env=ENV, timeout=timeout)


# the command, then its own peak memory (VmHWM) as the last stderr line: getrusage(RUSAGE_CHILDREN) would
# report the test runner's peak instead, since a process keeps its parent's ru_maxrss across exec
_PEAK_CODE = """import sys
from largeq.cli import main
try:
    rc = main(sys.argv[1:])
except SystemExit as exc:
    rc = exc.code
finally:
    from largeq.machine import peak_rss_bytes
    print("LARGEQ_TEST_PEAK", peak_rss_bytes(), file=sys.stderr)
sys.exit(rc)
"""


def largeq_peak(*args, timeout=300):
    """Run a command like :func:`largeq`; returns (result without the peak line, the command's peak bytes)."""
    r = subprocess.run([sys.executable, "-c", _PEAK_CODE, *map(str, args)], capture_output=True, text=True,
                       env=ENV, timeout=timeout)
    lines = r.stderr.splitlines()
    assert lines and lines[-1].startswith("LARGEQ_TEST_PEAK"), r.stderr
    r.stderr = "\n".join(lines[:-1])
    return r, int(lines[-1].split()[1])


def assert_one_line_error(r, *needles):
    assert r.returncode != 0, r.stdout
    assert "Traceback" not in r.stderr, r.stderr
    lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, r.stderr
    for n in needles:
        assert n in lines[0], lines[0]


SCENARIO = """
title = "safety"
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


# ------------------------------------------------------------------------------------- bad arguments
@pytest.mark.parametrize("args, needle", [
    (["--block", "0"], "block: got 0"),
    (["--block", "-3"], "block: got -3"),
    (["--seed", "-1"], "seed: got -1"),
    (["--checkpoint-every", "-1"], "checkpoint interval"),
])
def test_bad_relax_options_are_one_line(tmp_path, args, needle):
    r = largeq("relax", "xx_neel", "--sites", 8, "--out", tmp_path / "r", *args)
    assert_one_line_error(r, needle, "allowed")
    assert not (tmp_path / "r").exists()


def test_out_into_read_only_folder_is_one_line(tmp_path):
    # we run as root, so permissions do not stop writes: /proc refuses new folders for everyone
    r = largeq("relax", "xx_neel", "--sites", 8, "--out", "/proc/largeq-test/run", "--no-progress")
    assert_one_line_error(r, "/proc/largeq-test")


def test_default_runs_folder_in_unwritable_working_folder_is_one_line():
    r = largeq("relax", "xx_neel", "--sites", 8, "--no-progress", cwd="/proc")
    assert_one_line_error(r, "runs")


def test_forecast_default_folder_unwritable_is_one_line():
    r = largeq("forecast", "xx_neel", "--sites", 10, "--no-calibration", cwd="/proc")
    assert r.returncode != 0 and "Traceback" not in r.stderr


def test_tiny_t_max_refused_with_allowed_range(tmp_path):
    path = tmp_path / "tiny.toml"
    path.write_text(SCENARIO.replace("t_max = 30.0", "t_max = 1e-300"))
    r = largeq("relax", path, "--out", tmp_path / "r", "--no-progress")
    assert_one_line_error(r, "time.t_max", "allowed", "t_max in [")
    assert not (tmp_path / "r").exists()  # no half-written folder
    assert_one_line_error(largeq("describe", path), "time.t_max")


def test_sweep_target_with_too_few_sizes_is_refused(tmp_path):
    r = largeq("sweep", "xx_neel", "--sizes", 6, 8, "--target", 20, "--serial", "--out", tmp_path / "s")
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert "--target 20" in r.stderr and "at least 3" in r.stderr


def test_dead_scheduler_is_one_line(tmp_path):
    r = largeq("sweep", "xx_neel", "--sizes", 6, 8, 10, "--scheduler", "tcp://127.0.0.1:9", "--out", tmp_path / "s",
               timeout=120)
    assert_one_line_error(r, "tcp://127.0.0.1:9", "scheduler")


# ------------------------------------------------------------------------------------- run folders
def test_out_onto_finished_run_refuses_and_resume_of_finished_run_says_so(tmp_path):
    out = tmp_path / "r"
    r = largeq("relax", "xx_neel", "--sites", 8, "--out", out, "--no-progress", "--equilibration", "off")
    assert r.returncode == 0, r.stderr
    before = (out / "summary.json").read_text()
    mtime = (out / "results.h5").stat().st_mtime_ns
    r = largeq("relax", "xx_neel", "--sites", 8, "--out", out, "--no-progress")
    assert_one_line_error(r, "finished run", "--overwrite")
    r = largeq("relax", "--resume", out)
    assert r.returncode == 0 and "already finished" in r.stdout and "nothing recomputed" in r.stdout
    assert (out / "summary.json").read_text() == before and (out / "results.h5").stat().st_mtime_ns == mtime
    r = largeq("relax", "xx_neel", "--sites", 8, "--out", out, "--no-progress", "--overwrite", "--seed", 5)
    assert r.returncode == 0, r.stderr
    assert json.loads((out / "summary.json").read_text())["options"]["seed"] == 5


def _killed_run(tmp_path, *options):
    path = tmp_path / "s.toml"
    path.write_text(SCENARIO)
    killed = tmp_path / "killed"
    proc = subprocess.Popen([sys.executable, "-m", "largeq", "relax", str(path), "--out", str(killed),
                             "--checkpoint-every", "1e-9", "--block", "2", "--no-progress", *options], env=ENV,
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
    return path, killed


def test_resume_restores_the_options_of_the_run(tmp_path):
    opts = ["--equilibration", "estimate", "--seed", "7"]
    path, killed = _killed_run(tmp_path, *opts)
    r = largeq("relax", "--resume", killed, "--no-progress", timeout=600)  # no options given: the run's own
    assert r.returncode == 0, r.stderr
    clean = tmp_path / "clean"
    r = largeq("relax", path, "--out", clean, "--block", "2", "--no-progress", *opts, timeout=600)
    assert r.returncode == 0, r.stderr
    a = json.loads((killed / "summary.json").read_text())
    b = json.loads((clean / "summary.json").read_text())
    assert a["options"] == b["options"] == {"equilibration": "estimate", "seed": 7, "symmetry": "auto", "block": 2,
                                                 "window_start": None}
    assert a["equilibration"]["method"] == b["equilibration"]["method"] == "KPM estimate"
    assert abs(a["equilibration"]["d_eff"] - b["equilibration"]["d_eff"]) <= 1e-12 * abs(b["equilibration"]["d_eff"])
    for name in a["observables"]:
        for key in ("canonical", "equilibrium", "temporal_variance"):
            assert abs(a["observables"][name][key] - b["observables"][name][key]) <= 1e-12, (name, key)
    ra, _ = read_results(killed / "results.h5", quantities=False)
    rb, _ = read_results(clean / "results.h5", quantities=False)
    for key in ("stag", "survival_probability", "norm", "energy"):
        assert np.max(np.abs(ra["curves"][key] - rb["curves"][key])) < 1e-12


def test_resume_after_equilibration_off_stays_off_and_conflicts_name_both_values(tmp_path):
    path, killed = _killed_run(tmp_path, "--equilibration", "off")
    r = largeq("relax", "--resume", killed, "--equilibration", "exact")
    assert_one_line_error(r, "'off'", "'exact'", "equilibration")
    r = largeq("relax", "--resume", killed, "--no-progress", timeout=600)
    assert r.returncode == 0, r.stderr
    s = json.loads((killed / "summary.json").read_text())
    assert s["equilibration"]["method"] == "skipped" and s["options"]["equilibration"] == "off"


# ------------------------------------------------------------------------------------- timing
def test_wall_seconds_cover_the_whole_command(tmp_path):
    out = tmp_path / "r"
    t0 = time.time()
    r = largeq("relax", "xx_neel", "--sites", 10, "--out", out, "--no-progress")
    elapsed = time.time() - t0
    assert r.returncode == 0, r.stderr
    s = json.loads((out / "summary.json").read_text())
    phases = s["phases"]
    for name in ("startup", "plan and build", "evolution", "equilibration", "plots and report"):
        assert name in phases, phases
    # the recorded wall time is the command's: within the subprocess's own lifetime, and at least the phases
    assert sum(phases.values()) <= s["wall_seconds"] + 1e-3
    assert s["wall_seconds"] <= elapsed
    # the measured peak is recorded, and the forecast made before the run (which claims to be the peak) covers it
    assert 2**20 < s["peak_rss_bytes"] <= s["memory_forecast_bytes"]
    assert s["wall_seconds"] >= 0.5 * elapsed  # interpreter exit is the only part outside


def test_thread_policy_limits_blas_while_kernels_run():
    from threadpoolctl import threadpool_info

    from largeq.engines.threads import compiled_kernels, dense_linear_algebra
    import numba

    blas = [i for i in threadpool_info() if i["user_api"] == "blas"]
    if not blas:
        pytest.skip("no BLAS thread pool found")
    with compiled_kernels():
        assert all(i["num_threads"] == 1 for i in threadpool_info() if i["user_api"] == "blas")
    before = numba.get_num_threads()
    for dim in (10, None):  # small or unnamed matrices (many symmetry blocks): BLAS on one thread too
        with dense_linear_algebra(dim):
            assert numba.get_num_threads() == 1
            assert all(i["num_threads"] == 1 for i in threadpool_info() if i["user_api"] == "blas")
    assert numba.get_num_threads() == before
    with dense_linear_algebra(20_000):
        assert numba.get_num_threads() == 1


# ------------------------------------------------------------------------------------- planning by counting
@pytest.mark.parametrize("L, sites_up", [(12, [1, 3, 5, 7, 9, 11]), (12, [0, 1, 2, 3, 4, 5]), (10, [0, 1, 3, 5, 6]),
                                         (9, [0, 2, 3, 5]), (12, [0, 3, 6, 9]), (8, [0, 1, 4, 5])])
def test_counted_sectors_equal_enumerated_sectors(L, sites_up):
    from largeq.operators.sector_operator import split_basis_state

    bits = sum(1 << j for j in sites_up)
    flip = 2 * len(sites_up) == L
    comps, note = split_basis_state(bits, L, reflection=True, spin_flip=flip)
    counted, note2 = count_state_sectors(bits, L, reflection=True, spin_flip=flip)
    assert [(c.sector.key, c.sector.dim) for c in comps] == [(c.key, c.dimension) for c in counted]
    np.testing.assert_allclose([c.weight for c in comps], [c.weight for c in counted], atol=1e-12)
    assert note == note2


@pytest.mark.parametrize("name", ["xx_neel", "neel_j1j2", "neel_j1j2_sectors", "ising_tilted",
                                  "disordered_heisenberg"])
def test_forecast_plans_the_path_relax_takes(name, tmp_path, monkeypatch):
    from largeq.workflows import relax as relax_mod
    from largeq.workflows.forecast import forecast

    sc = resolve_scenario(name)
    sc = sc.with_length(min(sc.n_sites, 10))
    taken = {}
    real = relax_mod._execute_sectors

    def spy(problem, text, folder, times, plan, options, **kw):
        taken["path"] = "sectors"
        taken["dims"] = [int(c.sector.dim) for c in plan["components"]]
        return real(problem, text, folder, times, plan, options, **kw)

    monkeypatch.setattr(relax_mod, "_execute_sectors", spy)
    run = relax_mod.run_relaxation(sc, tmp_path / "r", relax_mod.RelaxOptions(progress=False, equilibration="off"))
    f = forecast(sc, calibrate_here=False, baseline=False)
    if "path" not in taken:
        taken["path"] = run.summary["basis"]["kind"]
    assert f["plan"]["path"] == taken["path"]
    if taken["path"] == "sectors":
        assert [s["dimension"] for s in f["plan"]["sectors"]] == taken["dims"]
    else:
        assert f["plan"]["dimension"] == run.summary["basis"]["dimension"]
    assert run.summary["memory_forecast_bytes"] == f["plan"]["forecast"]["total_bytes"] or taken["path"] != "sectors"


def test_forecast_of_the_wide_ring_plans_sectors_at_34_sites():
    f = plan_run(resolve_scenario("neel_j1j2_sectors", 34), available=2**40)
    assert f.path == "sectors" and len(f.sectors) == 2
    assert all(16e6 < c.dimension < 18e6 for c in f.sectors)  # ~ C(34,17) / (2 * 34 * 2)


@pytest.mark.parametrize("L", [40, 62])
def test_describe_at_large_L_answers_quickly_in_little_memory(L):
    t0 = time.time()
    r, peak = largeq_peak("describe", "neel_j1j2_sectors", "--sites", L, timeout=60)
    wall = time.time() - t0
    assert r.returncode == 0, r.stderr
    assert "does NOT fit" in r.stdout and "symmetry sectors" in r.stdout
    assert peak < 2 * 2**30, peak  # no table or sector was built: well under 2 GiB
    from largeq.workflows.describe import describe_scenario

    t0 = time.perf_counter()
    describe_scenario(resolve_scenario("neel_j1j2_sectors", L))
    assert time.perf_counter() - t0 < 5.0  # the limit; measured ~0.1 s (the rest of 'wall' is imports)
    assert wall < 60


def test_relax_refuses_large_L_before_building_anything(tmp_path):
    r, peak = largeq_peak("relax", "neel_j1j2", "--sites", 62, "--out", tmp_path / "r", timeout=60)
    assert_one_line_error(r, "refusing to start")
    assert not (tmp_path / "r").exists()
    assert peak < 2 * 2**30, peak


def test_bytes_in_scaled_units():
    assert format_bytes(16151262905.51 * 2**30) == "15.04 EiB"  # the "16151262905.51 GiB"
    assert format_bytes(3 * 2**50) == "3.00 PiB"
    assert format_bytes(5 * 2**40) == "5.00 TiB"
    assert format_bytes(2.5 * 2**30) == "2.50 GiB"
    assert format_bytes(512 * 2**20) == "512.00 MiB"


@pytest.mark.parametrize("args", [
    ["spectra", "neel_j1j2", "--sites", "62"],
    ["thermal", "neel_j1j2", "--sites", "62"],
    ["crosscheck", "xx_neel", "--sizes", "8", "40"],
])
def test_every_command_refuses_by_counting_before_building(tmp_path, args):
    r, peak = largeq_peak(*args, "--out", tmp_path / "o", timeout=120)
    assert_one_line_error(r, "refusing to start")
    assert not (tmp_path / "o").exists()
    assert peak < 2 * 2**30, peak


def test_sweep_refuses_a_size_that_cannot_fit(tmp_path):
    r, peak = largeq_peak("sweep", "neel_j1j2", "--sizes", 10, 12, 60, "--serial", "--out", tmp_path / "s",
                          timeout=120)
    assert r.returncode == 2 and "Traceback" not in r.stderr and "L060" in r.stderr
    assert peak < 2 * 2**30, peak
    assert not (tmp_path / "s").exists()  # refused before the run folder was written


@pytest.mark.parametrize("block", ["0", "-3"])
def test_forecast_block_checked(block):
    r = largeq("forecast", "xx_neel", "--sites", 12, "--block", block, "--no-calibration", "--out", "/proc/never")
    assert_one_line_error(r, f"block: got {block}")


def test_describe_time_forecast_counts_products():
    # the planned products bound the ones relax spends: the half-width bound sum |c| >= the true half-width
    from largeq.workflows.relax import RelaxOptions, run_relaxation
    import tempfile

    sc = resolve_scenario("neel_j1j2", 10)
    plan = plan_run(sc)
    with tempfile.TemporaryDirectory() as d:
        run = run_relaxation(sc, Path(d) / "r", RelaxOptions(progress=False, equilibration="off"))
    assert plan.products >= run.summary["matvecs"]
    assert plan.products <= 4 * run.summary["matvecs"]


@pytest.mark.parametrize("args, needle", [
    (["thermal", "xx_neel", "--sites", "8", "--seed", "-1"], "--seed: got -1"),
    (["spectra", "xx_neel", "--sites", "8", "--seed", "-1"], "--seed: got -1"),
    (["crosscheck", "xx_neel", "--sites", "8", "--seed", "-1"], "--seed: got -1"),
    (["crosscheck", "xx_neel", "--sites", "8", "--max-dim", "-1"], "--max-dim: got -1"),
    (["sweep", "xx_neel", "--sizes", "6", "8", "10", "--serial", "--seed", "-1"], "--seed: got -1"),
    (["sweep", "xx_neel", "--sizes", "6", "8", "10", "--serial", "--moments", "0"], "--moments: got 0"),
    (["sweep", "xx_neel", "--sizes", "6", "8", "10", "--serial", "--max-dim", "0"], "--max-dim: got 0"),
])
def test_bad_options_of_other_commands_are_one_line(tmp_path, args, needle):
    r = largeq(*args, "--out", tmp_path / "o")
    assert_one_line_error(r, needle, "allowed")
    assert not (tmp_path / "o").exists()


def test_out_onto_finished_forecast_refuses_without_overwrite(tmp_path):
    out = tmp_path / "f"
    assert largeq("forecast", "xx_neel", "--sites", 8, "--no-calibration", "--out", out).returncode == 0
    r = largeq("forecast", "xx_neel", "--sites", 10, "--no-calibration", "--out", out)
    assert_one_line_error(r, "finished run", "--overwrite")
    assert json.loads((out / "forecast.json").read_text())["sites"] == 8
    r = largeq("forecast", "xx_neel", "--sites", 10, "--no-calibration", "--out", out, "--overwrite")
    assert r.returncode == 0 and json.loads((out / "forecast.json").read_text())["sites"] == 10
