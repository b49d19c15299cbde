"""Disorder realizations: deterministic recorded seeds, statistics, and relax --realizations."""

import json

import numpy as np
import pytest

from largeq.cli import main
from largeq.scenario import resolve_scenario
from largeq.workflows.disorder import (aggregate, aggregate_curves, base_seed, is_disordered,
                                       realization_seeds, with_seed)


def test_seeds_deterministic_distinct_and_prefix_stable():
    a = realization_seeds(123, 5)
    assert a == realization_seeds(123, 5)
    assert len(set(a)) == 5
    assert realization_seeds(123, 8)[:5] == a  # asking for more keeps the first ones
    assert realization_seeds(124, 5) != a


def test_with_seed_changes_fields_and_is_recorded():
    s = resolve_scenario("disordered_heisenberg", 8)
    assert is_disordered(s) and base_seed(s) == 20240517
    s2 = with_seed(s, 77)
    assert base_seed(s2) == 77
    h1, h2 = s.field_values()["z"], s2.field_values()["z"]
    assert not np.allclose(h1, h2)
    assert np.allclose(h2, np.random.default_rng(77).uniform(-5.0, 5.0, 8))
    assert not is_disordered(resolve_scenario("neel_j1j2"))


def test_aggregate_statistics():
    rng = np.random.default_rng(5)
    x = rng.normal(2.0, 0.5, 400)
    a = aggregate(x)
    assert a["n"] == 400
    assert a["spread"] == pytest.approx(np.std(x, ddof=1))
    assert a["stderr"] == pytest.approx(a["spread"] / 20)
    # mean within 4 standard errors of the truth (false alarm 6e-5)
    assert abs(a["mean"] - 2.0) < 4 * a["stderr"]
    m, se, sp = aggregate_curves(np.vstack([x[:200], x[200:]]).T)  # 200 "realizations" x 2 times? -> shape check
    assert m.shape == (2,) and np.allclose(se, sp / np.sqrt(200))


def test_relax_realizations_cli(tmp_path, capsys):
    out = tmp_path / "r"
    rc = main(["relax", "disordered_heisenberg", "--sites", "6", "--realizations", "2", "--out", str(out),
               "--no-progress"])
    assert rc == 0
    s = json.loads((out / "summary.json").read_text())
    assert s["realizations"] == 2 and s["seeds"] == realization_seeds(20240517, 2)
    for k in range(2):
        sub = json.loads((out / f"realization-{k:03d}" / "summary.json").read_text())
        per = sub["observables"]["imbalance"]["equilibrium"]
        assert s["observables"]["imbalance"]["equilibrium"]["min"] <= per <= s["observables"]["imbalance"]["equilibrium"]["max"]
    vals = [json.loads((out / f"realization-{k:03d}" / "summary.json").read_text())["observables"]["imbalance"]["equilibrium"]
            for k in range(2)]
    assert s["observables"]["imbalance"]["equilibrium"]["mean"] == pytest.approx(np.mean(vals))
    assert (out / "report.html").exists() and (out / "results.h5").exists()
    # rerun keeps the finished realizations
    main(["relax", "disordered_heisenberg", "--sites", "6", "--realizations", "2", "--out", str(out), "--no-progress"])
    assert capsys.readouterr().out.count("already done") == 2
