"""Calibrated d_eff estimate (largeq.analysis.equilibration.calibrate_deff): leave-out predictions on
scenarios outside the built-in set, against exact d_eff from dense numpy.linalg.eigh."""

from __future__ import annotations

import numpy as np
import pytest

from largeq.analysis.equilibration import CalibrationPoint, calibrate_deff, estimate_deff
from largeq.operators.problem import build_problem
from largeq.scenario.spec import parse_scenario


def _ring_neel():
    # J1-J2 XXZ ring off the special points (j2 = 0.4, delta2 = 0.5), Neel start, n_up = L/2 sector
    return parse_scenario({
        "title": "test ring", "chain": {"sites": 10, "boundary": "periodic"},
        "model": {"preset": "j1j2_ring", "j1": 1.0, "j2": 0.4, "delta1": 1.0, "delta2": 0.5},
        "start": {"state": "neel"},
        "observe": [{"name": "m", "kind": "sum", "axis": "z", "signs": "staggered"}],
        "time": {"t_max": 1.0, "points": 11}})


def _ising_open_tilted():
    # mixed-field Ising chain with the Kim & Huse parameters (J = 1, g = 0.9045, h = 0.809; PRL 111, 127205
    # (2013)), open, every spin tilted to theta = 1.2, phi = 0.3 (complex amplitudes, no symmetry but reflection)
    return parse_scenario({
        "title": "test wire", "chain": {"sites": 8, "boundary": "open"},
        "model": {"preset": "mixed_field_ising", "j": 1.0, "g": 0.9045, "h": 0.809},
        "start": {"state": "tilted", "theta": 1.2, "phi": 0.3},
        "observe": [{"name": "m", "kind": "sum", "axis": "z", "signs": "uniform"}],
        "time": {"t_max": 1.0, "points": 11}})


def dense_deff(problem) -> float:
    """1 / sum_E p_E^2 from numpy.linalg.eigh of the dense Hamiltonian in the problem's basis; levels closer
    than 1e-9 are grouped into one eigenspace (p_E = ||P_E psi||^2)."""
    psi, _ = problem.initial_vector()
    psi = psi / np.linalg.norm(psi)
    e, v = np.linalg.eigh(problem.operator.to_dense())
    c2 = np.abs(v.conj().T @ psi) ** 2
    cuts = np.flatnonzero(np.diff(e) > 1e-9) + 1
    p = np.add.reduceat(c2, np.concatenate([[0], cuts]))
    return float(1.0 / np.sum(p**2))


def _points(scenario, sizes, n_vectors=40):
    pts, raws = [], {}
    for L in sizes:
        pr = build_problem(scenario.with_length(L))
        est = estimate_deff(pr, n_moments=256, n_vectors=n_vectors, rng=np.random.default_rng([11, L]))
        pts.append(CalibrationPoint(L, dense_deff(pr), est.d_eff, est.d_eff_low, est.d_eff_high, est.log_err))
        raws[L] = est
    return pts, raws


def _check_leave_out(pts):
    *small, last = pts
    cal = calibrate_deff(small, last.sites, last.raw, last.raw_low, last.raw_high, raw_log_err=last.raw_log_err)
    # the prediction interval (90 %) of the size left out must hold its exact value
    assert cal.d_eff_low <= last.exact <= cal.d_eff_high, (cal.d_eff, cal.d_eff_low, cal.d_eff_high, last.exact)
    # the internal validation of the smaller sizes ran and is reported
    assert cal.validation is not None and cal.validation["sites"] == small[-1].sites
    return cal


@pytest.mark.slow
def test_calibrated_ring_neel():
    """J1-J2 ring (own couplings), Neel start: L = 14 predicted from L = 8, 10, 12 (dense eigh up to 3432)."""
    pts, raws = _points(_ring_neel(), [8, 10, 12, 14])
    cal = _check_leave_out(pts)
    assert cal.validated
    assert abs(cal.d_eff / pts[-1].exact - 1) < abs(pts[-1].raw / pts[-1].exact - 1)


@pytest.mark.slow
def test_calibrated_ising_open_tilted():
    """Open mixed-field Ising wire (Kim-Huse parameters), tilted complex state: L = 11 from L = 7 ... 10."""
    pts, _ = _points(_ising_open_tilted(), [7, 8, 9, 10, 11])
    _check_leave_out(pts)


def test_constant_ratio_is_recovered_exactly():
    # raw estimates off by exactly a factor 2.5 at every size: the calibrated value is exact at the target,
    # the validation passes
    pts = [CalibrationPoint(L, 2.5 * 1.7**L, 1.7**L, 0.9 * 1.7**L, 1.1 * 1.7**L, 0.05) for L in (8, 9, 10, 11)]
    raw = 1.7**12
    cal = calibrate_deff(pts, 12, raw, 0.9 * raw, 1.1 * raw, raw_log_err=0.05)
    assert cal.d_eff == pytest.approx(2.5 * raw, rel=1e-9)
    assert cal.d_eff_low < cal.d_eff < cal.d_eff_high and cal.validated and not cal.reasons


def test_failed_validation_and_missing_sizes_are_reported():
    # the ratio jumps at the largest exact size: its leave-out prediction fails and the reason says so
    ratios = {8: 2.0, 9: 2.02, 10: 1.98, 11: 4.0}
    pts = [CalibrationPoint(L, r * 10.0 * L, 10.0 * L, 9.9 * L, 10.1 * L, 0.01) for L, r in ratios.items()]
    cal = calibrate_deff(pts, 12, 120.0, 119.0, 121.0, raw_log_err=0.01)
    assert not cal.validated and any("validation failed" in r for r in cal.reasons)
    none = calibrate_deff([], 12, 120.0, 119.0, 121.0)
    assert np.isnan(none.d_eff) and any("no exact sizes" in r for r in none.reasons)
    two = calibrate_deff(pts[:2], 12, 120.0, 119.0, 121.0)
    assert two.validation is None and any("needs 3" in r for r in two.reasons)


def test_estimate_without_calibration_is_not_reliable():
    pr = build_problem(_ising_open_tilted().with_length(8))
    est = estimate_deff(pr, n_moments=128, n_vectors=4, rng=np.random.default_rng(0))
    assert not est.reliable and any("no exact sizes" in r for r in est.reasons)
    assert est.calibration is None and np.isnan(est.calibrated)
