"""Tests of largeq.engines.exact (dense diagonalization and the exact quench analysis)."""

import numpy as np
import pytest
import scipy.linalg
import scipy.sparse.linalg as spla

from largeq.analysis.equilibrium_formulas import fluctuation_bound
from largeq.engines.exact import (
    MAX_DENSE_DIM,
    Spectrum,
    diagonalize,
    quench_exact,
    quench_sectors,
)

from .._exact_models import (
    heisenberg,
    mixed_field_ising,
    neel_state,
    restrict,
    sector_indices,
    site_op,
    xx_chain,
)

A3 = np.ones((3, 3)) - np.eye(3)
PSI3 = np.ones(3) / np.sqrt(3)


def _direct_values(h, psi, a, times):
    """<psi(t)|A|psi(t)> by an independent numpy eigendecomposition, all times at once."""
    e, v = np.linalg.eigh(h)
    c = v.conj().T @ psi
    states = v @ (np.exp(-1j * np.outer(e, times)) * c[:, None])  # (D, T)
    return np.real(np.sum(states.conj() * (a @ states), axis=0))


# ----------------------------------------------------------------------------- three-level checks
def test_three_level_nondegenerate():
    # DESIGN.md section 5 (derived): H = diag(0,1,3), psi = (1,1,1)/sqrt3, A = ones - I
    q = quench_exact(diagonalize(np.diag([0.0, 1.0, 3.0])), PSI3, {"A": A3})
    o = q.observables["A"]
    t = np.linspace(0.0, 20.0, 301)
    np.testing.assert_allclose(q.curve(t, "A"), (2 / 3) * (np.cos(t) + np.cos(2 * t) + np.cos(3 * t)), atol=1e-12)
    assert q.d_eff == pytest.approx(3.0)
    assert o.equilibrium == pytest.approx(0.0, abs=1e-14)
    assert o.variance == pytest.approx(2 / 3, rel=1e-12)
    assert o.variance_nondegenerate == pytest.approx(2 / 3, rel=1e-12)
    assert q.gap_degeneracy == 1
    assert (o.a_min, o.a_max, o.norm) == pytest.approx((-1.0, 2.0, 2.0))
    b = fluctuation_bound(o.norm, q.d_eff)
    assert b.value == pytest.approx(4 / 3) and b.holds(o.variance)
    br = fluctuation_bound(o.norm, q.d_eff, a_min=o.a_min, a_max=o.a_max)
    assert br.value == pytest.approx(3 / 4) and br.holds(o.variance)


def test_three_level_degenerate_gaps():
    # DESIGN.md section 5 (derived): H = diag(0,1,2) has the gap 1 twice; sigma^2 = 10/9
    q = quench_exact(diagonalize(np.diag([0.0, 1.0, 2.0])), PSI3, {"A": A3})
    o = q.observables["A"]
    t = np.linspace(0.0, 20.0, 301)
    np.testing.assert_allclose(q.curve(t, "A"), (2 / 3) * (2 * np.cos(t) + np.cos(2 * t)), atol=1e-12)
    assert o.variance == pytest.approx(10 / 9, rel=1e-12)
    # the non-degenerate formula sum p_m p_n |A_mn|^2 gives 2/3 here, which is wrong
    assert o.variance_nondegenerate == pytest.approx(2 / 3, rel=1e-12)
    assert q.gap_degeneracy == 2
    assert q.max_gaps_in_window(0.5) == 2
    assert q.max_gaps_in_window(1.5) == 3  # gaps 1, 1, 2 in [1, 2.5]
    b = fluctuation_bound(o.norm, q.d_eff, gap_degeneracy=q.gap_degeneracy)
    assert b.value == pytest.approx(8 / 3) and b.holds(o.variance)
    # the tighter range bound (a_max - a_min)^2 / (4 d_eff) = 3/4 fails without D_G and holds with it
    assert not fluctuation_bound(o.norm, q.d_eff, a_min=o.a_min, a_max=o.a_max).holds(o.variance)
    assert fluctuation_bound(o.norm, q.d_eff, a_min=o.a_min, a_max=o.a_max, gap_degeneracy=2).holds(o.variance)


def test_degenerate_eigenspace_in_rotated_basis():
    # derived by hand: H = diag(0, 0, 1), psi = (1,1,1)/sqrt3, A = ones - I
    # <A(t)> = 2/3 + (4/3) cos t  ->  <A>_inf = 2/3, sigma^2 = 8/9, p_E = (2/3, 1/3), d_eff = 9/5.
    # Rotate by a random orthogonal U so that the eigensolver returns an arbitrary basis of the doublet.
    rng = np.random.default_rng(11)
    u, _ = np.linalg.qr(rng.normal(size=(3, 3)))
    h = u @ np.diag([0.0, 0.0, 1.0]) @ u.T
    q = quench_exact(diagonalize(h), u @ PSI3, {"A": u @ A3 @ u.T})
    o = q.observables["A"]
    np.testing.assert_allclose(q.level_weights, [2 / 3, 1 / 3], atol=1e-12)
    np.testing.assert_array_equal(q.level_multiplicity, [2, 1])
    assert q.d_eff == pytest.approx(9 / 5)
    assert o.equilibrium == pytest.approx(2 / 3)
    assert o.variance == pytest.approx(8 / 9)
    t = np.linspace(0, 10, 51)
    np.testing.assert_allclose(q.curve(t, "A"), 2 / 3 + (4 / 3) * np.cos(t), atol=1e-12)
    # survival |2/3 + e^{-it}/3|^2, infinite-time average sum p_E^2 = 5/9
    np.testing.assert_allclose(q.survival(t), np.abs(2 / 3 + np.exp(-1j * t) / 3) ** 2, atol=1e-12)
    assert q.ipr == pytest.approx(5 / 9)


# ----------------------------------------------------------------------------- diagonalize
def test_diagonalize_linear_operator_and_errors():
    L = 6
    h = mixed_field_ising(L)
    dense = diagonalize(h.toarray())
    op = spla.aslinearoperator(h)
    lin = diagonalize(op)
    np.testing.assert_allclose(lin.energies, dense.energies, atol=1e-12)
    np.testing.assert_allclose(np.abs(lin.vectors.conj().T @ h @ lin.vectors), np.diag(np.abs(lin.energies)), atol=1e-10)
    with pytest.raises(ValueError, match="not Hermitian"):
        diagonalize(np.array([[0.0, 1.0], [0.0, 0.0]]))
    with pytest.raises(ValueError, match="GiB"):
        n = MAX_DENSE_DIM + 1
        diagonalize(spla.LinearOperator((n, n), matvec=lambda x: x, dtype=float))
    with pytest.raises(ValueError, match="square"):
        diagonalize(np.zeros((2, 3)))


def test_quench_input_errors():
    s = diagonalize(np.diag([0.0, 1.0]))
    with pytest.raises(ValueError, match="normalised"):
        quench_exact(s, np.array([1.0, 1.0]))
    with pytest.raises(ValueError, match="length"):
        quench_exact(s, np.ones(3) / np.sqrt(3))
    with pytest.raises(ValueError, match="Hermitian"):
        quench_exact(s, np.array([1.0, 0.0]), {"B": np.array([[0.0, 1.0], [0.0, 0.0]])})
    with pytest.raises(ValueError, match="shape"):
        quench_exact(s, np.array([1.0, 0.0]), {"B": np.eye(3)})


# ----------------------------------------------------------------------------- energy moments
def test_neel_energy_moments_heisenberg_ring():
    # DESIGN.md section 5: Neel state in the XXZ ring (J2 = 0): <H> = -L J Delta / 4, var H = L J^2 / 4
    L, delta = 8, 0.7
    idx = sector_indices(L, L // 2)
    h = restrict(heisenberg(L, None, J=1.0, delta=delta, periodic=True), idx)
    q = quench_exact(diagonalize(h), neel_state(L, idx))
    assert q.energy_mean == pytest.approx(-L * delta / 4, abs=1e-10)
    assert q.energy_variance == pytest.approx(L / 4, abs=1e-10)


def test_model_convention_against_quimb():
    # quimb (general-purpose library) as outside reference for tests/_exact_models.py: its site 0 is the most
    # significant bit and |0> is spin up (LIBRARY-NOTES.md), so permute the basis before comparing.
    qu = pytest.importorskip("quimb")
    L = 5
    ours = heisenberg(L, None, J=1.0).toarray()
    ref = np.asarray(qu.ham_heis(L, j=1.0, cyclic=False, sparse=False)).real
    perm = np.array([sum((1 - ((b >> j) & 1)) << (L - 1 - j) for j in range(L)) for b in range(2**L)])
    np.testing.assert_allclose(ours, ref[np.ix_(perm, perm)], atol=1e-12)


# ----------------------------------------------------------------------------- bound in every exact case
def _cases():
    rng = np.random.default_rng(2024)
    L = 8
    idx = sector_indices(L, L // 2)
    d = len(idx)
    hxx = restrict(xx_chain(L), idx)
    hdis = restrict(heisenberg(L, rng.uniform(-1, 1, L)), idx)
    rand_state = rng.normal(size=d) + 1j * rng.normal(size=d)
    rand_state /= np.linalg.norm(rand_state)
    x = rng.normal(size=(d, d)) + 1j * rng.normal(size=(d, d))
    rand_obs = (x + x.conj().T) / 2
    obs = {
        "z0": restrict(site_op(L, 0, "Z"), idx).real,
        "zz": restrict(site_op(L, 3, "Z") @ site_op(L, 4, "Z"), idx).real,
        "flip": restrict(site_op(L, 0, "X") @ site_op(L, 1, "X") + site_op(L, 0, "Y") @ site_op(L, 1, "Y"), idx),
        "random": rand_obs,
    }
    hfull = mixed_field_ising(7).toarray()
    psi_full = rng.normal(size=128)
    psi_full /= np.linalg.norm(psi_full)
    obs_full = {"x3": site_op(7, 3, "X").toarray().real, "z0": site_op(7, 0, "Z").toarray().real}
    return [
        ("xx neel", hxx, neel_state(L, idx), obs),
        ("xx random", hxx, rand_state, obs),
        ("disordered heisenberg neel", hdis, neel_state(L, idx), obs),
        ("three-level degenerate", np.diag([0.0, 1.0, 2.0]), PSI3, {"A": A3}),
        ("mixed-field ising full", hfull, psi_full, obs_full),
    ]


@pytest.mark.parametrize("case", _cases(), ids=lambda c: c[0])
def test_bound_holds_every_exact_case(case):
    # P. Reimann, PRL 101, 190403 (2008); A. J. Short & T. C. Farrelly, New J. Phys. 14, 013063 (2012):
    # sigma^2 <= D_G ||A||^2 / d_eff and <= D_G (a_max - a_min)^2 / (4 d_eff) for every state and observable
    _, h, psi, obs = case
    q = quench_exact(diagonalize(h), psi, obs)
    for o in q.observables.values():
        assert fluctuation_bound(o.norm, q.d_eff, gap_degeneracy=q.gap_degeneracy).holds(o.variance)
        assert fluctuation_bound(o.norm, q.d_eff, a_min=o.a_min, a_max=o.a_max,
                                 gap_degeneracy=q.gap_degeneracy).holds(o.variance)
        assert o.variance >= 0


def test_xx_chain_has_degenerate_gaps():
    # free fermions: many-body gaps are sums of single-particle differences, so they repeat
    L = 8
    idx = sector_indices(L, L // 2)
    q = quench_exact(diagonalize(restrict(xx_chain(L), idx)), neel_state(L, idx),
                     {"z0": restrict(site_op(L, 0, "Z"), idx).real})
    assert q.gap_degeneracy > 1 and q.n_degenerate_gaps > 0
    o = q.observables["z0"]
    assert o.variance > 2 * o.variance_nondegenerate  # the degenerate terms matter a lot here


# ----------------------------------------------------------------------------- sigma^2 vs direct time average
def _long_time_average_check(h, psi, a, seed):
    q = quench_exact(diagonalize(h), psi, {"A": a})
    o = q.observables["A"]
    rng = np.random.default_rng(seed)
    times = rng.uniform(1e3, 1e7, 4000)
    vals = np.concatenate([_direct_values(h, psi, a, times[i : i + 500]) for i in range(0, times.size, 500)])
    # spot check of the direct reference against scipy.linalg.expm at two late times
    for t in times[:2]:
        pt = scipy.linalg.expm(-1j * t * h) @ psi
        assert np.real(np.vdot(pt, a @ pt)) == pytest.approx(_direct_values(h, psi, a, [t])[0], abs=1e-7)
    d = (vals - o.equilibrium) ** 2
    # independent uniform random late times: the sample mean of d has standard error std(d)/sqrt(n);
    # 4 standard errors is a 6e-5 false-alarm rate (the residual bias ~ 1/(delta E T) is far smaller)
    err = d.std(ddof=1) / np.sqrt(d.size)
    assert abs(d.mean() - o.variance) < 4 * err
    assert abs(vals.mean() - o.equilibrium) < 4 * vals.std(ddof=1) / np.sqrt(vals.size)
    return q, o, d.mean(), err


def test_variance_equals_long_time_average_xx_degenerate():
    L = 8
    idx = sector_indices(L, L // 2)
    q, o, dm, err = _long_time_average_check(restrict(xx_chain(L), idx), neel_state(L, idx),
                                             restrict(site_op(L, 0, "Z"), idx).real, 5)
    # here the non-degenerate formula is far outside the sampling error: the gap grouping is needed
    assert abs(dm - o.variance_nondegenerate) > 20 * err


def test_variance_equals_long_time_average_chaotic():
    L = 8
    rng = np.random.default_rng(9)
    psi = rng.normal(size=2**L) + 1j * rng.normal(size=2**L)
    psi /= np.linalg.norm(psi)
    x = rng.normal(size=(2**L, 2**L))
    _long_time_average_check(mixed_field_ising(L).toarray(), psi, (x + x.T) / 2, 6)


def test_curve_matches_expm():
    L = 6
    h = heisenberg(L, np.linspace(-1, 1, L), delta=0.5).toarray()
    psi = neel_state(L)
    a = site_op(L, 2, "Z").toarray().real
    q = quench_exact(diagonalize(h), psi, {"z2": a})
    t = np.array([0.0, 0.3, 1.7, 12.5])
    ref = [np.real(np.vdot(p, a @ p)) for p in (scipy.linalg.expm(-1j * tt * h) @ psi for tt in t)]
    np.testing.assert_allclose(q.curve(t, "z2"), ref, atol=1e-10)
    assert q.curve(t)["z2"] == pytest.approx(q.curve(t, "z2"))
    assert q.observables["z2"].initial == pytest.approx(1.0)


# ----------------------------------------------------------------------------- several sectors
def _split(h, psi, L):
    sectors, pos = [], []
    for n in range(L + 1):
        idx = sector_indices(L, n)
        if np.linalg.norm(psi[idx]) > 0:
            sectors.append((diagonalize(restrict(h, idx)), psi[idx]))
            pos.append(idx)
    return sectors, pos


@pytest.mark.parametrize("model", ["disordered", "xx"])
def test_sectors_match_full_space(model):
    # a random product state touches every magnetization sector; sigma^x_0 connects neighbouring sectors.
    # "xx" has spin-flip symmetry: sectors n and L - n share their energies, so levels must merge across sectors.
    L = 6
    rng = np.random.default_rng(3)
    h = xx_chain(L) if model == "xx" else heisenberg(L, rng.uniform(-2, 2, L), delta=0.6)
    one = [rng.normal(size=2) + 1j * rng.normal(size=2) for _ in range(L)]
    psi = np.array([1.0 + 0j])
    for j in reversed(range(L)):  # site L-1 most significant
        psi = np.kron(psi, one[j] / np.linalg.norm(one[j]))
    ops = {"x0": site_op(L, 0, "X"), "z1": site_op(L, 1, "Z")}
    full = quench_exact(diagonalize(h.toarray()), psi, {k: v.toarray() for k, v in ops.items()})
    sectors, pos = _split(h, psi, L)
    blocks = {}
    for name, op in ops.items():
        blocks[name] = {}
        for s, ids in enumerate(pos):
            for r, idr in enumerate(pos):
                blk = op.tocsr()[ids][:, idr]
                if blk.nnz and s <= r:  # (r, s) filled in as the conjugate transpose
                    blocks[name][(s, r)] = blk.toarray()
    split = quench_sectors(sectors, blocks)
    assert split.d_eff == pytest.approx(full.d_eff, rel=1e-9)
    assert split.gap_degeneracy == full.gap_degeneracy
    np.testing.assert_allclose(split.level_energies, full.level_energies, atol=1e-9)
    np.testing.assert_array_equal(split.level_multiplicity, full.level_multiplicity)
    for name in ops:
        a, b = split.observables[name], full.observables[name]
        assert a.equilibrium == pytest.approx(b.equilibrium, abs=1e-10)
        assert a.variance == pytest.approx(b.variance, rel=1e-8)
        assert a.norm == pytest.approx(b.norm, rel=1e-9)
    t = np.linspace(0, 5, 11)
    np.testing.assert_allclose(split.curve(t, "x0"), full.curve(t, "x0"), atol=1e-10)
    if model == "xx":
        assert np.any(split.level_multiplicity > 1)


def test_sector_argument_errors():
    s = diagonalize(np.diag([0.0, 1.0]))
    with pytest.raises(ValueError, match="at least one"):
        quench_sectors([], {})
    with pytest.raises(ValueError, match="sector indices"):
        quench_sectors([(s, np.array([1.0, 0.0]))], {"A": {(0, 1): np.eye(2)}})
    with pytest.raises(ValueError, match="Spectrum"):
        quench_sectors([(np.eye(2), np.array([1.0, 0.0]))], {})
    assert isinstance(s, Spectrum) and s.dim == 2
