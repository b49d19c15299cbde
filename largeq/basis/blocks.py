"""Symmetry blocks of a problem's basis, resolved numerically (small sizes, dense blocks).

The bases of ``largeq.basis`` resolve at most the magnetization.  For level statistics a *fully
resolved* sector is needed (mixing sectors drifts <r> towards Poisson), and for exact quench analyses
it pays to work in the smallest subspace that holds the initial state.  This module builds the
symmetry operations the Hamiltonian has, as permutations of the basis states:

* translation T: site j -> j + 1 (mod L), on a translation-invariant ring;
* reflection R: site j -> L - 1 - j;
* spin flip Z = prod_j sigma^x_j: b -> b XOR (2^L - 1), in the full space or at n_up = L/2.

Each is checked to commute with H on the basis before it is used (a flag that is wrong for some
Hamiltonian only costs a symmetry, never a wrong block).  A 1-d representation chi of the group they
generate (momentum k with chi(T^j) = e^{2 pi i k j / L}; reflection parity at k = 0 and k = L/2 only,
where R commutes with the momentum projector; flip parity) defines the projector

    P_chi = (1/|G|) sum_g chi(g)^* g,

whose range is spanned by the normalised vectors P_chi e_s, one per orbit {g s} with a nonzero
norm (orbit representatives: A. W. Sandvik, AIP Conf. Proc. 1297, 135 (2010)).  Those columns form
an orthonormal sparse matrix Q, and the block Hamiltonian is Q^dagger H Q.

Besides the blocks of a fixed representation, ``state_subspace`` builds the subspace of the initial
state: the subgroup G_psi of elements with g psi = lambda_g psi (|lambda_g| = 1) and its character
lambda, so that psi(t) stays in range(P_lambda) for all times.  Quench quantities computed there equal
those of the whole basis exactly (eigenspace projectors commute with P_lambda).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from largeq.model import symmetry as msym

__all__ = [
    "SymmetryGroup",
    "Block",
    "StateSubspace",
    "symmetry_group",
    "subspace_basis",
    "block_labels",
    "symmetry_blocks",
    "state_subspace",
    "basis_group",
    "block_dimension",
    "fixed_points",
    "StateBlock",
    "state_blocks",
]

#: Relative tolerance of the check that a permutation commutes with H.
COMMUTE_TOL = 1e-10
#: |<psi|g psi>| must be this close to 1 for g to count as a symmetry of the state.
STATE_TOL = 1e-9


def _perm_matrix(perm: np.ndarray) -> sp.csr_matrix:
    """Matrix of the basis permutation e_i -> e_{perm[i]}."""
    n = perm.size
    return sp.csr_matrix((np.ones(n), (perm, np.arange(n))), shape=(n, n))


@dataclass(frozen=True, eq=False)
class SymmetryGroup:
    """The symmetry operations of H on a basis, as index permutations.

    Attributes
    ----------
    n_sites : int
    generators : dict name -> ndarray of int64
        ``perm[i]`` = index of g(b_i) for each generator: 'translation', 'reflection', 'spin_flip' when
        those are symmetries by themselves, else the product that is (e.g. 'R F').
    skipped : dict name -> str
        Standard generators not in the group and why.
    elements : list of (tuple (j, r, f), ndarray)
        Every group element T^j R^r F^f with its permutation (identity first).
    abstract : largeq.model.symmetry.SymmetryGroup
        The group description the permutations realise.
    """

    n_sites: int
    generators: dict
    skipped: dict
    elements: list = field(repr=False)
    abstract: msym.SymmetryGroup = field(repr=False, default=None)

    @property
    def order(self) -> int:
        return len(self.elements)

    def describe(self) -> str:
        used = ", ".join(self.generators) or "none"
        return f"resolved: {used}" + "".join(f"; not {k} ({v})" for k, v in self.skipped.items())


def basis_group(problem) -> msym.SymmetryGroup:
    """The symmetry group of H (``problem.group``) restricted to the elements
    that map ``problem.basis`` onto itself (spin flip changes n_up unless n_up = L/2)."""
    grp = getattr(problem, "group", None)
    if grp is None:
        grp = msym.symmetry_group_of(problem.hamiltonian, problem.scenario.chain.periodic)
    basis = problem.basis
    L = basis.n_sites
    if basis.up_spins is not None and 2 * basis.up_spins != L:
        return grp.restrict(lambda g: g[2] == 0,
                            {"spin_flip": f"sector n_up = {basis.up_spins} is not n_up = L/2"} if any(g[2] for g in grp.elements) else {})
    return grp


def symmetry_group(problem, *, h_csr=None, check: bool = True) -> SymmetryGroup:
    """Every element T^j R^r F^f that commutes with H, as permutations of the problem's basis states.

    Commutation is decided exactly on the Pauli strings (``largeq.model.symmetry``), products included;
    ``check`` additionally verifies ||g H g^T - H||_max <= COMMUTE_TOL * ||H||_max on the basis matrix
    (``h_csr`` or built) for each generator.

    Returns
    -------
    SymmetryGroup
    """
    basis = problem.basis
    L = basis.n_sites
    grp = basis_group(problem)
    states = basis.states()
    perms = {}
    for g in grp.elements:
        p = basis.index(msym.apply_bits(g, states, L))
        if np.any(p < 0):
            raise RuntimeError(f"symmetry {msym.element_name(g)} does not map the basis onto itself (bug)")
        perms[g] = p.astype(np.int64)
    st = grp.standard()
    gens, skipped = {}, {}
    names = {(1 % L, 0, 0): "translation", (0, 1, 0): "reflection", (0, 0, 1): "spin_flip"}
    for g, name in names.items():
        if st[name]:
            gens[name] = perms[g]
        elif name in grp.excluded:
            skipped[name] = grp.excluded[name]
        elif name == "translation" and not problem.scenario.chain.periodic:
            skipped[name] = "open chain"
        else:
            skipped[name] = "does not commute with H"
    have = msym.closure([g for g, name in names.items() if st[name]], L)
    while len(have) < grp.order:  # products that are symmetries although their factors are not
        best = max((g for g in grp.elements if g not in have),
                   key=lambda g: (len(msym.closure(list(have) + [g], L)), -g[0], g))
        gens[msym.element_name(best)] = perms[best]
        have = msym.closure(list(have) + [best], L)
    if check and gens:
        h = (h_csr if h_csr is not None else problem.operator.to_csr()).tocsr()
        hmax = float(abs(h).max()) if h.nnz else 1.0
        for name, perm in gens.items():
            pm = _perm_matrix(perm)
            diff = pm @ h @ pm.T - h
            err = float(abs(diff).max()) if diff.nnz else 0.0
            if err > COMMUTE_TOL * max(hmax, 1e-300):
                raise RuntimeError(f"{name} passed the Pauli-string check but deviates by {err:.2e} on the basis (bug)")
    elements = [(g, perms[g]) for g in grp.elements]
    return SymmetryGroup(L, gens, skipped, elements, grp)


def subspace_basis(perms, chars, dim: int, *, tol: float = 1e-10) -> sp.csr_matrix:
    """Orthonormal basis Q (dim x d, sparse) of the range of P = (1/|G|) sum_g chi(g)^* g.

    Parameters
    ----------
    perms : sequence of int arrays
        The permutations of all group elements (``perm[i]`` = index of g e_i), identity included.
    chars : sequence of complex
        chi(g) for each element, a 1-d representation (|chi| = 1).
    dim : int
        Basis dimension.
    tol : float
        Columns P e_s with norm below this are dropped (the orbit is incompatible with chi).

    Returns
    -------
    scipy.sparse.csr_matrix
        Columns P e_s / ||P e_s||, one per orbit representative s (the smallest index in its orbit).
    """
    perms = np.asarray(perms, dtype=np.int64)
    chars = np.asarray(chars, dtype=complex)
    n_g = perms.shape[0]
    rep = perms.min(axis=0)
    reps = np.flatnonzero(rep == np.arange(dim))
    col = np.arange(reps.size)
    rows = perms[:, reps].reshape(-1)
    cols = np.broadcast_to(col, (n_g, reps.size)).reshape(-1)
    data = np.broadcast_to(np.conj(chars)[:, None] / n_g, (n_g, reps.size)).reshape(-1)
    real = bool(np.all(np.abs(chars.imag) < 1e-14))
    if real:
        data = data.real
    q = sp.csr_matrix((data, (rows, cols)), shape=(dim, reps.size)).tocsc()
    q.sum_duplicates()
    norms = np.sqrt(np.asarray(abs(q.multiply(q.conj())).sum(axis=0)).reshape(-1))
    keep = np.flatnonzero(norms > tol)
    q = q[:, keep] @ sp.diags(1.0 / norms[keep])
    q.eliminate_zeros()
    return q.tocsr()


@dataclass(frozen=True, eq=False)
class Block:
    """One symmetry block: label, character values and orthonormal basis Q (dim x d)."""

    label: str
    quantum_numbers: dict
    q: sp.csr_matrix

    @property
    def dim(self) -> int:
        return int(self.q.shape[1])

    def hamiltonian(self, h_csr) -> np.ndarray:
        """Dense block Q^dagger H Q (real when both are real)."""
        m = (self.q.conj().T @ (h_csr @ self.q)).toarray()
        if np.iscomplexobj(m) and np.max(np.abs(m.imag), initial=0.0) < 1e-13 * max(np.max(np.abs(m), initial=0.0), 1e-300):
            m = m.real
        return 0.5 * (m + m.conj().T)


def block_labels(group: SymmetryGroup) -> list[tuple[dict, str]]:
    """1-d characters whose blocks span the basis: [(chi {element: value}, label)] (see
    ``largeq.model.symmetry.block_characters``: momentum and flip-type characters of the rotation part,
    with a reflection-type parity where the character allows one)."""
    if group.abstract is None:
        raise ValueError("the group has no abstract description")
    return msym.block_characters(group.abstract)


def _block_elements(group: SymmetryGroup, chi: dict):
    """Permutations and character values of the elements the block's character is defined on."""
    perms, chars = [], []
    for key, p in group.elements:
        if key in chi:
            perms.append(p)
            chars.append(chi[key])
    return perms, chars


def _trivial(group: SymmetryGroup) -> dict:
    return {key: 1.0 + 0j for key, _ in group.elements}


def _legacy_character(group: SymmetryGroup, qn: dict) -> dict:
    """{'k': m, 'reflection': +-1 or None, 'spin_flip': +-1 or None} -> character (standard groups)."""
    L = group.n_sites
    out = {}
    for (j, r, f), _ in group.elements:
        if r and qn.get("reflection") is None:
            continue
        c = 1.0 + 0j
        if qn.get("k") is not None:
            c *= np.exp(2j * np.pi * qn["k"] * j / L)
        if r:
            c *= qn["reflection"]
        if f:
            c *= qn.get("spin_flip") or 1
        out[(j, r, f)] = c
    return out


def symmetry_blocks(problem, *, group: SymmetryGroup | None = None, which: str | dict = "all") -> list[Block]:
    """The symmetry blocks of ``problem``'s basis (all of them, or one).

    Parameters
    ----------
    problem : Problem
    group : SymmetryGroup, optional
        From ``symmetry_group`` (built if not given).
    which : 'all', 'trivial', or dict
        'all': every block (their dimensions add up to the basis dimension); 'trivial': the character
        equal to 1 on the whole group (k = 0 and all parities +1); a dict picks one block: a character
        ``{element: value}`` or, for the standard generators, ``{'k': ..., 'reflection': ..., 'spin_flip': ...}``.

    Returns
    -------
    list of Block
    """
    group = group or symmetry_group(problem)
    if which == "all":
        labels = block_labels(group)
    elif which == "trivial":
        labels = [(_trivial(group), "trivial character (k = 0, all parities +1)")]
    elif isinstance(which, dict):
        chi = _legacy_character(group, which) if set(which) <= {"k", "reflection", "spin_flip"} else dict(which)
        labels = [(chi, ", ".join(f"{msym.element_name(k)}: {complex(v):.3g}" for k, v in sorted(chi.items())
                                  if k != msym.IDENTITY))]
    else:
        raise ValueError(f"which must be 'all', 'trivial' or a dict, got {which!r}")
    dim = problem.basis.dim
    out = []
    for chi, label in labels:
        perms, chars = _block_elements(group, chi)
        q = subspace_basis(perms, chars, dim)
        if q.shape[1]:
            out.append(Block(label or "no symmetry resolved", chi, q))
    return out


def block_dimension(group: SymmetryGroup, chi: dict, fixed: dict | None = None) -> int:
    """Tr P_chi = (1/|G_chi|) sum_g conj(chi(g)) #{fixed points of g}, without building the block."""
    if fixed is None:
        fixed = fixed_points(group)
    tot = sum(np.conj(v) * fixed[k] for k, v in chi.items())
    return int(round(float(np.real(tot)) / len(chi)))


def fixed_points(group: SymmetryGroup) -> dict:
    """{element: number of basis states it fixes}."""
    return {key: int(np.count_nonzero(p == np.arange(p.size))) for key, p in group.elements}


@dataclass(frozen=True, eq=False)
class StateSubspace:
    """The smallest symmetric subspace found that holds the initial state.

    Attributes
    ----------
    q : sparse (dim x d)
        Orthonormal basis of range(P_lambda).
    n_elements : int
        |G_psi|, the number of group elements with g psi = lambda_g psi.
    group_order : int
        |G| of the full symmetry group.
    description : str
    psi : ndarray (d,)
        Q^dagger psi; its norm is 1 to rounding (checked).
    """

    q: sp.csr_matrix
    n_elements: int
    group_order: int
    description: str
    psi: np.ndarray

    @property
    def dim(self) -> int:
        return int(self.q.shape[1])


def state_subspace(problem, psi: np.ndarray, *, group: SymmetryGroup | None = None) -> StateSubspace:
    """range(P_lambda) for G_psi = {g : g psi = lambda_g psi}: psi(t) never leaves it.

    Raises ValueError if Q^dagger psi loses norm (it cannot, unless the tolerance misfires).
    """
    group = group or symmetry_group(problem)
    psi = np.asarray(psi)
    n2 = float(np.vdot(psi, psi).real)
    perms, chars, names = [], [], []
    for key, p in group.elements:
        gpsi = np.zeros_like(psi)
        gpsi[p] = psi
        lam = np.vdot(psi, gpsi) / n2
        if abs(abs(lam) - 1.0) < STATE_TOL:
            perms.append(p)
            chars.append(lam / abs(lam))
            names.append(key)
    q = subspace_basis(perms, chars, problem.basis.dim)
    small = q.conj().T @ psi
    lost = abs(n2 - float(np.vdot(small, small).real))
    if lost > 1e-8:
        raise ValueError(f"the initial state lost {lost:.2e} of its norm in its symmetric subspace")
    desc = (f"subspace of the initial state: {len(perms)} of {group.order} symmetry operations leave it "
            f"invariant up to a phase ({group.describe()}); dimension {q.shape[1]:,} of {problem.basis.dim:,}")
    return StateSubspace(q, len(perms), group.order, desc, small)


@dataclass(frozen=True, eq=False)
class StateBlock:
    """One block (1-d character chi) that the initial state touches: P_chi psi != 0.

    Attributes
    ----------
    label : str
    character : dict element -> complex
    dim : int
        Tr P_chi (known before the block is built).
    weight : float
        ||P_chi psi||^2 (the weights of all blocks sum to 1).
    """

    label: str
    character: dict = field(repr=False)
    dim: int = 0
    weight: float = 0.0

    def build(self, group: SymmetryGroup, psi: np.ndarray) -> tuple[sp.csr_matrix, np.ndarray]:
        """(Q, Q^dagger psi): orthonormal basis of the block and the state's component in it."""
        perms, chars = _block_elements(group, self.character)
        q = subspace_basis(perms, chars, psi.size)
        return q, q.conj().T @ psi


def state_blocks(problem, psi: np.ndarray, *, group: SymmetryGroup | None = None,
                 tol: float = 1e-12) -> list[StateBlock]:
    """The blocks of ``block_labels(group)`` that hold part of psi, with dimensions and weights.

    w_chi = <psi|P_chi|psi> = (1/|G_chi|) sum_g conj(chi(g)) <psi|g psi>: one overlap per group element,
    then every block's weight and dimension (from fixed points) without building any block.
    Blocks with weight <= tol (relative to ||psi||^2) are left out; the weights are normalised by ||psi||^2.
    """
    group = group or symmetry_group(problem)
    psi = np.asarray(psi)
    n2 = float(np.vdot(psi, psi).real)
    over = {}
    for key, p in group.elements:
        gpsi = np.empty_like(psi)
        gpsi[p] = psi
        over[key] = complex(np.vdot(psi, gpsi)) / n2
    fixed = fixed_points(group)
    out = []
    for chi, label in block_labels(group):
        w = float(np.real(sum(np.conj(v) * over[k] for k, v in chi.items())) / len(chi))
        if w > tol:
            out.append(StateBlock(label or "no symmetry resolved", chi, block_dimension(group, chi, fixed), w))
    total = sum(b.weight for b in out)
    if abs(total - 1.0) > 1e-8:
        raise RuntimeError(f"block weights sum to {total:.12g}, not 1 (bug)")
    return out
