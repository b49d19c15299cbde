"""largeq sweep: serial and Dask LocalCluster give the same numbers; reruns skip saved sizes; memory refusal."""

import json

import numpy as np

import pytest

from largeq.cli import main
from largeq.scenario import resolve_scenario
from largeq.workflows.planning import MemoryRefusal
from largeq.workflows.sweep import SweepOptions, check_tasks_fit, run_sweep, task_forecast

SIZES = [8, 10, 12]
OPTS = SweepOptions(target=16, thermal=False)


def _short(L=None):
    from largeq.scenario.spec import parse_scenario, scenario_to_dict

    s = resolve_scenario("neel_j1j2")
    d = scenario_to_dict(s)
    d["time"] = {"t_max": 8.0, "points": 81}
    return parse_scenario(d)


def _quiet(*a, **k):
    pass


@pytest.fixture(scope="module")
def serial_sweep(tmp_path_factory):
    folder = tmp_path_factory.mktemp("serial")
    return run_sweep(_short(), SIZES, folder, OPTS, mode="serial", echo=_quiet)


def test_serial_sweep_outputs(serial_sweep):
    folder, summary = serial_sweep
    for name in ("table.csv", "results.h5", "summary.json", "report.html", "deff_vs_L.png", "sigma_vs_L.png",
                 "equilibrium_vs_invL.png", "sizes/L008.json", "sizes/L012.h5"):
        assert (folder / name).exists(), name
    table = summary["table"]
    assert [r["sites"] for r in table] == SIZES
    assert all(r["d_eff_method"] == "exact" for r in table)
    # d_eff grows with L, fit slope positive with an error, extrapolation band brackets the value
    d = [r["d_eff"] for r in table]
    assert d[0] < d[1] < d[2]
    tr = summary["fits"]["trends"]["d_eff"]
    assert tr["rate"] > 0 and tr["rate_err"] > 0
    ex = summary["fits"]["extrapolations"]["d_eff"]["16"]
    assert ex["low"] < ex["value"] < ex["high"]
    assert len((folder / "table.csv").read_text().strip().splitlines()) == len(SIZES) + 1


def test_rerun_skips_saved_sizes(serial_sweep, tmp_path):
    folder, summary = serial_sweep
    seen = []
    _, again = run_sweep(_short(), SIZES + [6], folder, OPTS, mode="serial", echo=seen.append)
    kept = [s for s in seen if "already done" in s]
    assert len(kept) == len(SIZES)
    assert [r["sites"] for r in again["table"]] == [6] + SIZES
    old = {r["sites"]: r["d_eff"] for r in summary["table"]}
    assert all(r["d_eff"] == old[r["sites"]] for r in again["table"] if r["sites"] in old)


def test_local_cluster_matches_serial(serial_sweep, tmp_path):
    from dask.distributed import Client, LocalCluster

    _, ser = serial_sweep
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address="127.0.0.1:0",
                      memory_limit="2GiB") as cluster, Client(cluster, timeout="60s") as client:
        _, dist = run_sweep(_short(), SIZES, tmp_path / "dask", OPTS, client=client, echo=_quiet)
    # same code, same seeds, deterministic reductions: equal to rounding (the numbers are in fact identical)
    for a, b in zip(ser["table"], dist["table"]):
        assert a["sites"] == b["sites"] and a["matvecs"] == b["matvecs"]
        for k, v in a.items():
            if isinstance(v, float) and not any(s in k for s in ("seconds", "rss")):
                assert b[k] == pytest.approx(v, rel=1e-10, abs=1e-13, nan_ok=True), k


def test_memory_refusal_names_the_task():
    sc = _short().with_length(20)
    f = {"L020": task_forecast(sc, OPTS, memory=2**34)}
    with pytest.raises(MemoryRefusal, match="L020"):
        check_tasks_fit(f, {"tcp://127.0.0.1:1": 50 * 2**20})
    check_tasks_fit(f, {"tcp://127.0.0.1:1": 16 * 2**30})


def test_refused_sweep_writes_no_folder(tmp_path):
    """A size beyond this machine's free memory is refused before the run folder exists."""
    from largeq.workflows.sweep import run_sweep

    folder = tmp_path / "never"
    with pytest.raises(MemoryRefusal, match="L040"):
        run_sweep(_short(), [8, 10, 40], folder, OPTS, mode="serial")
    assert not folder.exists()


def test_cli_serial_sweep(tmp_path, capsys):
    rc = main(["sweep", "xx_neel", "--sizes", "6", "8", "10", "--serial", "--no-thermal", "--out",
               str(tmp_path / "s"), "--target", "12"])
    assert rc == 0
    out = capsys.readouterr().out
    assert "d_eff" in out and "L = 12" in out
    s = json.loads((tmp_path / "s" / "summary.json").read_text())
    assert s["complete"] and [r["sites"] for r in s["table"]] == [6, 8, 10]


def test_symmetry_fixed_value_not_extrapolated_and_errors_used():
    """A diagonal ensemble that is 0 at every exact size is reported as 0 by symmetry; the other equilibrium
    fits use the points' error bars (weighted), their errors inflated by the scatter, never shrunk."""
    from largeq.workflows.sweep import fit_trends

    table = []
    for L, e, err in [(8, 0.30, 0.006), (10, 0.28, 0.009), (12, 0.27, 0.007), (14, 0.262, 0.008)]:
        table.append({"sites": L, "d_eff": 2.0**(L / 2), "d_eff_method": "exact",
                      "a.equilibrium": e, "a.equilibrium_err": err, "a.sigma": 0.1 / L,
                      "z.equilibrium": 0.01 * (-1) ** L, "z.equilibrium_err": err, "z.sigma": 0.1 / L,
                      "z.equilibrium_exact": 1e-17 * L})
    fits = fit_trends(table, ["a", "z"], target=None)
    assert "z" in fits["fixed_by_symmetry"] and "z.equilibrium" not in fits["trends"]
    ex = fits["extrapolations"]["a.equilibrium"]["infinity"]
    # weighted least squares at 1/L* = 0 with the given errors: the error of the intercept is at least the
    # weighted-fit error from the points' own errors (numpy.polyfit with weights and cov='unscaled')
    x = 1.0 / np.array([8, 10, 12, 14.0])
    y = np.array([0.30, 0.28, 0.27, 0.262])
    s = np.array([0.006, 0.009, 0.007, 0.008])
    p, cov = np.polyfit(x, y, 1, w=1 / s, cov="unscaled")
    assert ex["value"] == pytest.approx(p[1], rel=1e-9)
    assert ex["transformed_err"] >= np.sqrt(cov[1, 1]) * (1 - 1e-9)
