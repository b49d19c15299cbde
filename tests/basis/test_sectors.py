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
    # the two-pass assembly: every row sorted, no repeated column, no stored zero off the diagonal
    plain = op.assemble(coded=False)
    indptr, indices, data = plain.indptr, plain.indices, plain.data
    assert indices.dtype == np.int32 and indptr[-1] == indices.size == data.size
    # coded values (real sectors): the same matrix, one or two bytes an entry
    coded = op.assemble(coded=True)
    assert coded.coded == (op.dtype == np.float64)
    np.testing.assert_array_equal(coded.indices, indices)
    np.testing.assert_array_equal(coded.values(), data)
    np.testing.assert_allclose(op.stored(coded=True) @ x, op @ x, atol=1e-12)
    for i in range(sec.dim):
        row = indices[indptr[i]:indptr[i + 1]]
        assert np.all(np.diff(row) > 0) and i in row
        assert np.all((data[indptr[i]:indptr[i + 1]] != 0) | (row == i))


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
    sys_path_bench.insert(0, str(__import__("pathlib").Path(__file__).resolve().parents[2] / "benchmarks"))
    from _common import j1j2_ring

    L = 12
    sec = symmetric_sector(L, L // 2, momentum=3)
    op = SymmetricOperator(j1j2_ring(L), sec)
    x = np.random.default_rng(2).normal(size=sec.dim) + 1j * np.random.default_rng(3).normal(size=sec.dim)
    ref = np.vdot(x, op.to_csr() @ x).real
    assert abs(op.stored().expectation(x) - ref) < 1e-10 * abs(ref)
    assert abs(op.expectation(x) - ref) < 1e-10 * abs(ref)


# ----------------------------------------------------------------------------- full-space sectors, tilted starts,
# ----------------------------------------------------------------------------- off-diagonal observables across sectors
def mixed_ising(L, J=1.0, g=-1.05, h=0.5):
    """H = sum_j J Z_j Z_{j+1} + g X_j + h Z_j on a ring (Pauli units), built independently here."""
    out = None
    for j in range(L):
        for p in (pauli_string(L, {j: "Z", (j + 1) % L: "Z"}, J), pauli_string(L, {j: "X"}, g),
                  pauli_string(L, {j: "Z"}, h)):
            if p is not None and abs(complex(p.coeff[0])) > 0:
                out = p if out is None else out + p
    return out


def tilted_spinors(theta, phi):
    """cos(theta/2)|up> + e^{i phi} sin(theta/2)|down> per site; columns (down, up) as in largeq."""
    theta, phi = np.asarray(theta, float), np.asarray(phi, float)
    return np.stack([np.exp(1j * phi) * np.sin(theta / 2), np.cos(theta / 2) + 0j], axis=1)


def _bond(L, i, j):
    return pauli_string(L, {i: "X", j: "X"}) + pauli_string(L, {i: "Y", j: "Y"}) + pauli_string(L, {i: "Z", j: "Z"})


def _offdiag_observables(L):
    return {
        "bond01": _bond(L, 0, 1),
        "xxyy_02": pauli_string(L, {0: "X", 2: "X"}) + pauli_string(L, {0: "Y", 2: "Y"}),
        "x_sum": sum((pauli_string(L, {j: "X"}) for j in range(1, L)), pauli_string(L, {0: "X"})),
        "y_sum": sum((pauli_string(L, {j: "Y"}) for j in range(1, L)), pauli_string(L, {0: "Y"})),
        "x3": pauli_string(L, {3: "X"}),
        "xy_14": pauli_string(L, {1: "X", 4: "Y"}) + pauli_string(L, {1: "Y", 4: "X"}),
        "z0": pauli_string(L, {0: "Z"}),
        "stag": staggered(L),
    }


def _plain_curves(H, basis, psi, times, obs, tol):
    ops = {k: PauliOperator(v, basis) for k, v in obs.items()}
    out = {k: np.zeros(len(times)) for k in obs}

    def cb(i, t, v):
        for k, o in ops.items():
            out[k][i] = o.expectation(v)
    evolve(PauliOperator(H, basis), psi, times, on_output=cb, tol=tol)
    return out


@pytest.mark.parametrize("L,t,r,f", [(8, True, True, True), (9, True, True, False), (10, True, False, True),
                                      (8, False, True, True)])
def test_sector_dimensions_from_characters(L, t, r, f):
    """Character-weighted Burnside counts equal the enumerated sector dimensions, at every n_up and for
    full-space sectors (n_up None), and the full-space sectors partition 2^L."""
    from largeq.operators.sector_operator import _characters, sector_dimensions

    keys = [(n, *ch) for n in list(range(L + 1)) + [None] for ch in _characters(L, t, r, f)
            if not (f and n is not None and 2 * n != L)]
    dims = sector_dimensions(L, keys, translation=t, reflection=r, spin_flip=f)
    for key, d in zip(keys, dims):
        n, m, rr, ff = key
        assert symmetric_sector(L, n, momentum=m, reflection=rr, flip=ff).dim == d, key
    if not r or all((2 * m) % L == 0 for m in range(L)):
        assert sum(d for k, d in zip(keys, dims) if k[0] is None) == 2 ** L


@pytest.mark.parametrize("L,r,f", [(8, True, False), (9, True, False), (8, True, True)])
def test_full_space_sector_spectra(L, r, f):
    """Union of full-space sector spectra = spectrum of H on 2^L states (numpy eigvalsh), to 1e-10:
    mixed-field Ising ring (no F) and the transverse-field ring (h = 0: F = prod X is a symmetry)."""
    from largeq.basis.spaces import full_basis

    H = mixed_ising(L, h=0.0 if f else 0.5)
    ref = np.linalg.eigvalsh(PauliOperator(H, full_basis(L)).to_dense())
    ev = []
    for lab in sector_labels(L, L // 2, reflection=r, spin_flip=f):
        sec = symmetric_sector(L, None, momentum=lab["momentum"], reflection=lab["reflection"], flip=lab["flip"])
        if sec.dim:
            ev.append(np.linalg.eigvalsh(SymmetricOperator(H, sec).to_dense()))
    ev = np.sort(np.concatenate(ev))
    assert ev.size == 2 ** L
    np.testing.assert_allclose(ev, ref, atol=1e-10)


@pytest.mark.parametrize("conserve", [False, True])
def test_tilted_split_norm_and_energy(conserve):
    """A uniform tilt lies in k = 0, R = + (per n_up when the magnetization is conserved): the weights
    sum to 1 and sum_s <psi_s|H|psi_s> equals the product-state energy to 1e-12.

    Analytic value (derived): a spin cos(theta/2)|up> + e^{i phi} sin(theta/2)|down> has Bloch vector
    (sin theta cos phi, sin theta sin phi, cos theta) (M. A. Nielsen and I. L. Chuang, Quantum
    Computation and Quantum Information, Cambridge (2000), sec. 1.2), and a product state factorises
    <Z_j Z_j+1> = cos^2 theta, so for the mixed-field Ising ring <H> = L (J cos^2 theta + g sin theta
    cos phi + h cos theta) in Pauli units; for the J1-J2 XXZ ring in S = sigma/2 units
    <H> = sum_r J_r L (sin^2 theta + D_r cos^2 theta) / 4 (neighbouring Bloch vectors equal)."""
    from largeq.operators.sector_operator import split_product_state

    L, theta, phi = 12, 0.83, 0.41
    sp = tilted_spinors(np.full(L, theta), np.full(L, phi))
    if conserve:
        H = ring(L, 1.0, 0.3, 1.0, 0.7)
        exact = sum(J * L * (np.sin(theta) ** 2 + D * np.cos(theta) ** 2) / 4 for J, D in ((1.0, 1.0), (0.3, 0.7)))
    else:
        J, g, h = 1.0, -1.05, 0.5
        H = mixed_ising(L, J, g, h)
        exact = L * (J * np.cos(theta) ** 2 + g * np.sin(theta) * np.cos(phi) + h * np.cos(theta))
    comps, note = split_product_state(sp, conserve_magnetization=conserve, reflection=True, spin_flip=False)
    assert all(c.sector.momentum == 0 and c.sector.reflection_parity == 1 for c in comps)
    assert (len(comps) == L + 1) if conserve else (len(comps) == 1 and comps[0].sector.up_spins is None)
    assert abs(sum(np.vdot(c.vector, c.vector).real for c in comps) - 1.0) < 1e-12
    energy = sum(SymmetricOperator(H, c.sector).expectation(c.vector) for c in comps)
    assert abs(energy - exact) < 1e-12
    # k = 0, R = + only: about 2^L / (2L) states instead of 2^L (224 at L = 12: the orbits with a
    # nontrivial stabiliser make it larger than 4096 / 24); more than L-fold smaller in any case
    total = sum(c.sector.dim for c in comps)
    assert 2 ** L / total > L


@pytest.mark.parametrize("kind", ["neel", "domain", "tilt_conserve", "tilt_full", "tilt_alternating"])
def test_offdiagonal_observables_across_sectors_static(kind):
    """<psi|A|psi> from the sector components (every pair of sectors) equals the full-space value
    (PauliOperator on 2^L states, independent code) to 1e-12 for bonds, XX+YY, sigma^x / sigma^y sums,
    a site-resolved sigma^x and mixed XY strings."""
    from largeq.basis.spaces import full_basis
    from largeq.basis.states import product_state
    from largeq.operators.sector_operator import sector_observables, split_start

    L = 10
    rng = np.random.default_rng(7)
    if kind == "neel":
        H, start = ring(L), neel(L)
        sp = np.zeros((L, 2), complex); sp[np.arange(L), [(start >> j) & 1 for j in range(L)]] = 1
    elif kind == "domain":
        H, start = ring(L), (1 << (L // 2)) - 1
        sp = np.zeros((L, 2), complex); sp[np.arange(L), [(start >> j) & 1 for j in range(L)]] = 1
    elif kind == "tilt_conserve":
        H = ring(L); sp = tilted_spinors(rng.uniform(0, np.pi, L), rng.uniform(0, 2 * np.pi, L)); start = sp
    elif kind == "tilt_full":
        H = mixed_ising(L); sp = tilted_spinors(rng.uniform(0, np.pi, L), rng.uniform(0, 2 * np.pi, L)); start = sp
    else:
        H = mixed_ising(L); sp = tilted_spinors(np.tile([0.4, 2.1], L // 2), np.tile([0.0, 1.3], L // 2)); start = sp
    comps, note = split_start(H, start, reflection=True, spin_flip=True)
    obs = _offdiag_observables(L)
    vals = sector_observables([c.sector for c in comps], obs)([c.vector for c in comps])
    fb = full_basis(L)
    psi, _ = product_state(fb, sp[:, 0], sp[:, 1])
    stored = sector_observables([c.sector for c in comps], obs, store=True)([c.vector for c in comps])
    for name, A in obs.items():
        assert abs(vals[name] - PauliOperator(A, fb).expectation(psi)) < 1e-12, (name, note)
        assert abs(stored[name] - vals[name]) < 1e-12, name  # the same blocks stored as CSR
    if kind == "tilt_alternating":  # invariant under T^2 only: k = 0 and k = pi
        assert sorted({c.sector.momentum for c in comps}) == [0, L // 2]


@pytest.mark.parametrize("L", [12, 14])
def test_offdiagonal_relaxation_neel_matches_magnetization_sector(L):
    """Bond energy, XX+YY at distance 2, sigma^z_0 and the staggered magnetization from the Neel state of
    the J1-J2 ring: sectors (all cross pairs) vs. the magnetization-sector evolution, to 1e-10."""
    H = ring(L)
    times = np.linspace(0.0, 3.0, 7)
    obs = {k: v for k, v in _offdiag_observables(L).items() if k in ("bond01", "xxyy_02", "z0", "stag", "xy_14")}
    res = evolve_split(H, neel(L), times, obs, reflection=True, spin_flip=True, tol=1e-13)
    b = magnetization_basis(L, L // 2)
    ref = _plain_curves(H, b, basis_state(b, neel(L)), times, obs, 1e-13)
    for k in obs:
        np.testing.assert_allclose(res["curves"][k], ref[k], atol=1e-10, rtol=0)
    assert abs(res["curves"]["bond01"][0] + 1.0) < 1e-12  # <Z0 Z1> = -1, XX + YY vanish on a basis state


def _tilted_case(L, model):
    from largeq.basis.spaces import full_basis
    from largeq.basis.states import product_state

    if model == "ising":
        H = mixed_ising(L)
        sp = tilted_spinors(np.full(L, np.pi / 3), np.zeros(L))
    else:  # XXZ ring, two-site tilt pattern (translation by two sites only)
        H = ring(L, 1.0, 0.3, 1.0, 0.7)
        sp = tilted_spinors(np.tile([0.7, 2.0], L // 2), np.tile([0.0, 0.9], L // 2))
    fb = full_basis(L)
    psi, _ = product_state(fb, sp[:, 0], sp[:, 1])
    return H, sp, fb, psi


@pytest.mark.parametrize("L,model", [(12, "ising"), (14, "ising"), (12, "xxz")])
def test_tilted_relaxation_matches_full_space(L, model):
    """Tilted starts evolved in sectors (full-space k = 0 sector for the mixed-field Ising ring; n_up-resolved
    k = 0, pi sectors for the XXZ ring) equal the full-space evolution, every observable, to 1e-10."""
    H, sp, fb, psi = _tilted_case(L, model)
    times = np.linspace(0.0, 3.0, 7)
    obs = _offdiag_observables(L)
    res = evolve_split(H, sp, times, obs, reflection=True, spin_flip=model == "xxz", tol=1e-13)
    ref = _plain_curves(H, fb, psi, times, obs, 1e-13)
    for k in obs:
        np.testing.assert_allclose(res["curves"][k], ref[k], atol=1e-10, rtol=0)
    if model == "ising":
        assert len(res["sectors"]) == 1 and 2 ** L / res["sectors"][0]["dimension"] > L


@pytest.mark.slow
@pytest.mark.parametrize("L,model", [(16, "neel"), (18, "ising"), (16, "xxz")])
def test_offdiagonal_and_tilted_relaxation_large(L, model):
    """As above at L = 16-18 (slow)."""
    times = np.linspace(0.0, 2.0, 3)
    if model == "neel":
        H = ring(L)
        obs = {k: v for k, v in _offdiag_observables(L).items() if k in ("bond01", "xxyy_02", "z0")}
        res = evolve_split(H, neel(L), times, obs, reflection=True, spin_flip=True, tol=1e-13)
        b = magnetization_basis(L, L // 2)
        ref = _plain_curves(H, b, basis_state(b, neel(L)), times, obs, 1e-13)
    else:
        H, sp, fb, psi = _tilted_case(L, model)
        obs = {k: v for k, v in _offdiag_observables(L).items() if k in ("bond01", "x_sum", "y_sum", "z0")}
        res = evolve_split(H, sp, times, obs, reflection=True, spin_flip=model == "xxz", tol=1e-13)
        ref = _plain_curves(H, fb, psi, times, obs, 1e-13)
    for k in obs:
        np.testing.assert_allclose(res["curves"][k], ref[k], atol=1e-10, rtol=0)


def test_stabiliser_averaged_observables_give_the_same_curves():
    """A sector run evaluates each observable's average over the symmetry operations fixing the Néel start
    (``observables_for_start``): the curves equal the magnetization-sector evolution of the observables
    themselves (reference: PauliOperator products on the n_up basis, independent of the sector code), and the
    averaged single bond no longer couples k = 0 to k = pi (fewer sector pairs, smaller stored blocks)."""
    from largeq.operators.sector_operator import (CrossSectorObservables, StoredSectorMatrix, is_invariant,
                                                  observables_for_start, split_start)

    L = 12
    H = ring(L)
    obs = {k: v for k, v in _offdiag_observables(L).items() if k in ("bond01", "xxyy_02", "z0", "stag", "xy_14")}
    comps, _ = split_start(H, neel(L), reflection=True, spin_flip=True)
    used, notes = observables_for_start(obs, neel(L), comps[0].sector.group)
    assert "bond01" in notes and "stabiliser" not in notes["bond01"]
    times = np.linspace(0.0, 2.0, 5)
    res = evolve_split(H, neel(L), times, used, reflection=True, spin_flip=True, tol=1e-13)
    b = magnetization_basis(L, L // 2)
    ref = _plain_curves(H, b, basis_state(b, neel(L)), times, obs, 1e-13)
    for k in obs:
        np.testing.assert_allclose(res["curves"][k], ref[k], atol=1e-10, rtol=0)
    group = comps[0].sector.group
    assert not all(is_invariant(obs["bond01"], group).values())
    assert all(is_invariant(used["bond01"], group).values())
    # stored, the averaged bond's diagonal blocks are sector operators (two-pass assembly, coded values)
    after = CrossSectorObservables([c.sector for c in comps], {"bond01": used["bond01"]}, store=True)
    assert after.stored and all(isinstance(m, StoredSectorMatrix) and m.matrix.coded for m in after.stored.values())
