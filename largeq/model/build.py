"""From a :class:`~largeq.scenario.Scenario` to operators: Hamiltonian, observables, initial state.

Conventions (see ``docs/conventions.md``): bit j of a basis integer is site j, 1 = spin up
(sigma^z_j = +1).  Hamiltonian couplings multiply S = sigma / 2, so a coupling J_a S^a_i S^a_j is
the Pauli string (J_a / 4) sigma^a_i sigma^a_j and a field h_j S^a_j is (h_j / 2) sigma^a_j.
Observables are Pauli operators.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from largeq.model import symmetry as msym
from largeq.model.pauli import PauliSum, empty
from largeq.scenario.spec import Scenario, _range_pairs

__all__ = [
    "Observable",
    "ProductState",
    "hamiltonian",
    "observables",
    "initial_state",
    "symmetries",
    "field_values",
]

_LETTER_MASKS = {"x": (1, 0), "y": (1, 1), "z": (0, 1)}


def _strings(n_sites: int, entries) -> PauliSum:
    """PauliSum from ``[(sites, letters, coeff), ...]``, merged and simplified."""
    xs, zs, cs = [], [], []
    for sites, letters, c in entries:
        x = z = 0
        for s, a in zip(sites, letters):
            xb, zb = _LETTER_MASKS[a]
            x |= xb << s
            z |= zb << s
        xs.append(x)
        zs.append(z)
        cs.append(c)
    if not cs:
        return empty(n_sites)
    return PauliSum(n_sites, np.array(xs, dtype=np.int64), np.array(zs, dtype=np.int64),
                    np.array(cs, dtype=np.complex128)).simplify()


def hamiltonian(scenario: Scenario) -> PauliSum:
    """The Hamiltonian as a Pauli sum.

    H = sum_bonds (Jx S^x_i S^x_j + Jy S^y_i S^y_j + Jz S^z_i S^z_j) + sum_a sum_j h^a_j S^a_j,
    with S^a S^b = sigma^a sigma^b / 4 and S^a = sigma^a / 2.  Bonds come from
    :meth:`Scenario.resolved_bonds` (each pair of a ring counted once, also for r = L/2 and L = 2).

    Parameters
    ----------
    scenario : Scenario

    Returns
    -------
    PauliSum
        Hermitian, simplified (identical strings merged, zero terms dropped).
    """
    L = scenario.n_sites
    entries = []
    for i, j, jx, jy, jz in scenario.resolved_bonds():
        for a, J in (("x", jx), ("y", jy), ("z", jz)):
            if J != 0:
                entries.append(((i, j), (a, a), J / 4.0))
    for axis, h in field_values(scenario).items():
        for j in range(L):
            if h[j] != 0:
                entries.append(((j,), (axis,), h[j] / 2.0))
    return _strings(L, entries)


def field_values(scenario: Scenario) -> dict[str, np.ndarray]:
    """Per-site fields h^a_j actually used (S units), random ones included.

    Returns
    -------
    dict
        ``{'x': array(L), 'y': array(L), 'z': array(L)}``; zeros where no field is given.
    """
    L = scenario.n_sites
    out = {a: np.zeros(L) for a in ("x", "y", "z")}
    for axis, h in scenario.field_values().items():
        out[axis] = out[axis] + h
    return out


# ---------------------------------------------------------------------------- observables
@dataclass(frozen=True)
class Observable:
    """A built observable.

    Attributes
    ----------
    name : str
    kind : str
        'site', 'sum', 'zz' or 'bond'.
    description : str
        Formula in words, e.g. ``(1/16) sum_j (-1)^j sigma^z_j``.
    pauli : PauliSum
        The operator A.
    norm : float
        Operator norm ||A|| (exact when ``norm_exact``, else an upper bound).
    a_min, a_max : float
        Smallest and largest eigenvalue of A (exact when ``norm_exact``, else safe bounds).
    norm_exact : bool
    """

    name: str
    kind: str
    description: str
    pauli: PauliSum
    norm: float
    a_min: float
    a_max: float
    norm_exact: bool


_PAULI_2 = {
    # basis order (down, up) = (bit 0, bit 1); sigma^y|up> = i|down>
    "I": np.eye(2, dtype=complex),
    "x": np.array([[0, 1], [1, 0]], dtype=complex),
    "y": np.array([[0, 1j], [-1j, 0]], dtype=complex),
    "z": np.diag([-1.0, 1.0]).astype(complex),
}


def _two_site_matrix(ps: PauliSum, i: int, j: int) -> np.ndarray:
    """4x4 matrix of strings supported on sites i, j (index = bit_i + 2 bit_j)."""
    m = np.zeros((4, 4), dtype=complex)
    for x, z, c in zip(ps.x_mask.tolist(), ps.z_mask.tolist(), ps.coeff.tolist()):
        mats = []
        for s in (j, i):  # kron: first factor is the more significant bit
            xb, zb = (x >> s) & 1, (z >> s) & 1
            mats.append(_PAULI_2["y" if xb and zb else "x" if xb else "z" if zb else "I"])
        m += c * np.kron(mats[0], mats[1])
    return m


def _min_mean_zz(L: int, pairs: list[tuple[int, int]]) -> float:
    """Exact minimum over classical Ising configurations of mean_{(i,j) in pairs} s_i s_j.

    The pair graph has degree <= 2 here (paths and cycles): every component can satisfy all its
    bonds except an odd cycle, which must leave exactly one bond unsatisfied.
    """
    parent = list(range(L))

    def find(a):
        while parent[a] != a:
            parent[a] = parent[parent[a]]
            a = parent[a]
        return a

    for i, j in pairs:
        parent[find(i)] = find(j)
    verts: dict[int, set] = {}
    edges: dict[int, int] = {}
    for i, j in pairs:
        r = find(i)
        verts.setdefault(r, set()).update((i, j))
        edges[r] = edges.get(r, 0) + 1
    total = 0
    for r, vs in verts.items():
        e = edges[r]
        frustrated = 1 if (e == len(vs) and len(vs) % 2 == 1) else 0
        total += -e + 2 * frustrated
    return total / len(pairs)


def observables(scenario: Scenario, H: PauliSum | None = None) -> dict[str, "Observable"]:
    """Build every requested observable, in the scenario's order.

    Parameters
    ----------
    scenario : Scenario
    H : PauliSum, optional
        The Hamiltonian (built if not given); needed for 'bond' observables.

    Returns
    -------
    dict of str to Observable
    """
    L = scenario.n_sites
    out: dict[str, Observable] = {}
    for spec in scenario.observables:
        if spec.kind == "site":
            ps = _strings(L, [((spec.site,), (spec.axis,), 1.0)])
            obs = Observable(spec.name, "site", f"sigma^{spec.axis}_{spec.site}", ps, 1.0, -1.0, 1.0, True)
        elif spec.kind == "sum":
            s = spec.sign_values(L)
            denom = float(L) if spec.normalize else 1.0
            w = s / denom
            ps = _strings(L, [((j,), (spec.axis,), w[j]) for j in range(L) if w[j] != 0])
            top = float(np.sum(np.abs(s))) / denom  # commuting terms: extremes +-sum|w_j|
            if isinstance(spec.signs, str):
                sgn = "(-1)^j " if spec.signs == "staggered" else ""
                desc = f"{'(1/%d) ' % L if spec.normalize else ''}sum_j {sgn}sigma^{spec.axis}_j"
            else:
                desc = f"{'(1/%d) ' % L if spec.normalize else ''}sum_j s_j sigma^{spec.axis}_j (given weights s_j)"
            obs = Observable(spec.name, "sum", desc, ps, top, -top, top, True)
        elif spec.kind == "zz":
            r = spec.distance
            if spec.site == "average":
                pairs = _range_pairs(L, r, scenario.chain.periodic)
                n = len(pairs)
                ps = _strings(L, [((i, j), ("z", "z"), 1.0 / n) for i, j in pairs])
                lo = _min_mean_zz(L, pairs)
                desc = f"mean of sigma^z_j sigma^z_(j+{r}) over {n} pairs"
                obs = Observable(spec.name, "zz", desc, ps, max(1.0, abs(lo)), lo, 1.0, True)
            else:
                i, j = spec.site, (spec.site + r) % L
                ps = _strings(L, [((i, j), ("z", "z"), 1.0)])
                obs = Observable(spec.name, "zz", f"sigma^z_{i} sigma^z_{j}", ps, 1.0, -1.0, 1.0, True)
        else:
            if H is None:
                H = hamiltonian(scenario)
            i, j = spec.sites
            support = (1 << i) | (1 << j)
            keep = (H.x_mask | H.z_mask) == support
            ps = PauliSum(L, H.x_mask[keep], H.z_mask[keep], H.coeff[keep])
            ev = np.linalg.eigvalsh(_two_site_matrix(ps, i, j))
            lo, hi = float(ev[0]), float(ev[-1])
            desc = f"energy of bond ({i}, {j}): " + ", ".join(ps.describe())
            obs = Observable(spec.name, "bond", desc, ps, max(abs(lo), abs(hi)), lo, hi, True)
        out[spec.name] = obs
    return out


# ---------------------------------------------------------------------------- initial state
@dataclass(frozen=True)
class ProductState:
    """A product state prod_j (spinors[j, 0] |down>_j + spinors[j, 1] |up>_j).

    Attributes
    ----------
    spinors : numpy.ndarray, complex, shape (L, 2)
        Column 0 is the amplitude of |down> (bit 0), column 1 of |up> (bit 1), so
        ``spinors[j, bit]`` is indexed by the bit value.  Each row has unit norm.
    bits : int or None
        The basis integer (bit j = 1: site j up) when the state is a z-basis product state
        (up to a global phase), else None.
    up_spins : int or None
        Number of up spins when definite, else None.
    label : str
        Short human-readable description.
    """

    spinors: np.ndarray
    bits: int | None
    up_spins: int | None
    label: str

    @property
    def n_sites(self) -> int:
        return int(self.spinors.shape[0])

    def to_vector(self, max_sites: int = 26) -> np.ndarray:
        """The full 2^L state vector, entry b = prod_j spinors[j, bit_j(b)] (small L only)."""
        if self.n_sites > max_sites:
            raise ValueError(f"full vector of {self.n_sites} sites exceeds max_sites = {max_sites}")
        psi = np.ones(1, dtype=complex)
        for j in range(self.n_sites):
            psi = np.kron(self.spinors[j], psi)  # site j becomes the most significant bit so far
        return psi


def initial_state(scenario: Scenario) -> ProductState:
    """The scenario's initial product state.

    Néel: site 0 up, alternating (bits 1010...); domain wall: sites 0..L/2-1 up; bits: as given;
    tilted: cos(theta_j/2)|up> + exp(i phi_j) sin(theta_j/2)|down> on each site.
    """
    L = scenario.n_sites
    st = scenario.start
    b = st.basis_bits(L)
    sp = np.zeros((L, 2), dtype=complex)
    if st.state == "tilted":
        th, ph = st.angles(L)
        sp[:, 0] = np.exp(1j * ph) * np.sin(th / 2)
        sp[:, 1] = np.cos(th / 2)
        if isinstance(st.theta, tuple) or isinstance(st.phi, tuple):
            label = "tilted product state (per-site angles)"
        else:
            label = f"tilted product state theta={st.theta:g} phi={0.0 if st.phi is None else st.phi:g}"
    else:
        for j in range(L):
            sp[j, (b >> j) & 1] = 1.0
        label = {"neel": "Neel state 1010...", "domain_wall": "domain wall 11..100..0"}.get(
            st.state, f"basis state {st.bits}")
    sp.setflags(write=False)
    up = None if b is None else b.bit_count()
    return ProductState(sp, b, up, label)


# ---------------------------------------------------------------------------- symmetries
def symmetries(scenario: Scenario, H: PauliSum | None = None) -> dict:
    """Symmetry facts of H (each checked exactly on the Pauli sum, ``largeq.model.symmetry``).

    Returns
    -------
    dict
        ``conserves_magnetization``: H commutes with sum_j sigma^z_j;
        ``real``: all matrix elements in the z basis are real;
        ``hermitian``;
        ``translation``: H invariant under j -> j + 1 mod L (only possible on a ring);
        ``spin_flip``: H invariant under flipping all spins (prod_j sigma^x_j);
        ``reflection``: H invariant under j -> L - 1 - j;
        ``group``: names of generators of the whole symmetry group among T^j R^r F^f, products included
        (e.g. 'R F' for a staggered field);
        ``group_order``: its order;
        ``total_spin``: H commutes with S^2 (SU(2) symmetry).
        The group itself: ``largeq.model.symmetry.symmetry_group_of(H, periodic)``.
    """
    if H is None:
        H = hamiltonian(scenario)
    grp = msym.symmetry_group_of(H, scenario.chain.periodic)
    st = grp.standard()
    return {
        "conserves_magnetization": bool(H.conserves_magnetization()),
        "real": bool(H.is_real()),
        "hermitian": bool(H.is_hermitian()),
        "translation": bool(st["translation"]),
        "spin_flip": bool(st["spin_flip"]),
        "reflection": bool(st["reflection"]),
        "group": grp.names(),
        "group_order": grp.order,
        "total_spin": bool(msym.conserves_total_spin(H)),
    }
