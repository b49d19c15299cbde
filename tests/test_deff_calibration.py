"""Calibrated d_eff estimate (largeq.analysis.equilibration.calibrate_deff): leave-out predictions on
scenarios outside the built-in set, against exact d_eff from dense numpy.linalg.eigh."""

from __future__ import annotations

import numpy as np
import pytest

from largeq.analysis.equilibration import CalibrationPoint, calibrate_deff, estimate_deff
from largeq.operators.problem import build_problem
from largeq.scenario.spec import parse_scenario


def _ring_domain_wall():
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


def test_calibrated_ring_domain_wall():
    pts, _ = _points(_ring_domain_wall(), [6, 8, 10, 12])
    cal = _check_leave_out(pts)
    print("ring", [(p.sites, p.exact, p.raw) for p in pts], cal.d_eff, cal.d_eff_low, cal.d_eff_high)


def test_calibrated_ising_open_tilted():
    pts, _ = _points(_ising_open_tilted(), [7, 8, 9, 10, 11])
    cal = _check_leave_out(pts)
    print("wire", [(p.sites, p.exact, p.raw) for p in pts], cal.d_eff, cal.d_eff_low, cal.d_eff_high)
