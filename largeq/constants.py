"""Limits and default seeds shared across the package (one place; every layer may import it).

Seeds are fixed so that reruns give the same numbers; every run records the seeds it used.
"""

from __future__ import annotations

__all__ = ["MAX_DENSE_DIM", "EXACT_AUTO_MAX_BLOCK", "EXACT_THERMAL_MAX_DIM", "ESTIMATE_MAX_DIM",
           "MIN_PHASE_STEP", "BOUNDS_SEED", "ESTIMATOR_SEED", "CROSSCHECK_SEED", "SWEEP_SEED"]

#: largest matrix diagonalized densely (about 4 GB for eigenvectors in float64 and minutes on 2 cores)
MAX_DENSE_DIM = 13_000
#: largest symmetry block touched by the initial state for which the main command runs the exact engine
#: by default (each touched block is diagonalized on its own: the Neel J1-J2 ring at L = 20 has two of ~2,400)
EXACT_AUTO_MAX_BLOCK = 5_000
#: largest basis for which the exact thermal values (every symmetry block of the basis diagonalized) are
#: computed by default; beyond, thermal pure quantum states give them
EXACT_THERMAL_MAX_DIM = 60_000
#: largest basis for which the main command runs the KPM / typical-state estimates by default
#: (about a minute on 2 cores at L = 20 in a magnetization sector)
ESTIMATE_MAX_DIM = 300_000

#: smallest phase ||H|| dt an output step may turn: below it the state changes by less than the rounding of
#: a double (about 1e-16 per product, accumulated over the expansion), so the curve is noise (common practice)
MIN_PHASE_STEP = 1e-8

#: seed of the Lanczos start vector of the spectral bounds (identical bounds in every command)
BOUNDS_SEED = 20260101
#: default seed of the estimators' random vectors in the main command
ESTIMATOR_SEED = 20261201
#: default seed of the cross-check's random draws
CROSSCHECK_SEED = 20260202
#: default seed of a sweep's random vectors
SWEEP_SEED = 20260303
