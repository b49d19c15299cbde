"""Tests of largeq.engines.bounds against dense eigenvalues (numpy.linalg.eigvalsh)."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse.linalg as spla

from largeq.engines.bounds import SpectralBounds, lanczos_tridiagonal, spectral_bounds
from tests.reference_models import mixed_field_ising, xx_ring, xxz_j1j2_ring


def _random_hermitian(n, seed, complex_=True):
    rng = np.random.default_rng(seed)
    a = rng.standard_normal((n, n))
    if complex_:
        a = a + 1j * rng.standard_normal((n, n))
    return (a + a.conj().T) / 2


CASES = {
    # J2 = 0.3 J1, unequal anisotropies: away from the Majumdar-Ghosh point
    "xxz_j1j2_L9": lambda: xxz_j1j2_ring(9, 1.0, 0.3, 0.8, 1.3),
    # Bañuls, Cirac & Hastings, PRL 106, 050405 (2011) parameters
    "mixed_ising_L9": lambda: mixed_field_ising(9, 1.0, -1.05, 0.5),
    "xx_L10": lambda: xx_ring(10, 1.0),
    "complex_dense_300": lambda: _random_hermitian(300, 5),
    "real_dense_300": lambda: _random_hermitian(300, 6, complex_=False),
}


@pytest.mark.parametrize("name", sorted(CASES))
def test_bounds_contain_spectrum_and_are_tight(name):
    h = CASES[name]()
    dense = h.toarray() if hasattr(h, "toarray") else h
    ev = np.linalg.eigvalsh(dense)
    width = ev[-1] - ev[0]
    sb = spectral_bounds(h)
    assert sb.e_min <= ev[0] and sb.e_max >= ev[-1]
    # Ritz values lie inside the spectrum (Cauchy interlacing) and converge fast at the edges
    assert ev[0] - 1e-10 <= sb.ritz_min <= ev[0] + 1e-3 * width
    assert ev[-1] - 1e-3 * width <= sb.ritz_max <= ev[-1] + 1e-10
    # padding: 1% margin + residuals; tight to a few percent of the width
    assert (ev[0] - sb.e_min) <= 0.03 * width
    assert (sb.e_max - ev[-1]) <= 0.03 * width
    assert sb.center == pytest.approx((sb.e_max + sb.e_min) / 2)
    assert sb.half_width == pytest.approx((sb.e_max - sb.e_min) / 2)
    assert sb.steps == 60


def test_works_through_linear_operator_protocol_only():
    h = _random_hermitian(120, 11)
    ev = np.linalg.eigvalsh(h)
    lin = spla.LinearOperator(h.shape, matvec=lambda v: h @ v, dtype=h.dtype)
    sb = spectral_bounds(lin, steps=50)
    assert sb.e_min <= ev[0] and sb.e_max >= ev[-1]


def test_deterministic_given_seed_and_by_default():
    h = xxz_j1j2_ring(8, 1.0, 0.3, 0.8, 1.3)
    assert spectral_bounds(h) == spectral_bounds(h)
    assert spectral_bounds(h, rng=3) == spectral_bounds(h, rng=np.random.default_rng(3))
    # a different start vector gives (slightly) different Ritz data: the seed is really used
    assert spectral_bounds(h, rng=3, steps=10) != spectral_bounds(h, rng=4, steps=10)


def test_small_matrix_breakdown_is_exact():
    # N = 6 < steps: the Krylov space is the whole space, Ritz values are the eigenvalues
    h = _random_hermitian(6, 2)
    ev = np.linalg.eigvalsh(h)
    sb = spectral_bounds(h, steps=60, margin=0.0)
    assert sb.steps <= 6
    assert sb.ritz_min == pytest.approx(ev[0], abs=1e-10)
    assert sb.ritz_max == pytest.approx(ev[-1], abs=1e-10)


def test_v0_in_a_symmetry_sector_sees_only_that_sector():
    # block-diagonal H: a start vector in the first block never sees the second block
    h = np.diag([0.0, 1.0, 2.0, 10.0])
    sb = spectral_bounds(h, v0=np.array([1.0, 1.0, 1.0, 0.0]), margin=0.0)
    assert sb.ritz_max == pytest.approx(2.0, abs=1e-12)
    sb_full = spectral_bounds(h, margin=0.0)
    assert sb_full.ritz_max == pytest.approx(10.0, abs=1e-12)


def test_identity_gets_nonzero_width():
    h = 3.0 * np.eye(5)
    sb = spectral_bounds(h)
    assert sb.half_width > 0
    assert sb.e_min <= 3.0 <= sb.e_max
    assert sb.center == pytest.approx(3.0)


def test_kpm_scaling_maps_spectrum_inside_unit_interval():
    h = mixed_field_ising(8, 1.0, -1.05, 0.5)
    ev = np.linalg.eigvalsh(h.toarray())
    sb = spectral_bounds(h)
    a, b = sb.kpm_scaling(0.01)
    assert a == pytest.approx((sb.e_max - sb.e_min) / 1.99)
    x = (ev - b) / a
    assert x.min() > -1 + 0.004 and x.max() < 1 - 0.004
    with pytest.raises(ValueError, match="eps"):
        sb.kpm_scaling(2.0)


def test_lanczos_tridiagonal_reproduces_moments():
    # <v|H^k|v> = <e1|T^k|e1> for k < 2m (exact Krylov property)
    h = _random_hermitian(50, 9)
    v = np.random.default_rng(0).standard_normal(50) + 0j
    v /= np.linalg.norm(v)
    alpha, beta, m = lanczos_tridiagonal(h, v, 5)
    assert m == 5
    t = np.diag(alpha) + np.diag(beta[:-1], 1) + np.diag(beta[:-1], -1)
    for k in range(1, 8):
        exact = np.vdot(v, np.linalg.matrix_power(h, k) @ v).real
        assert np.linalg.matrix_power(t, k)[0, 0] == pytest.approx(exact, rel=1e-10, abs=1e-10)


@pytest.mark.parametrize("kwargs, match", [
    (dict(steps=0), "steps"),
    (dict(steps=2.5), "steps"),
    (dict(margin=-0.1), "margin"),
    (dict(margin=np.nan), "margin"),
    (dict(v0=np.ones(3)), "v0"),
    (dict(v0=np.zeros(4)), "v0"),
])
def test_bad_arguments(kwargs, match):
    with pytest.raises(ValueError, match=match):
        spectral_bounds(np.eye(4), **kwargs)


def test_non_square_op_rejected():
    with pytest.raises(ValueError, match="square"):
        spectral_bounds(np.ones((3, 4)))


def test_result_is_frozen():
    sb = spectral_bounds(np.diag([1.0, 2.0]))
    assert isinstance(sb, SpectralBounds)
    with pytest.raises(Exception):
        sb.e_min = 0.0  # type: ignore[misc]
