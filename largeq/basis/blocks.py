"""Symmetry blocks of a problem's basis, resolved numerically (small sizes, dense blocks).

The bases of ``largeq.basis`` resolve at most the magnetization.  For level statistics a *fully
resolved* sector is needed (mixing sectors drifts <r> towards Poisson), and for exact quench analyses
it pays to work in the smallest subspace that holds the initial state.  This module builds the
symmetry operations the Hamiltonian has, as permutations of the basis states:

* translation T: site j -> j + 1 (mod L), on a translation-invariant ring;
* reflection R: site j -> L - 1 - j;
* spin flip (label 'spin flip +-1') = prod_j sigma^x_j: b -> b XOR (2^L - 1), in the full space or at n_up = L/2.

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


__all__ = [
    "SymmetryGroup",
    "Block",
    "StateSubspace",
    "symmetry_group",
    "subspace_basis",
    "block_labels",
    "symmetry_blocks",
    "state_subspace",
]

#: Relative tolerance of the check that a permutation commutes with H.
COMMUTE_TOL = 1e-10
#: |<psi|g psi>| must be this close to 1 for g to count as a symmetry of the state.
STATE_TOL = 1e-9


def _shift_bits(b: np.ndarray, L: int) -> np.ndarray:
    """Translate by one site: bit j -> bit j + 1 (mod L)."""
    full = (1 << L) - 1
    return ((b << 1) | (b >> (L - 1))) & full


def _reverse_bits(b: np.ndarray, L: int) -> np.ndarray:
    out = np.zeros_like(b)
    for j in range(L):
        out |= ((b >> j) & 1) << (L - 1 - j)
    return out


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
        ``perm[i]`` = index of g(b_i) for each resolved generator ('translation', 'reflection',
        'spin_flip'); only those that map the basis onto itself and commute with H.
    skipped : dict name -> str
        Generators not used and why.
    elements : list of (tuple (j, r, z), ndarray)
        Every group element T^j R^r Z^z with its permutation (identity included).
    """

    n_sites: int
    generators: dict
    skipped: dict
    elements: list = field(repr=False)

    @property
    def order(self) -> int:
        return len(self.elements)

    def describe(self) -> str:
        used = ", ".join(self.generators) or "none"
        return f"resolved: {used}" + "".join(f"; not {k} ({v})" for k, v in self.skipped.items())


def symmetry_group(problem, *, h_csr=None, check: bool = True) -> SymmetryGroup:
    """Translation, reflection and spin flip of ``problem`` as permutations of its basis states.

    Candidates come from ``problem.symmetries``; each is verified numerically: it must map the basis
    onto itself and satisfy ||g H g^T - H||_max <= COMMUTE_TOL * ||H||_max (skipped with a reason
    otherwise).

    Parameters
    ----------
    problem : largeq.operators.problem.Problem
    h_csr : scipy sparse matrix, optional
        H on the basis (built from ``problem.operator.to_csr()`` when not given).
    check : bool
        Verify commutation with H (default True).

    Returns
    -------
    SymmetryGroup
    """
    basis = problem.basis
    L = basis.n_sites
    states = basis.states()
    flags = problem.symmetries
    cand = {}
    skipped = {}
    if flags.get("translation"):
        cand["translation"] = _shift_bits(states, L)
    else:
        skipped["translation"] = "open chain or H not translation invariant"
    if flags.get("reflection"):
        cand["reflection"] = _reverse_bits(states, L)
    else:
        skipped["reflection"] = "H not reflection symmetric"
    if flags.get("spin_flip"):
        if basis.up_spins is None or 2 * basis.up_spins == L:
            cand["spin_flip"] = states ^ ((1 << L) - 1)
        else:
            skipped["spin_flip"] = f"sector n_up = {basis.up_spins} is not n_up = L/2"
    else:
        skipped["spin_flip"] = "H not spin-flip symmetric"
    gens = {}
    h = None
    for name, image in cand.items():
        perm = basis.index(image)
        if np.any(perm < 0):
            skipped[name] = "does not map the basis onto itself"
            continue
        if check:
            if h is None:
                h = (h_csr if h_csr is not None else problem.operator.to_csr()).tocsr()
                hmax = float(abs(h).max()) if h.nnz else 1.0
            pm = _perm_matrix(perm)
            diff = (pm @ h @ pm.T - h)
            err = float(abs(diff).max()) if diff.nnz else 0.0
            if err > COMMUTE_TOL * max(hmax, 1e-300):
                skipped[name] = f"does not commute with H (max deviation {err:.2e})"
                continue
        gens[name] = perm.astype(np.int64)
    ident = np.arange(basis.dim, dtype=np.int64)
    n_t = L if "translation" in gens else 1
    n_r = 2 if "reflection" in gens else 1
    n_z = 2 if "spin_flip" in gens else 1
    elements = []
    tj = ident
    for j in range(n_t):
        for r in range(n_r):
            for z in range(n_z):
                p = ident
                if z:
                    p = gens["spin_flip"][p]
                if r:
                    p = gens["reflection"][p]
                p = tj[p]
                elements.append(((j, r, z), p))
        if n_t > 1:
            tj = gens["translation"][tj]
    return SymmetryGroup(L, gens, skipped, elements)


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


def block_labels(group: SymmetryGroup) -> list[dict]:
    """All 1-d representations used as blocks: momentum k, reflection parity (k = 0, L/2), flip parity."""
    L = group.n_sites
    ks = list(range(L)) if "translation" in group.generators else [None]
    out = []
    for k in ks:
        ref_ok = "reflection" in group.generators and (k is None or k == 0 or 2 * k == L)
        for p in ((+1, -1) if ref_ok else (None,)):
            for z in ((+1, -1) if "spin_flip" in group.generators else (None,)):
                out.append({"k": k, "reflection": p, "spin_flip": z})
    return out


def _label(qn: dict, L: int) -> str:
    parts = []
    if qn["k"] is not None:
        parts.append(f"k = 2pi*{qn['k']}/{L}")
    if qn["reflection"] is not None:
        parts.append(f"reflection {qn['reflection']:+d}")
    if qn["spin_flip"] is not None:
        parts.append(f"spin flip {qn['spin_flip']:+d}")
    return ", ".join(parts) or "no symmetry resolved"


def _block_elements(group: SymmetryGroup, qn: dict):
    """Elements and characters of the subgroup that the block's quantum numbers fix."""
    L = group.n_sites
    perms, chars = [], []
    for (j, r, z), p in group.elements:
        if r and qn["reflection"] is None:
            continue
        c = 1.0 + 0j
        if qn["k"] is not None:
            c *= np.exp(2j * np.pi * qn["k"] * j / L)
        if r:
            c *= qn["reflection"]
        if z:
            c *= qn["spin_flip"]
        perms.append(p)
        chars.append(c)
    return perms, chars


def symmetry_blocks(problem, *, group: SymmetryGroup | None = None, which: str | dict = "all") -> list[Block]:
    """The symmetry blocks of ``problem``'s basis (all of them, or one).

    Parameters
    ----------
    problem : Problem
    group : SymmetryGroup, optional
        From ``symmetry_group`` (built if not given).
    which : 'all', 'trivial', or dict
        'all': every block (their dimensions add up to the basis dimension); 'trivial': k = 0 and all
        parities +1; a dict ``{'k': ..., 'reflection': ..., 'spin_flip': ...}`` picks one block.

    Returns
    -------
    list of Block
    """
    group = group or symmetry_group(problem)
    labels = block_labels(group)
    if which == "trivial":
        labels = [{"k": 0 if "translation" in group.generators else None,
                   "reflection": +1 if "reflection" in group.generators else None,
                   "spin_flip": +1 if "spin_flip" in group.generators else None}]
    elif isinstance(which, dict):
        labels = [dict(which)]
    elif which != "all":
        raise ValueError(f"which must be 'all', 'trivial' or a dict of quantum numbers, got {which!r}")
    dim = problem.basis.dim
    out = []
    for qn in labels:
        perms, chars = _block_elements(group, qn)
        q = subspace_basis(perms, chars, dim)
        if q.shape[1]:
            out.append(Block(_label(qn, group.n_sites), qn, q))
    return out


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
