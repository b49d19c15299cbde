"""Symmetry sectors (momentum, reflection, spin flip): spectra, projections, counts, quench curves.

Method: A. W. Sandvik, AIP Conf. Proc. 1297, 135 (2010) (representatives, normalisations, phases).
References of each check are given beside it.  Tolerances: spectra 1e-10 (dense eigvalsh, round-off
~1e-14); matrices 1e-12; relaxation curves 1e-10 absolute (Chebyshev tol 1e-13 in both runs).
"""

from __future__ import annotations

from math import comb

import numpy as np
import pytest

from largeq.basis.spaces import magnetization_basis
from largeq.engines.bounds import spectral_bounds
from largeq.engines.exact import diagonalize
from largeq.engines.kpm import chebyshev_moments
from largeq.engines.propagate import evolve
from largeq.operators.pauli_operator import PauliOperator
from largeq.model.pauli import PauliSum, pauli_string
from largeq.basis.counting import orbit_count, sector_dimension
from largeq.basis.states import basis_state
from largeq.basis.sectors import GroupSpec, orbit_representatives, sector_labels, symmetric_sector
from largeq.basis._sector_kernels import min_rotation, min_rotation_naive
from largeq.engines.sector_evolution import evolve_split
from largeq.operators.sector_operator import (CrossSectorDiagonal, SymmetricOperator, expand_to_magnetization,
                                              split_basis_state, stabiliser_average)


def ring(L, j1=1.0, j2=0.3, d1=1.0, d2=1.0, hz=0.0, xx_only=False):
    """J1-J2 XXZ ring in S = sigma/2 units, optional uniform z field h sum S^z (built independently here)."""
    out = None
    for r, J, D in ((1, j1, d1), (2, j2, d2)):
        if J == 0:
            continue
        for i in range(L):
            j = (i + r) % L
            for letter, c in (("X", J / 4), ("Y", J / 4), ("Z", 0.0 if xx_only else J * D / 4)):
                if c:
                    p = pauli_string(L, {i: letter, j: letter}, c)
                    out = p if out is None else out + p
    for i in range(L):
        if hz:
            out = out + pauli_string(L, {i: "Z"}, hz / 2)
    return out


def staggered(L):
    return PauliSum(L, np.zeros(L, np.int64), np.array([1 << j for j in range(L)]), np.array([(-1.0) ** j for j in range(L)]))


def neel(L):
    return sum(1 << j for j in range(1, L, 2))


# ----------------------------------------------------------------------------- helpers (independent code)
def _perm_states(states, L, j, p, f):
    """Apply T^j F^f R^p to integer states (plain Python bit loops)."""
    out = []
    full = (1 << L) - 1
    for s in states.tolist():
        if p:
            s = int(format(s, f"0{L}b")[::-1], 2)
        if f:
            s ^= full
        s = ((s << j) | (s >> (L - j))) & full if j else s
        out.append(s)
    return np.array(out)


def explicit_projector(L, n_up, m, r, f):
    """P_chi = (1/|G|) sum_g conj(chi(g)) g as a dense matrix on the magnetization sector."""
    b = magnetization_basis(L, n_up)
    st = b.states()
    D = st.size
    P = np.zeros((D, D), complex)
    elems = [(j, p, ff) for j in range(L) for p in ((0, 1) if r else (0,)) for ff in ((0, 1) if f else (0,))]
    for j, p, ff in elems:
        chi = np.exp(2j * np.pi * m * j / L) * ((r if p else 1)) * ((f if ff else 1))
        img = b.index(_perm_states(st, L, j, p, ff))
        P[img, np.arange(D)] += np.conj(chi)
    return P / len(elems), b


# ----------------------------------------------------------------------------- representatives
def test_min_rotation_matches_naive_scan():
    """The zero-run candidate search equals a scan over all L rotations (random words, L = 5..40)."""
    rng = np.random.default_rng(3)
    for L in (5, 8, 13, 24, 31, 40):
        full = (1 << L) - 1
        for s in rng.integers(0, 1 << L, 400).tolist() + [0, full, 1, full - 1]:
            v, j = min_rotation(np.int64(s), np.int64(L), np.int64(full))
            assert v == min_rotation_naive(np.int64(s), np.int64(L), np.int64(full))[0]
            assert (((s << j) | (s >> (L - j))) & full if j else s) == v  # j is a rotation reaching the minimum


@pytest.mark.parametrize("L,n_up,t,r,f", [(8, 4, True, True, True), (9, 4, True, True, False), (10, 3, True, False, False),
                                          (10, 5, False, True, True), (12, 6, True, False, True)])
def test_representatives_are_orbit_minima(L, n_up, t, r, f):
    """Each representative is the smallest member of its orbit; orbits partition the sector; count = Burnside."""
    orb = orbit_representatives(GroupSpec(L, n_up, t, r, f))
    st = magnetization_basis(L, n_up).states()
    seen = set()
    for rep in orb.reps.tolist():
        members = {int(v) for j in (range(L) if t else (0,)) for p in ((0, 1) if r else (0,))
                   for ff in ((0, 1) if f else (0,)) for v in _perm_states(np.array([rep]), L, j, p, ff)}
        assert min(members) == rep
        assert not (members & seen)
        seen |= members
    assert seen == set(st.tolist())
    assert orb.count == orbit_count(L, n_up, translation=t, reflection=r, spin_flip=f)


# ----------------------------------------------------------------------------- counts
@pytest.mark.parametrize("L", [6, 7, 8, 10])
def test_sector_dimensions_match_brute_force(L):
    """Burnside-with-characters dimensions equal the rank of the explicit projector and the enumerated
    basis size, for every sector label at every magnetization (flip only at n_up = L/2)."""
    for n_up in range(L + 1):
        labels = sector_labels(L, n_up, reflection=True, spin_flip=(2 * n_up == L)) + sector_labels(L, n_up)
        total_r = 0
        for lab in labels:
            d = sector_dimension(L, n_up, **lab)
            sec = symmetric_sector(L, n_up, momentum=lab["momentum"], reflection=lab["reflection"], flip=lab["flip"])
            assert sec.dim == d, (L, n_up, lab)
            if L <= 8 and n_up in (L // 2, 2):
                P, _ = explicit_projector(L, n_up, lab["momentum"], lab["reflection"], lab["flip"])
                assert round(np.trace(P).real) == d  # trace of a projector = its rank
        # the decomposition with reflection / flip is complete
        for lab in sector_labels(L, n_up, reflection=True, spin_flip=(2 * n_up == L)):
            total_r += sector_dimension(L, n_up, **lab)
        assert total_r == comb(L, n_up)


def test_sector_dimension_large_L_is_exact_integer():
    """At L = 32 the momentum dimensions sum to C(32, 16) exactly (integer Ramanujan sums)."""
    assert sum(sector_dimension(32, 16, momentum=m) for m in range(32)) == comb(32, 16)
    assert sum(sector_dimension(32, 16, momentum=m, reflection=r, flip=f)
               for m in (0, 16) for r in (1, -1) for f in (1, -1)) + \
        sum(sector_dimension(32, 16, momentum=m, flip=f) for m in range(1, 32) if m != 16 for f in (1, -1)) == comb(32, 16)


# ----------------------------------------------------------------------------- spectra and projections
MODELS = {
    "j1j2_xxz": (lambda L: ring(L, 1.0, 0.3, 1.0, 0.7), True, True),   # (H, reflection, flip)
    "xx_chain": (lambda L: ring(L, 1.0, 0.0, xx_only=True), True, True),
    "z_field": (lambda L: ring(L, 1.0, 0.45, 0.8, 1.0, hz=0.37), True, False),
}


def _sectors(L, n_up, use_r, use_f):
    """All sectors of one decomposition, sharing orbit enumerations per group."""
    cache = {}
    for lab in sector_labels(L, n_up, reflection=use_r, spin_flip=use_f):
        g = GroupSpec(L, n_up, True, lab["reflection"] is not None, lab["flip"] is not None)
        if g not in cache:
            cache[g] = orbit_representatives(g)
        yield symmetric_sector(L, n_up, momentum=lab["momentum"], reflection=lab["reflection"], flip=lab["flip"],
                               orbits=cache[g])


@pytest.mark.parametrize("name,L", [("j1j2_xxz", 12), ("j1j2_xxz", 9), ("xx_chain", 10), ("z_field", 12),
                                    ("z_field", 11)])
def test_union_of_sector_spectra_is_magnetization_spectrum(name, L):
    """Union of sector spectra = spectrum of the magnetization sector (numpy eigvalsh), to 1e-10."""
    make, refl, flip = MODELS[name]
    H = make(L)
    for n_up in ({L // 2, 3} if L % 2 == 0 else {L // 2}):
        ref = np.linalg.eigvalsh(PauliOperator(H, magnetization_basis(L, n_up)).to_dense())
        for use_r, use_f in {(False, False), (refl, flip and 2 * n_up == L)}:
            ev = []
            for sec in _sectors(L, n_up, use_r, use_f):
                if sec.dim:
                    ev.append(np.linalg.eigvalsh(SymmetricOperator(H, sec).to_dense()))
            ev = np.sort(np.concatenate(ev))
            assert ev.size == ref.size
            np.testing.assert_allclose(ev, ref, atol=1e-10)


@pytest.mark.parametrize("L,n_up,m,r,f", [(8, 4, 0, 1, 1), (8, 4, 4, -1, -1), (8, 4, 4, 1, -1), (10, 5, 3, None, 1),
                                          (10, 5, 2, None, None), (9, 4, 2, None, None), (9, 3, 0, -1, None)])
def test_sector_operator_is_projected_hamiltonian(L, n_up, m, r, f):
    """Q^dagger H_u1 Q equals the sector matrix; Q Q^dagger equals the explicit projector P_chi; Q^dagger Q = 1."""
    H = ring(L, 1.0, 0.3, 1.0, 0.6)
    sec = symmetric_sector(L, n_up, momentum=m, reflection=r, flip=f)
    op = SymmetricOperator(H, sec)
    P, b = explicit_projector(L, n_up, m, r, f)
    if sec.dim == 0:
        assert abs(np.trace(P)) < 1e-12  # empty sector: the projector vanishes too
        return
    Q = np.column_stack([expand_to_magnetization(sec, e) for e in np.eye(sec.dim)])
    np.testing.assert_allclose(Q.conj().T @ Q, np.eye(sec.dim), atol=1e-12)
    np.testing.assert_allclose(Q @ Q.conj().T, P, atol=1e-12)
    Hu = PauliOperator(H, b).to_dense()
    np.testing.assert_allclose(op.to_dense(), Q.conj().T @ Hu @ Q, atol=1e-12)
    # matrix-free product and expectation agree with the matrix; real arithmetic at k = 0, pi
    rng = np.random.default_rng(0)
    x = rng.standard_normal(sec.dim) + 1j * rng.standard_normal(sec.dim)
    np.testing.assert_allclose(op @ x, op.to_dense() @ x, atol=1e-12)
    assert abs(op.expectation(x) - np.vdot(x, op.to_dense() @ x).real) < 1e-10
    y = rng.standard_normal(sec.dim) + 0j
    y0 = y.copy()
    op.fused_update(x, y, 0.5, -0.25, 2.0)
    np.testing.assert_allclose(y, 0.5 * (op.to_dense() @ x) - 0.25 * x + 2.0 * y0, atol=1e-12)
    assert (op.dtype == np.float64) == (2 * m % L == 0)
    st = op.stored()
    np.testing.assert_allclose(st @ x, op @ x, atol=1e-12)


@pytest.mark.parametrize("lookup", ["bisect", "block", "rank"])
def test_lookup_methods_agree(lookup):
    """The three representative lookups give the same matrix."""
    H = ring(12)
    a = SymmetricOperator(H, symmetric_sector(12, 6, momentum=3, lookup=lookup)).to_dense()
    b = SymmetricOperator(H, symmetric_sector(12, 6, momentum=3, lookup="bisect")).to_dense()
    np.testing.assert_array_equal(a, b)


def test_non_invariant_operator_is_refused():
    with pytest.raises(ValueError, match="not invariant"):
        SymmetricOperator(staggered(8), symmetric_sector(8, 4, momentum=0))
    with pytest.raises(ValueError, match="k = 0 or pi"):
        symmetric_sector(8, 4, momentum=1, reflection=1)


def test_exact_and_kpm_engines_accept_sector_operators():
    """diagonalize(to_csr) reproduces the sector eigenvalues; KPM mu_0 = <v|v> and mu_1 = <v|Ht|v>
    (Weisse et al., Rev. Mod. Phys. 78, 275 (2006))."""
    H = ring(12)
    sec = symmetric_sector(12, 6, momentum=2)
    op = SymmetricOperator(H, sec)
    spec = diagonalize(op.to_csr())
    np.testing.assert_allclose(spec.energies, np.linalg.eigvalsh(op.to_dense()), atol=1e-10)
    spec2 = diagonalize(op)
    np.testing.assert_allclose(spec2.energies, spec.energies, atol=1e-10)
    bnd = spectral_bounds(op)
    v = np.random.default_rng(1).standard_normal(sec.dim) + 0j
    mu = chebyshev_moments(op, v, 20, bnd)
    e = np.linalg.eigh(op.to_dense())
    a = (bnd.e_max - bnd.e_min) / (2 - 0.01)
    bc = (bnd.e_max + bnd.e_min) / 2
    c = e[1].conj().T @ v
    x = (e[0] - bc) / a
    ref = [float(np.sum(np.abs(c) ** 2 * np.cos(n * np.arccos(np.clip(x, -1, 1))))) for n in range(20)]
    np.testing.assert_allclose(mu, ref, atol=1e-9)


# ----------------------------------------------------------------------------- states and dynamics
def test_neel_split_weights_and_sectors():
    """The Neel state lies in (k = 0, reflection +1, spin flip +1) and (k = pi, reflection -1, spin flip -1), weight 1/2 each:
    F|Neel> = T|Neel> = R|Neel> (derived; bit j = site j, 1 = up)."""
    comps, note = split_basis_state(neel(12), 12, reflection=True, spin_flip=True)
    assert sorted((c.sector.key, round(c.weight, 12)) for c in comps) == [((0, 1, 1), 0.5), ((6, -1, -1), 0.5)]
    # a state with weight at k != 0, pi: reflection is dropped and said so
    comps, note = split_basis_state(0b000000111111, 12, reflection=True, spin_flip=True)
    assert "reflection dropped" in note
    assert abs(sum(c.weight for c in comps) - 1) < 1e-12
    # reconstruct the basis state from its sector components
    psi = sum(expand_to_magnetization(c.sector, c.vector) for c in comps)
    e = basis_state(magnetization_basis(12, 6), 0b000000111111)
    np.testing.assert_allclose(psi, e, atol=1e-13)


def test_cross_sector_diagonal_observables_static():
    """<b|sigma^z_j|b> from the split components equals the bit value; cross terms carry it (the
    sector-diagonal part alone gives the stabiliser average, 0 for sigma^z_0 at the Neel state)."""
    L = 10
    comps, _ = split_basis_state(neel(L), L, reflection=True, spin_flip=True)
    obs = {f"z{j}": pauli_string(L, {j: "Z"}) for j in range(3)}
    obs["stag"] = staggered(L)
    cross = CrossSectorDiagonal([c.sector for c in comps], obs)
    vals = cross([c.vector for c in comps])
    for j in range(3):
        assert abs(vals[f"z{j}"] - (1 if (neel(L) >> j) & 1 else -1)) < 1e-13
    assert abs(vals["stag"] + L) < 1e-12
    assert abs(cross.diagonal_only([c.vector for c in comps])["z0"]) < 1e-13
    avg, differs = stabiliser_average(pauli_string(L, {0: "Z"}), neel(L), GroupSpec(L, L // 2, True, True, True))
    assert differs and len(avg) == L


def _u1_curves(H, L, bits, times, obs, tol):
    b = magnetization_basis(L, L // 2)
    ops = {k: PauliOperator(v, b) for k, v in obs.items()}
    out = {k: np.zeros(len(times)) for k in obs}

    def cb(i, t, psi):
        for k, o in ops.items():
            out[k][i] = o.expectation(psi)
    evolve(PauliOperator(H, b), basis_state(b, bits), times, on_output=cb, tol=tol)
    return out


@pytest.mark.parametrize("L", [12, 16])
def test_neel_relaxation_matches_magnetization_sector(L):
    """Staggered magnetization and sigma^z_0 from the Neel state of the J1-J2 ring (j2 = 0.3): sectors
    (cross terms included) vs. the magnetization-sector evolution, to 1e-10 absolute."""
    H = ring(L)
    times = np.linspace(0.0, 4.0, 9)
    obs = {"stag": staggered(L), "z0": pauli_string(L, {0: "Z"}), "z1": pauli_string(L, {1: "Z"})}
    res = evolve_split(H, neel(L), times, obs, reflection=True, spin_flip=True, tol=1e-13)
    ref = _u1_curves(H, L, neel(L), times, obs, 1e-13)
    for k in obs:
        np.testing.assert_allclose(res["curves"][k], ref[k], atol=1e-10, rtol=0)
    assert "z0" in res["equivalences"] and "stag" not in res["equivalences"]
    # the same with complex momentum sectors only (no R, no F): a state touching all k? The Neel state
    # touches k = 0 and pi only; a domain state touches every k and uses complex arithmetic
    dom = (1 << (L // 2)) - 1
    res2 = evolve_split(H, dom, times[:5], {"z0": obs["z0"]}, tol=1e-13, store_matrix=False)
    ref2 = _u1_curves(H, L, dom, times[:5], {"z0": obs["z0"]}, 1e-13)
    assert len(res2["sectors"]) > 2
    np.testing.assert_allclose(res2["curves"]["z0"], ref2["z0"], atol=1e-10, rtol=0)


@pytest.mark.slow
@pytest.mark.parametrize("L", [18, 20])
def test_neel_relaxation_matches_magnetization_sector_large(L):
    """As above at L = 18, 20 (slow)."""
    H = ring(L)
    times = np.linspace(0.0, 3.0, 4)
    obs = {"stag": staggered(L), "z0": pauli_string(L, {0: "Z"})}
    res = evolve_split(H, neel(L), times, obs, reflection=True, spin_flip=True, tol=1e-13)
    ref = _u1_curves(H, L, neel(L), times, obs, 1e-13)
    for k in obs:
        np.testing.assert_allclose(res["curves"][k], ref[k], atol=1e-10, rtol=0)


def test_stored_matrix_expectation_matches_matrix_free():
    # the stored-matrix operator must give the same <x|H|x> as the matrix-free one (and as CSR)
    import numpy as np

    from largeq.basis.sectors import symmetric_sector
    from largeq.operators.sector_operator import SymmetricOperator
    sys_path_bench = __import__("sys").path
    sys_path_bench.insert(0, str(__import__("pathlib").Path(__file__).resolve().parents[1] / "benchmarks"))
    from _common import j1j2_ring

    L = 12
    sec = symmetric_sector(L, L // 2, momentum=3)
    op = SymmetricOperator(j1j2_ring(L), sec)
    x = np.random.default_rng(2).normal(size=sec.dim) + 1j * np.random.default_rng(3).normal(size=sec.dim)
    ref = np.vdot(x, op.to_csr() @ x).real
    assert abs(op.stored().expectation(x) - ref) < 1e-10 * abs(ref)
    assert abs(op.expectation(x) - ref) < 1e-10 * abs(ref)
