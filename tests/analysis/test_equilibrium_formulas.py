"""Tests of largeq.analysis.equilibrium_formulas: bounds, level statistics, d_eff from densities, survival plateau."""

import numpy as np
import pytest
import scipy.linalg

from largeq.analysis.equilibrium_formulas import (GOE_R, GUE_R, POISSON_R, FiniteTime, amplitude_eta, deff_from_densities,
                                    fluctuation_bound, level_spacing_ratio, survival_plateau)
from largeq.engines.exact import diagonalize, quench_exact

from .._exact_models import (
    heisenberg,
    mixed_field_ising,
    neel_state,
    reflection_even_isometry,
    restrict,
    sector_indices,
    xx_chain,
)


# ----------------------------------------------------------------------------- bounds
def test_bound_variants_and_values():
    b = fluctuation_bound(2.0, 4.0)
    assert (b.value, b.variant) == (1.0, "norm")  # ||A||^2/d_eff, Reimann PRL 101, 190403 (2008)
    r = fluctuation_bound(2.0, 4.0, a_min=-1.0, a_max=2.0)
    assert r.value == pytest.approx(9 / 16) and r.variant == "range"
    g = fluctuation_bound(2.0, 4.0, gap_degeneracy=3)
    assert g.value == pytest.approx(3.0) and g.variant == "norm+gaps" and "Farrelly" in g.reference
    # Short & Farrelly, New J. Phys. 14, 013063 (2012): N(eps) (1 + 8 log2 d_E / (eps T)) ||A||^2 / d_eff
    ft = fluctuation_bound(1.0, 10.0, finite_time=FiniteTime(duration=100.0, eps=0.1, max_gaps=5, n_levels=64))
    assert ft.value == pytest.approx(5 * (1 + 8 * 6 / 10.0) / 10.0)
    assert ft.variant == "norm+finite-time" and ft.time_factor == pytest.approx(5.8)
    assert b.holds(1.0) and not b.holds(1.01)


@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(norm=-1.0, d_eff=2.0), "norm"),
        (dict(norm=1.0, d_eff=0.5), "d_eff"),
        (dict(norm=1.0, d_eff=2.0, a_min=0.0), "a_min"),
        (dict(norm=1.0, d_eff=2.0, a_min=1.0, a_max=0.0), "a_min <= a_max"),
        (dict(norm=1.0, d_eff=2.0, gap_degeneracy=0), "gap_degeneracy"),
    ],
)
def test_bound_errors(kwargs, match):
    with pytest.raises(ValueError, match=match):
        fluctuation_bound(**kwargs)


def test_finite_time_bound_holds_for_xx_chain():
    # Short & Farrelly (2012): the finite-time average of d(t) over [0, T] obeys the finite-time bound
    L = 8
    idx = sector_indices(L, L // 2)
    a = np.diag([1.0 if (b & 1) else -1.0 for b in idx])  # sigma^z_0 is diagonal in the basis
    q = quench_exact(diagonalize(restrict(xx_chain(L), idx)), neel_state(L, idx), {"z0": a})
    o = q.observables["z0"]
    T, eps = 50.0, 0.2
    t = np.linspace(0, T, 5001)
    d = (q.curve(t, "z0") - o.equilibrium) ** 2
    avg = np.trapezoid(d, t) / T
    n_levels = int(np.sum(q.level_weights > 1e-14))
    b = fluctuation_bound(o.norm, q.d_eff, finite_time=FiniteTime(T, eps, q.max_gaps_in_window(eps), n_levels))
    assert b.holds(avg)


# ----------------------------------------------------------------------------- level statistics
def test_reference_constants():
    # Oganesyan & Huse, PRB 75, 155111 (2007); Atas et al., PRL 110, 084101 (2013)
    assert POISSON_R == pytest.approx(0.3863, abs=1e-4)
    assert (GOE_R, GUE_R) == (0.5307, 0.5996)


def test_spacing_ratio_poisson_and_goe_samples():
    rng = np.random.default_rng(0)
    # Poisson process: sorted uniform numbers (Oganesyan & Huse 2007: <r> = 2 ln 2 - 1)
    p = level_spacing_ratio(rng.uniform(size=4000), central_fraction=1.0)
    assert abs(p.mean_r - POISSON_R) < 3 * p.stderr
    # GOE matrix, D = 1200 (Atas et al. 2013: 0.5307); tolerance 3 standard errors; central 600 levels -> 598 ratios
    x = rng.normal(size=(1200, 1200))
    g = level_spacing_ratio(scipy.linalg.eigvalsh(x + x.T))
    assert abs(g.mean_r - GOE_R) < 3 * g.stderr
    assert g.n == 598 and 0.004 < g.stderr < 0.02
    with pytest.raises(ValueError, match="central_fraction"):
        level_spacing_ratio(np.arange(10.0), central_fraction=0.0)


def test_spacing_ratio_mixed_field_ising_reflection_even():
    # Mixed-field Ising chain, J = 1, g = -1.05, h = 0.5 (M. C. Banuls, J. I. Cirac & M. B. Hastings,
    # PRL 106, 050405 (2011)), open ends, reflection-even sector, L = 13 (dimension 4160): GOE 0.5307
    # (Atas et al. 2013) within 3 statistical standard errors (measured 0.537 +- 0.007).
    L = 13
    p = reflection_even_isometry(L)
    e = scipy.linalg.eigvalsh((p.T @ mixed_field_ising(L) @ p).toarray(), check_finite=False)
    r = level_spacing_ratio(e)
    assert abs(r.mean_r - GOE_R) < 3 * r.stderr
    assert abs(r.mean_r - POISSON_R) > 10 * r.stderr


def test_spacing_ratio_drifts_when_sectors_are_mixed():
    # DESIGN.md section 5: mixing the reflection sectors drifts <r> towards Poisson (measured ~0.43 at L = 11)
    e = np.linalg.eigvalsh(mixed_field_ising(11).toarray())
    r = level_spacing_ratio(e)
    assert GOE_R - r.mean_r > 5 * r.stderr


def test_spacing_ratio_strong_disorder_poisson():
    # random-field Heisenberg chain, W = 8, L = 12, n_up = 6, open, 5 seeded realizations:
    # Poisson 2 ln 2 - 1 (Oganesyan & Huse 2007); the error bar is the scatter over realizations / sqrt(5)
    # (it contains the sample-to-sample spread), tolerance 3 of those (measured 0.390 +- 0.004)
    L, W = 12, 8.0
    idx = sector_indices(L, L // 2)
    rs = []
    for seed in range(5):
        rng = np.random.default_rng(seed)
        e = scipy.linalg.eigvalsh(restrict(heisenberg(L, rng.uniform(-W, W, L)), idx), check_finite=False)
        rs.append(level_spacing_ratio(e).mean_r)
    mean, err = np.mean(rs), np.std(rs, ddof=1) / np.sqrt(len(rs))
    assert abs(mean - POISSON_R) < 3 * err + 1e-3  # 1e-3: floor for an accidentally tiny scatter
    assert GOE_R - mean > 0.1


# ----------------------------------------------------------------------------- eta
def test_amplitude_eta():
    # DESIGN.md section 4: eta = 3 - 4 w (1 - w) for real H; 2 for complex H
    assert amplitude_eta(np.array([0.6, 0.8]), True) == pytest.approx(3.0)
    assert amplitude_eta(np.exp(0.7j) * np.array([0.6, 0.8]), True) == pytest.approx(3.0)  # global phase
    L = 6
    plus_y = np.array([1.0 + 0j])
    for _ in range(L):
        plus_y = np.kron(plus_y, np.array([1.0, 1.0j]) / np.sqrt(2))
    assert amplitude_eta(plus_y, True) == pytest.approx(2.0)
    assert amplitude_eta(0.5, True) == pytest.approx(2.0)
    assert amplitude_eta(0.0, True) == pytest.approx(3.0)
    assert amplitude_eta(np.array([1.0, 0.0]), False) == 2.0
    with pytest.raises(ValueError, match="weight"):
        amplitude_eta(1.5, True)


# ----------------------------------------------------------------------------- d_eff from densities
def _broadened(e, p, grid, width):
    g = np.exp(-0.5 * ((grid[:, None] - e[None, :]) / width) ** 2) / (np.sqrt(2 * np.pi) * width)
    return g @ p, g.sum(axis=1)


def test_deff_from_densities_goe():
    # GOE, D = 1500, initial states = basis vectors: real Porter-Thomas amplitudes, eta = 3
    # (Izrailev, Phys. Rep. 196, 299 (1990)). Exact densities broadened by 0.05 (~40 level spacings).
    # For one state the exact sum p^2 scatters by sqrt(96 D)/(3 D) ~ 8 % (chi^2_1 moments), so each ratio
    # must be within 25 % (3 sigma) and the mean of 20 states within 5 % (~2.7 sigma of the mean).
    rng = np.random.default_rng(7)
    d = 1500
    x = rng.normal(size=(d, d))
    s = diagonalize((x + x.T) / np.sqrt(2 * d))
    grid = np.linspace(-2.6, 2.6, 1041)
    ratios = []
    for k in range(0, d, 75):
        p = s.vectors[k] ** 2
        ldos, dos = _broadened(s.energies, p, grid, 0.05)
        est = deff_from_densities(grid, ldos, dos, eta=amplitude_eta(np.eye(d)[k], True))
        assert not est.narrow and est.ldos_norm == pytest.approx(1.0, abs=1e-6)
        ratios.append(est.d_eff * np.sum(p**2))
    ratios = np.array(ratios)
    assert np.all(np.abs(ratios - 1) < 0.25)
    assert abs(ratios.mean() - 1) < 0.05


def test_deff_from_densities_misses_for_integrable_xx():
    # DESIGN.md section 4: the random-matrix estimate misses for integrable chains. XX chain L = 10,
    # n_up = 5, Neel state: the estimate is measured 1.59x the exact d_eff = 32; assert > 15 % off.
    L = 10
    idx = sector_indices(L, L // 2)
    s = diagonalize(restrict(xx_chain(L), idx))
    psi = neel_state(L, idx)
    q = quench_exact(s, psi)
    p = np.abs(s.vectors.T @ psi) ** 2
    grid = np.linspace(s.energies[0] - 1, s.energies[-1] + 1, 801)
    ldos, dos = _broadened(s.energies, p, grid, np.sqrt(q.energy_variance) / 10)
    est = deff_from_densities(grid, ldos, dos, eta=3.0)
    assert abs(est.d_eff / q.d_eff - 1) > 0.15


def test_deff_flags_errors_and_mask():
    grid = np.linspace(-5, 5, 2001)
    dos = 100 * np.exp(-grid**2 / 2) / np.sqrt(2 * np.pi)
    narrow = np.exp(-grid**2 / (2 * 0.01**2)) / (np.sqrt(2 * np.pi) * 0.01)
    est = deff_from_densities(grid, narrow, dos, eta=3.0, resolution=0.05)
    assert est.narrow and "Izrailev" in est.assumption
    # ldos = dos / D: int rho_psi^2 / rho = 1 / D  ->  d_eff = D / eta
    broad = deff_from_densities(grid, dos / 100, dos, eta=2.0, dos_err=0.1 * dos, ldos_err=0.05 * dos / 100)
    assert broad.d_eff == pytest.approx(50.0, rel=1e-3) and not broad.narrow
    assert broad.d_eff_low < broad.d_eff < broad.d_eff_high
    # a DOS that vanishes on one side: masked, the LDOS weight there is reported
    cut = np.where(grid < 4.0, dos, 0.0)
    m = deff_from_densities(grid, dos / 100, cut, eta=3.0)
    assert np.isfinite(m.d_eff) and 0 < m.masked_weight < 1e-3
    with pytest.raises(ValueError, match="eta"):
        deff_from_densities(grid, dos, dos, eta=0.0)
    with pytest.raises(ValueError, match="increasing"):
        deff_from_densities(grid[::-1], dos, dos, eta=3.0)


# ----------------------------------------------------------------------------- survival plateau
def test_survival_plateau_matches_ipr():
    # DESIGN.md section 4: the long-time average of the survival probability is sum_E p_E^2
    L = 8
    rng = np.random.default_rng(4)
    h = mixed_field_ising(L).toarray()
    psi = np.zeros(2**L)
    psi[rng.integers(2**L)] = 1.0  # a product state
    q = quench_exact(diagonalize(h), psi)
    t = np.linspace(0.0, 4000.0, 40001)
    plateau = survival_plateau(t, q.survival(t), window=(200.0, 4000.0))
    assert abs(plateau.mean - q.ipr) < 4 * plateau.stderr
    assert plateau.stderr < 0.2 * q.ipr
    with pytest.raises(ValueError, match="window"):
        survival_plateau(t, q.survival(t), window=(5.0, 1.0))
