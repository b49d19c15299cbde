"""Tests for largeq.model against independent dense references, quimb and closed formulas."""

from __future__ import annotations

import copy

import numpy as np
import pytest
import quimb
import scipy.sparse as sp

from largeq.model import build as model
from largeq.model.pauli import PauliSum
from largeq.scenario.spec import parse_scenario

# ---------------------------------------------------------------------- independent dense reference
# Single-site matrices in the basis (|down>, |up>) = (bit 0, bit 1).  sigma^y|up> = i|down>.
_SX = np.array([[0, 1], [1, 0]], dtype=complex)
_SY = np.array([[0, 1j], [-1j, 0]], dtype=complex)
_SZ = np.diag([-1.0, 1.0]).astype(complex)
_ID = np.eye(2, dtype=complex)


def site_letter(x, z, j):
    xb, zb = (x >> j) & 1, (z >> j) & 1
    return {(0, 0): _ID, (1, 0): _SX, (1, 1): _SY, (0, 1): _SZ}[(xb, zb)]


def dense(ps: PauliSum) -> np.ndarray:
    """Dense 2^L matrix of a Pauli sum: kron with site L-1 as the most significant factor."""
    L = ps.n_sites
    out = sp.csr_matrix((2**L, 2**L), dtype=complex)
    for x, z, c in zip(ps.x_mask.tolist(), ps.z_mask.tolist(), ps.coeff.tolist()):
        m = sp.csr_matrix(np.array([[1.0 + 0j]]))
        for j in range(L - 1, -1, -1):
            m = sp.kron(m, sp.csr_matrix(site_letter(x, z, j)), format="csr")
        out = out + c * m
    return out.toarray()


def op_on(L, ops: dict) -> np.ndarray:
    """Dense product of single-site matrices {site: 2x2}."""
    m = np.array([[1.0 + 0j]])
    for j in range(L - 1, -1, -1):
        m = np.kron(m, ops.get(j, _ID))
    return m


def quimb_perm(L):
    """q[b]: quimb index of our basis state b (quimb: site 0 most significant, |0> = up)."""
    b = np.arange(2**L)
    q = np.zeros_like(b)
    for j in range(L):
        bit = (b >> j) & 1
        q |= (1 - bit) << (L - 1 - j)
    return q


def from_quimb(Hq, L):
    Hq = Hq.toarray() if sp.issparse(Hq) else np.asarray(Hq)
    q = quimb_perm(L)
    return Hq[np.ix_(q, q)]


def scen(L, boundary="periodic", *, couplings=None, preset=None, fields=None, bonds=None, start=None,
         observe=None):
    d = {"chain": {"sites": L, "boundary": boundary},
         "start": start or {"state": "bits", "bits": "1" * L},
         "observe": observe or [{"name": "m0", "kind": "site", "site": 0}],
         "time": {"t_max": 1.0, "points": 2}}
    if preset:
        d["model"] = preset
    if couplings:
        d["coupling"] = couplings
    if fields:
        d["field"] = fields
    if bonds:
        d["bond"] = bonds
    return parse_scenario(d)


# ---------------------------------------------------------------------- the reference itself
def test_dense_reference_matches_documented_pauli_action():
    """dense() agrees with P|b> = i^{#Y} (-1)^{popcount(z & ~b)} |b ^ x> (largeq.model.pauli docstring)."""
    L = 3
    rng = np.random.default_rng(0)
    for _ in range(10):
        x, z = (int(v) for v in rng.integers(0, 2**L, 2))
        ps = PauliSum(L, np.array([x]), np.array([z]), np.array([1.0]))
        ny = (x & z).bit_count()
        ref = np.zeros((2**L, 2**L), dtype=complex)
        for b in range(2**L):
            ref[b ^ x, b] = 1j**ny * (-1) ** ((z & ~b).bit_count())
        np.testing.assert_allclose(dense(ps), ref, atol=1e-14)


# ---------------------------------------------------------------------- quimb cross-checks
@pytest.mark.parametrize("L,boundary", [(6, "periodic"), (7, "open"), (8, "periodic")])
def test_xyz_chain_with_field_matches_quimb_ham_heis(L, boundary):
    jx, jy, jz = 0.9, 0.6, 1.3
    bx, by, bz = 0.3, -0.2, 0.45
    s = scen(L, boundary, couplings=[{"range": 1, "x": jx, "y": jy, "z": jz}],
             fields={a: {"pattern": "uniform", "strength": -v} for a, v in zip("xyz", (bx, by, bz))})
    # quimb.ham_heis: H = sum J_a S^a S^a - sum B_a S^a  (hence strength = -B above)
    Hq = quimb.ham_heis(L, j=(jx, jy, jz), b=(bx, by, bz), cyclic=(boundary == "periodic"), sparse=True)
    np.testing.assert_allclose(dense(model.hamiltonian(s)), from_quimb(Hq, L), atol=1e-12)


@pytest.mark.parametrize("L", [8, 10])
def test_j1j2_preset_matches_quimb_ham_j1j2(L):
    j1, j2 = 1.0, 0.3
    s = scen(L, preset={"preset": "j1j2_ring", "j1": j1, "j2": j2})
    Hq = quimb.ham_j1j2(L, j1=j1, j2=j2, cyclic=True, sparse=True)
    np.testing.assert_allclose(dense(model.hamiltonian(s)), from_quimb(Hq, L), atol=1e-12)


def test_j1j2_explicit_with_z_field_matches_quimb_open():
    L, j1, j2, bz = 7, 0.8, 0.45, 0.35
    s = scen(L, "open", couplings=[{"range": 1, "xy": j1, "zz": j1}, {"range": 2, "xy": j2, "zz": j2}],
             fields={"z": {"pattern": "uniform", "strength": bz}})
    # quimb.ham_j1j2 uses +bz sum S^z (LIBRARY-NOTES.md)
    Hq = quimb.ham_j1j2(L, j1=j1, j2=j2, bz=bz, cyclic=False, sparse=True)
    np.testing.assert_allclose(dense(model.hamiltonian(s)), from_quimb(Hq, L), atol=1e-12)


def test_random_field_heisenberg_matches_quimb_plus_ikron_fields():
    L = 8
    s = scen(L, "open", preset={"preset": "random_field_heisenberg", "w": 2.5, "seed": 11})
    h = model.field_values(s)["z"]
    assert np.all(np.abs(h) <= 2.5) and np.ptp(h) > 0
    dims = (2,) * L
    Hq = quimb.ham_heis(L, j=1.0, cyclic=False, sparse=True).astype(complex)
    for j in range(L):
        Hq = Hq + h[j] * quimb.ikron(quimb.spin_operator("z", sparse=True), dims, j, sparse=True)
    np.testing.assert_allclose(dense(model.hamiltonian(s)), from_quimb(Hq, L), atol=1e-12)


def test_small_heisenberg_rings_ground_energies():
    # E0(L=4) = -2J, E0(L=6) = -(2 + sqrt 13)J/2 (exact small-ring values quoted in DESIGN.md §5)
    for L, e0 in [(4, -2.0), (6, -(2 + np.sqrt(13)) / 2)]:
        s = scen(L, couplings=[{"range": 1, "xy": 1.0, "zz": 1.0}])
        assert np.linalg.eigvalsh(dense(model.hamiltonian(s)))[0] == pytest.approx(e0, abs=1e-12)


# ---------------------------------------------------------------------- closed-form moments
J1J2_CASES = [(5, 1.0, 0.3, 1.0, 1.0), (6, 1.0, 0.5, 0.7, 1.4), (8, 0.8, 0.3, 1.0, 2.0), (8, 1.0, 0.0, 0.5, 1.0)]


@pytest.mark.parametrize("L,j1,j2,d1,d2", J1J2_CASES)
def test_j1j2_infinite_temperature_moments(L, j1, j2, d1, d2):
    # DESIGN.md §5: Tr H / D = 0, Tr H^2 / D = L [J1^2 (2 + D1^2) + J2^2 (2 + D2^2)] / 16 (ring, L >= 5)
    s = scen(L, preset={"preset": "j1j2_ring", "j1": j1, "j2": j2, "delta1": d1, "delta2": d2})
    H = model.hamiltonian(s)
    expect = L * (j1**2 * (2 + d1**2) + j2**2 * (2 + d2**2)) / 16
    # Pauli strings are trace-orthogonal: Tr H^2 / D = sum |c_s|^2, Tr H / D = identity coefficient
    assert float(np.sum(np.abs(H.coeff) ** 2)) == pytest.approx(expect, rel=1e-12)
    assert not np.any((H.x_mask == 0) & (H.z_mask == 0))
    Hd = dense(H)
    D = 2**L
    assert np.trace(Hd).real / D == pytest.approx(0.0, abs=1e-12)
    assert np.trace(Hd @ Hd).real / D == pytest.approx(expect, rel=1e-12)


@pytest.mark.parametrize("J,g,h", [(1.0, -1.05, 0.5), (0.7, 0.9045, 0.809)])
def test_mixed_field_ising_moment_and_pauli_units(J, g, h):
    L = 8
    s = scen(L, preset={"preset": "mixed_field_ising", "j": J, "g": g, "h": h})
    H = model.hamiltonian(s)
    # DESIGN.md §5: Tr H^2 / 2^L = L (J^2 + g^2 + h^2) in Pauli units (periodic)
    assert float(np.sum(np.abs(H.coeff) ** 2)) == pytest.approx(L * (J**2 + g**2 + h**2), rel=1e-12)
    ref = sum(J * op_on(L, {j: _SZ, (j + 1) % L: _SZ}) + g * op_on(L, {j: _SX}) + h * op_on(L, {j: _SZ})
              for j in range(L))
    np.testing.assert_allclose(dense(H), ref, atol=1e-12)


@pytest.mark.parametrize("L,j1,j2,d1,d2", [(8, 1.0, 0.3, 1.0, 1.0), (10, 1.0, 0.3, 0.6, 1.5), (8, 0.7, 0.2, 2.0, 0.5)])
def test_neel_energy_and_variance(L, j1, j2, d1, d2):
    # DESIGN.md §5: <H> = L(-J1 D1 + J2 D2)/4, <H^2> - <H>^2 = L J1^2 / 4
    s = scen(L, preset={"preset": "j1j2_ring", "j1": j1, "j2": j2, "delta1": d1, "delta2": d2},
             start={"state": "neel"})
    psi = model.initial_state(s).to_vector()
    Hd = dense(model.hamiltonian(s))
    e = np.vdot(psi, Hd @ psi).real
    var = np.vdot(Hd @ psi, Hd @ psi).real - e**2
    assert e == pytest.approx(L * (-j1 * d1 + j2 * d2) / 4, abs=1e-12)
    assert var == pytest.approx(L * j1**2 / 4, abs=1e-12)


# ---------------------------------------------------------------------- geometry details
def test_two_site_ring_counts_bond_once():
    s2 = scen(2, couplings=[{"range": 1, "xy": 1.0, "zz": 0.5}])
    ref = 0.25 * (op_on(2, {0: _SX, 1: _SX}) + op_on(2, {0: _SY, 1: _SY}) + 0.5 * op_on(2, {0: _SZ, 1: _SZ}))
    np.testing.assert_allclose(dense(model.hamiltonian(s2)), ref, atol=1e-14)


def test_half_length_range_on_ring_counts_each_pair_once():
    L = 6
    s = scen(L, couplings=[{"range": 3, "zz": 1.0}])
    ref = sum(0.25 * op_on(L, {j: _SZ, j + 3: _SZ}) for j in range(3))
    np.testing.assert_allclose(dense(model.hamiltonian(s)), ref, atol=1e-14)


def test_explicit_bonds_add_to_couplings():
    L = 5
    s = scen(L, "open", couplings=[{"range": 1, "zz": 1.0}], bonds=[{"sites": [4, 0], "x": 2.0, "y": 0.0, "z": 0.0}])
    ref = sum(0.25 * op_on(L, {j: _SZ, j + 1: _SZ}) for j in range(L - 1)) + 0.5 * op_on(L, {0: _SX, 4: _SX})
    np.testing.assert_allclose(dense(model.hamiltonian(s)), ref, atol=1e-14)


def test_staggered_and_values_fields():
    L = 4
    s = scen(L, "open", couplings=[{"range": 1, "zz": 1.0}],
             fields={"z": {"pattern": "staggered", "strength": 0.4},
                     "x": {"pattern": "values", "values": [0.1, 0.0, -0.3, 0.2]}})
    fv = model.field_values(s)
    np.testing.assert_allclose(fv["z"], [0.4, -0.4, 0.4, -0.4])
    np.testing.assert_allclose(fv["x"], [0.1, 0.0, -0.3, 0.2])
    np.testing.assert_allclose(fv["y"], 0.0)
    ref = sum(0.25 * op_on(L, {j: _SZ, j + 1: _SZ}) for j in range(L - 1)) \
        + sum(0.5 * fv["z"][j] * op_on(L, {j: _SZ}) + 0.5 * fv["x"][j] * op_on(L, {j: _SX}) for j in range(L))
    np.testing.assert_allclose(dense(model.hamiltonian(s)), ref, atol=1e-14)


# ---------------------------------------------------------------------- observables
OBS = [
    {"name": "sx3", "kind": "site", "axis": "x", "site": 3},
    {"name": "sy1", "kind": "site", "axis": "y", "site": 1},
    {"name": "stag", "kind": "sum", "axis": "z", "signs": "staggered"},
    {"name": "mx", "kind": "sum", "axis": "x", "signs": "uniform", "normalize": False},
    {"name": "weights", "kind": "sum", "axis": "y", "signs": [1.0, -2.0, 0.0, 0.5, 0.0, 0.0, 3.0]},
    {"name": "zz1", "kind": "zz", "distance": 1},
    {"name": "zz2", "kind": "zz", "distance": 2},
    {"name": "zz3", "kind": "zz", "distance": 3},
    {"name": "zz_pair", "kind": "zz", "distance": 2, "site": 1},
    {"name": "b01", "kind": "bond", "sites": [0, 1]},
    {"name": "b35", "kind": "bond", "sites": [5, 3]},
]


@pytest.mark.parametrize("L,boundary", [(7, "periodic"), (7, "open"), (6, "periodic"), (6, "open")])
def test_observable_norms_match_dense_extremes(L, boundary):
    obs = copy.deepcopy(OBS)
    obs[4]["signs"] = (obs[4]["signs"] + [1.0] * L)[:L]
    if boundary == "periodic" and L == 6:
        obs = [o for o in obs if o["name"] != "zz3"] + [{"name": "zz3", "kind": "zz", "distance": 3}]
    s = scen(L, boundary, couplings=[{"range": 1, "x": 1.0, "y": 0.6, "z": -0.8}, {"range": 2, "xy": 0.4, "zz": 1.1}],
             fields={"z": {"pattern": "uniform", "strength": 0.3}}, observe=obs)
    H = model.hamiltonian(s)
    built = model.observables(s, H)
    assert list(built) == [o["name"] for o in obs]
    for name, o in built.items():
        A = dense(o.pauli)
        ev = np.linalg.eigvalsh(A)
        assert o.norm_exact
        assert o.a_min == pytest.approx(ev[0], abs=1e-12), name
        assert o.a_max == pytest.approx(ev[-1], abs=1e-12), name
        assert o.norm == pytest.approx(np.max(np.abs(ev)), abs=1e-12), name
        assert o.description


def test_observable_operators_are_what_they_say():
    L = 6
    s = scen(L, couplings=[{"range": 1, "xy": 1.0, "zz": 0.5}], observe=[
        {"name": "stag", "kind": "sum", "axis": "z", "signs": "staggered"},
        {"name": "sy2", "kind": "site", "axis": "y", "site": 2},
        {"name": "zz", "kind": "zz", "distance": 1},
        {"name": "zzp", "kind": "zz", "distance": 2, "site": 5},
        {"name": "bond", "kind": "bond", "sites": [5, 0]},
    ])
    o = model.observables(s)
    np.testing.assert_allclose(dense(o["stag"].pauli), sum((-1) ** j * op_on(L, {j: _SZ}) for j in range(L)) / L, atol=1e-14)
    np.testing.assert_allclose(dense(o["sy2"].pauli), op_on(L, {2: _SY}), atol=1e-14)
    np.testing.assert_allclose(dense(o["zz"].pauli), sum(op_on(L, {j: _SZ, (j + 1) % L: _SZ}) for j in range(L)) / L, atol=1e-14)
    np.testing.assert_allclose(dense(o["zzp"].pauli), op_on(L, {5: _SZ, 1: _SZ}), atol=1e-14)
    ref_bond = 0.25 * (op_on(L, {5: _SX, 0: _SX}) + op_on(L, {5: _SY, 0: _SY}) + 0.5 * op_on(L, {5: _SZ, 0: _SZ}))
    np.testing.assert_allclose(dense(o["bond"].pauli), ref_bond, atol=1e-14)


def test_averaged_zz_minimum_brute_force():
    """a_min of averaged zz equals a brute-force minimum over classical configurations."""
    for L, boundary, r in [(5, "periodic", 1), (5, "periodic", 2), (9, "periodic", 3), (6, "periodic", 3),
                           (7, "open", 2), (10, "periodic", 4), (3, "periodic", 1)]:
        s = scen(L, boundary, couplings=[{"range": 1, "zz": 1.0}], observe=[{"name": "c", "kind": "zz", "distance": r}])
        o = model.observables(s)["c"]
        diag = np.real(np.diag(dense(o.pauli)))
        assert o.a_min == pytest.approx(diag.min(), abs=1e-12), (L, boundary, r)
        assert o.a_max == pytest.approx(diag.max(), abs=1e-12)


# ---------------------------------------------------------------------- initial states
def test_tilted_state_expectations():
    L = 4
    theta = [0.3, 1.1, 2.0, np.pi]
    phi = [0.0, 0.7, -1.2, 0.4]
    s = scen(L, couplings=[{"range": 1, "zz": 1.0}], start={"state": "tilted", "theta": theta, "phi": phi})
    st = model.initial_state(s)
    assert st.bits is None and st.up_spins is None
    psi = st.to_vector()
    assert np.vdot(psi, psi).real == pytest.approx(1.0)
    for j in range(L):
        ex = {a: np.vdot(psi, op_on(L, {j: m}) @ psi).real for a, m in (("x", _SX), ("y", _SY), ("z", _SZ))}
        assert ex["z"] == pytest.approx(np.cos(theta[j]), abs=1e-12)
        assert ex["x"] == pytest.approx(np.sin(theta[j]) * np.cos(phi[j]), abs=1e-12)
        assert ex["y"] == pytest.approx(np.sin(theta[j]) * np.sin(phi[j]), abs=1e-12)


def test_basis_states():
    L = 6
    cases = {"neel": 0b010101, "domain_wall": 0b000111}
    for state, bits in cases.items():
        st = model.initial_state(scen(L, couplings=[{"range": 1, "zz": 1.0}], start={"state": state}))
        assert st.bits == bits and st.up_spins == 3
        psi = st.to_vector()
        assert abs(psi[bits]) == pytest.approx(1.0) and np.count_nonzero(psi) == 1
        # spinor columns: 0 = down, 1 = up
        assert all(abs(st.spinors[j, (bits >> j) & 1]) == 1 for j in range(L))
    st = model.initial_state(scen(L, couplings=[{"range": 1, "zz": 1.0}], start={"state": "bits", "bits": "110001"}))
    assert st.bits == 0b100011 and st.up_spins == 3
    # a tilted state with all angles 0 / pi is a basis state
    st = model.initial_state(scen(3, "open", couplings=[{"range": 1, "zz": 1.0}],
                                  start={"state": "tilted", "theta": [0.0, np.pi, 0.0]}))
    assert st.bits == 0b101 and st.up_spins == 2


# ---------------------------------------------------------------------- symmetries
def _perm_matrix(L, f):
    D = 2**L
    P = np.zeros((D, D))
    for b in range(D):
        P[f(b), b] = 1
    return P


def dense_symmetries(s):
    L = s.n_sites
    Hd = dense(model.hamiltonian(s))
    full = (1 << L) - 1
    T = _perm_matrix(L, lambda b: ((b << 1) | (b >> (L - 1))) & full)
    R = _perm_matrix(L, lambda b: int(format(b, f"0{L}b")[::-1], 2))
    F = _perm_matrix(L, lambda b: b ^ full)
    M = np.diag([bin(b).count("1") for b in range(2**L)])

    def inv(U):
        return np.allclose(U @ Hd @ U.T, Hd, atol=1e-12)

    return {"conserves_magnetization": np.allclose(M @ Hd, Hd @ M, atol=1e-12),
            "real": np.allclose(Hd.imag, 0, atol=1e-12), "hermitian": np.allclose(Hd, Hd.conj().T),
            "translation": inv(T), "spin_flip": inv(F), "reflection": inv(R)}


SYM_CASES = [
    dict(L=6, couplings=[{"range": 1, "xy": 1.0, "zz": 0.5}]),
    dict(L=6, couplings=[{"range": 1, "xy": 1.0, "zz": 0.5}], fields={"z": {"pattern": "uniform", "strength": 0.3}}),
    dict(L=6, couplings=[{"range": 1, "xy": 1.0, "zz": 0.5}], fields={"z": {"pattern": "staggered", "strength": 0.3}}),
    dict(L=5, boundary="open", couplings=[{"range": 1, "x": 1.0, "y": 0.3, "z": 0.5}]),
    dict(L=6, couplings=[{"range": 1, "zz": 1.0}], fields={"y": {"pattern": "uniform", "strength": 0.3}}),
    dict(L=6, couplings=[{"range": 1, "zz": 1.0}], fields={"x": {"pattern": "random", "strength": 1.0, "seed": 3}}),
    dict(L=5, couplings=[{"range": 1, "xy": 1.0}], bonds=[{"sites": [0, 2], "zz": 1.0}]),
]


@pytest.mark.parametrize("case", SYM_CASES)
def test_symmetries_match_dense_checks(case):
    case = dict(case)
    L = case.pop("L")
    boundary = case.pop("boundary", "periodic")
    s = scen(L, boundary, **case)
    dense_sym = dense_symmetries(s)
    sym = model.symmetries(s)
    assert {k: sym[k] for k in dense_sym} == dense_sym


def test_symmetries_examples_of_each_answer():
    s = scen(6, couplings=[{"range": 1, "xy": 1.0, "zz": 0.5}], fields={"y": {"pattern": "uniform", "strength": 0.3}})
    sym = model.symmetries(s)
    assert sym["translation"] and sym["reflection"] and sym["hermitian"]
    assert not sym["real"] and not sym["spin_flip"] and not sym["conserves_magnetization"]
