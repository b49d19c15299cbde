"""The symmetry group of a chain Hamiltonian: translations, reflection, spin flip and their products.

One description serves every layer above: the model layer finds which elements commute with H
(exactly, on the Pauli strings), ``largeq.basis.blocks`` turns them into permutations of a basis and
dense projectors (small sizes), ``largeq.basis.sectors`` hands the standard generators to the
compiled sector kernels.

Elements.  g = T^j R^r F^f with

* T: translation, site i -> i + 1 (mod L) (periodic chains only);
* R: reflection, site i -> L - 1 - i;
* F: spin flip, prod_i sigma^x_i (basis integer b -> b XOR (2^L - 1)).

Applied to a state: R first, then F, then T^j.  F commutes with T and R, and R T^j = T^{-j} R, so
(j1, r1, f1) (j2, r2, f2) = (j1 + (-1)^{r1} j2 mod L, r1 XOR r2, f1 XOR f2).  On a Pauli string a site
permutation moves the masks and F multiplies by (-1)^{#Z + #Y} (= popcount of the z mask).

The symmetry group of H is the set of all 4L (2 without translation: open chain, 2 x 2) elements that
commute with H; it is a group, so products such as reflection x spin flip (staggered fields) or
translation x spin flip are found even when none of T, R, F is a symmetry alone.

1-d characters.  For blocks that together span the basis (``block_characters``) the rotation part
A = {g : r = 0} (abelian) is resolved by all its 1-d characters; where a character is invariant under a
reflection-type element rho of the group (chi(rho a rho) = chi(a)), it is extended with rho-parity +-1,
otherwise (momenta k != 0, pi for the standard group) the block keeps A only, as for the dihedral group
(orbit-representative bases: A. W. Sandvik, AIP Conf. Proc. 1297, 135 (2010)).

Total spin.  H conserves S^2 when it commutes with sum_i sigma^x_i and sum_i sigma^z_i (then also with
sum_i sigma^y_i = -i [sigma^z, sigma^x]-sums up to a factor); the commutators are formed exactly on the
Pauli strings.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from itertools import product

import numpy as np

from largeq.model.pauli import PauliSum

__all__ = ["Element", "IDENTITY", "compose", "inverse", "element_name", "apply_bits", "map_pauli",
           "commutes", "same_operator", "closure", "candidates", "SymmetryGroup", "symmetry_group_of", "standard_group", "pauli_product",
           "commutator", "conserves_total_spin", "total_spin_squared", "block_characters"]

Element = tuple  # (j, r, f)
IDENTITY: Element = (0, 0, 0)

#: Coefficients below this (relative to the largest) count as zero in the exact commutation checks.
PAULI_TOL = 1e-12


def compose(a: Element, b: Element, L: int) -> Element:
    """The element a b (b applied first)."""
    j1, r1, f1 = a
    j2, r2, f2 = b
    return ((j1 + (-j2 if r1 else j2)) % L, r1 ^ r2, f1 ^ f2)


def inverse(a: Element, L: int) -> Element:
    j, r, f = a
    return (j if r else (-j) % L, r, f)


def element_name(a: Element) -> str:
    """'T^2 R F', 'RF', '1', ..."""
    j, r, f = a
    parts = []
    if j:
        parts.append("T" if j == 1 else f"T^{j}")
    if r:
        parts.append("R")
    if f:
        parts.append("F")
    return " ".join(parts) or "1"


def _reverse(b: np.ndarray, L: int) -> np.ndarray:
    out = np.zeros_like(b)
    for i in range(L):
        out |= ((b >> i) & 1) << (L - 1 - i)
    return out


def apply_bits(a: Element, b, L: int) -> np.ndarray:
    """g b for basis integers b (vectorised; bit i = site i)."""
    b = np.asarray(b, dtype=np.int64)
    full = (1 << L) - 1
    j, r, f = a
    if r:
        b = _reverse(b, L)
    if f:
        b = b ^ full
    if j:
        b = ((b << j) | (b >> (L - j))) & full
    return b


def map_pauli(ps: PauliSum, a: Element) -> PauliSum:
    """g A g^dagger for a Pauli sum A."""
    L = ps.n_sites
    x = apply_bits((a[0], a[1], 0), ps.x_mask, L)
    z = apply_bits((a[0], a[1], 0), ps.z_mask, L)
    c = np.asarray(ps.coeff)
    if a[2]:
        odd = np.array([int(v).bit_count() & 1 for v in ps.z_mask.tolist()], dtype=bool)
        c = np.where(odd, -c, c)
    return PauliSum(L, x, z, c)


def _terms(ps: PauliSum, tol: float) -> dict:
    s = ps.simplify(tol)
    return dict(zip(zip(s.x_mask.tolist(), s.z_mask.tolist()), s.coeff.tolist()))


def _same(a: dict, b: dict, tol: float) -> bool:
    return all(abs(a.get(k, 0) - b.get(k, 0)) <= tol for k in set(a) | set(b))


def same_operator(a: PauliSum, b: PauliSum, tol: float | None = None) -> bool:
    """A == B term by term (``tol`` relative to the largest coefficient by default)."""
    scale = max(a.max_abs_coeff(), b.max_abs_coeff(), 1e-300)
    tol = PAULI_TOL * scale if tol is None else tol
    return _same(_terms(a, 0.1 * tol), _terms(b, 0.1 * tol), tol)


def commutes(ps: PauliSum, a: Element, tol: float | None = None) -> bool:
    """g A g^dagger == A, term by term (exact up to ``tol`` relative to the largest coefficient)."""
    scale = max(ps.max_abs_coeff(), 1e-300)
    tol = PAULI_TOL * scale if tol is None else tol
    return _same(_terms(ps, 0.1 * tol), _terms(map_pauli(ps, a), 0.1 * tol), tol)


def closure(gens, L: int) -> list:
    seen = {IDENTITY}
    frontier = [IDENTITY]
    while frontier:
        nxt = []
        for e in frontier:
            for g in gens:
                h = compose(g, e, L)
                if h not in seen:
                    seen.add(h)
                    nxt.append(h)
        frontier = nxt
    return sorted(seen)


def _pick_generators(elements, L: int) -> list:
    """A small generating set (greedy, larger subgroups first)."""
    target = set(elements)
    gens: list = []
    have = {IDENTITY}
    while have != target:
        best, best_set = None, None
        for e in sorted(target - have):
            s = set(closure(gens + [e], L))
            if best_set is None or len(s) > len(best_set):
                best, best_set = e, s
        gens.append(best)
        have = best_set
    return gens


@dataclass(frozen=True)
class SymmetryGroup:
    """A subgroup of {T^j R^r F^f} (the symmetries of H, possibly restricted to what a basis allows).

    Attributes
    ----------
    n_sites : int
    periodic : bool
    elements : tuple of Element
        All elements, identity first.
    generators : tuple of Element
        A generating set.
    excluded : dict name -> str
        Elements of the candidate set left out and why (e.g. F at n_up != L/2).
    """

    n_sites: int
    periodic: bool
    elements: tuple
    generators: tuple
    excluded: dict = field(default_factory=dict)

    @property
    def order(self) -> int:
        return len(self.elements)

    def contains(self, a: Element) -> bool:
        return tuple(a) in set(self.elements)

    def standard(self) -> dict:
        """Which of T, R, F are in the group by themselves."""
        return {"translation": self.contains((1 % self.n_sites, 0, 0)) and self.n_sites > 1 and self.periodic,
                "reflection": self.contains((0, 1, 0)), "spin_flip": self.contains((0, 0, 1))}

    def is_standard(self) -> bool:
        """True when the group is generated by some of T, R, F alone (what the compiled sectors handle)."""
        st = self.standard()
        gens = [g for g, on in (((1, 0, 0), st["translation"]), ((0, 1, 0), st["reflection"]),
                                ((0, 0, 1), st["spin_flip"])) if on]
        return len(closure(gens, self.n_sites)) == self.order

    def names(self) -> list[str]:
        return [element_name(g) for g in self.generators]

    def describe(self) -> str:
        extra = [element_name(g) for g in self.generators]
        out = f"group of order {self.order} generated by {', '.join(extra) if extra else 'the identity'}"
        if self.excluded:
            out += "; " + "; ".join(f"not {k} ({v})" for k, v in self.excluded.items())
        return out

    def restrict(self, keep, reasons: dict | None = None) -> "SymmetryGroup":
        """The subgroup of elements for which ``keep(element)`` is true (must be closed)."""
        els = [g for g in self.elements if keep(g)]
        if set(closure(els, self.n_sites)) != set(els):
            raise ValueError("the kept elements do not form a group")
        ex = dict(self.excluded)
        ex.update(reasons or {})
        return SymmetryGroup(self.n_sites, self.periodic, tuple(els), tuple(_pick_generators(els, self.n_sites)), ex)

    def is_invariant(self, ps: PauliSum) -> dict:
        """{element name: g A g^dagger == A} for each generator."""
        return {element_name(g): commutes(ps, g) for g in self.generators}


def candidates(L: int, periodic: bool) -> list:
    js = range(L) if periodic else (0,)
    return [(j, r, f) for j in js for r in (0, 1) for f in (0, 1)]


def symmetry_group_of(H: PauliSum, periodic: bool) -> SymmetryGroup:
    """All elements T^j R^r F^f (T only on a ring) with g H g^dagger = H, checked on the Pauli strings."""
    L = H.n_sites
    els = [g for g in candidates(L, periodic) if g == IDENTITY or commutes(H, g)]
    els = sorted(set(els), key=lambda g: (g != IDENTITY, g))
    return SymmetryGroup(L, bool(periodic), tuple(els), tuple(_pick_generators(els, L)))


def standard_group(n_sites: int, *, translation: bool, reflection: bool, spin_flip: bool) -> SymmetryGroup:
    """The group generated by the chosen ones of T, R, F (the compiled sectors' groups)."""
    gens = [g for g, on in (((1 % n_sites, 0, 0), translation), ((0, 1, 0), reflection), ((0, 0, 1), spin_flip)) if on]
    els = closure(gens, n_sites)
    els = sorted(els, key=lambda g: (g != IDENTITY, g))
    return SymmetryGroup(n_sites, bool(translation), tuple(els), tuple(g for g in gens if g != IDENTITY))


# ----------------------------------------------------------------------------------------- characters
def _characters_abelian(elements, L: int) -> list[dict]:
    """All 1-d characters of an abelian group given by its elements (brute force over generators)."""
    gens = [g for g in _pick_generators(list(elements), L) if g != IDENTITY]
    orders = []
    for g in gens:
        n, e = 1, g
        while e != IDENTITY:
            e = compose(g, e, L)
            n += 1
        orders.append(n)
    out = []
    for ms in product(*[range(n) for n in orders]):
        vals = [np.exp(2j * np.pi * m / n) for m, n in zip(ms, orders)]
        chi = {IDENTITY: 1.0 + 0j}
        frontier = [IDENTITY]
        ok = True
        while frontier and ok:
            nxt = []
            for e in frontier:
                for g, v in zip(gens, vals):
                    h = compose(g, e, L)
                    c = v * chi[e]
                    if h in chi:
                        if abs(chi[h] - c) > 1e-9:
                            ok = False
                            break
                    else:
                        chi[h] = c
                        nxt.append(h)
                if not ok:
                    break
            frontier = nxt
        if ok and len(chi) == len(elements):
            # snap to exact real values where possible
            out.append({k: (complex(round(v.real), 0) if abs(v.imag) < 1e-12 and abs(abs(v.real) - 1) < 1e-12 else v)
                        for k, v in chi.items()})
    return out


def block_characters(group: SymmetryGroup) -> list[tuple[dict, str]]:
    """1-d characters whose blocks together span the space: [(chi as {element: value}, label)].

    chi is defined on the subgroup its keys list (the whole group, or its rotation part where a
    reflection-type element pairs the character with a different one).
    """
    L = group.n_sites
    rot = [g for g in group.elements if g[1] == 0]
    refl = [g for g in group.elements if g[1] == 1]
    out = []
    for chi in _characters_abelian(rot, L):
        lab = _label(chi, L)
        if refl:
            rho = refl[0]
            inv_ok = all(abs(chi[compose(compose(rho, a, L), rho, L)] - chi[a]) < 1e-9 for a in rot)
            if inv_ok:
                for s in (1, -1):
                    full = dict(chi)
                    for a in rot:
                        full[compose(a, rho, L)] = chi[a] * s
                    out.append((full, (lab + ", " if lab else "") + f"{element_name(rho)} = {s:+d}"))
                continue
        out.append((chi, lab))
    return out


def _label(chi: dict, L: int) -> str:
    parts = []
    t = chi.get((1 % L, 0, 0)) if L > 1 else None
    if t is not None and (1 % L, 0, 0) != IDENTITY:
        m = int(round(np.angle(t) / (2 * np.pi) * L)) % L
        parts.append(f"k = 2pi*{m}/{L}")
        if (0, 0, 1) in chi:
            parts.append(f"F = {int(round(chi[(0, 0, 1)].real)):+d}")
        return ", ".join(parts)
    for g, v in sorted(chi.items()):
        if g == IDENTITY:
            continue
        # label by generators only: elements with small j, pure forms
        if g in {(2 % L, 0, 0), (1 % L, 0, 1), (0, 0, 1)}:
            if abs(v.imag) < 1e-12:
                parts.append(f"{element_name(g)} = {int(round(v.real)):+d}")
            else:
                parts.append(f"{element_name(g)} = e^(i {np.angle(v):.4f})")
    return ", ".join(parts)


# ----------------------------------------------------------------------------------------- total spin
def pauli_product(a: PauliSum, b: PauliSum) -> PauliSum:
    """The operator product A B as a Pauli sum (exact phases; strings written i^{#Y} X^x Z^z)."""
    L = a.n_sites
    xa, za, ca = a.x_mask, a.z_mask, a.phase_coeff
    xb, zb, cb = b.x_mask, b.z_mask, b.phase_coeff
    # X^xa Z^za X^xb Z^zb = (-1)^{popcount(za & xb)} X^(xa^xb) Z^(za^zb)
    X = (xa[:, None] ^ xb[None, :]).reshape(-1)
    Z = (za[:, None] ^ zb[None, :]).reshape(-1)
    sgn = np.vectorize(lambda v: -1.0 if int(v).bit_count() & 1 else 1.0)(za[:, None] & xb[None, :]).reshape(-1) \
        if len(a) and len(b) else np.zeros(0)
    pc = (ca[:, None] * cb[None, :]).reshape(-1) * sgn
    ny = np.array([int(p & q).bit_count() for p, q in zip(X.tolist(), Z.tolist())], dtype=np.int64)
    coeff = pc * (1j ** ((-ny) % 4))  # back from phase coefficient: c = c' i^{-#Y}
    return PauliSum(L, X, Z, coeff).simplify()


def commutator(a: PauliSum, b: PauliSum) -> PauliSum:
    return (pauli_product(a, b) + pauli_product(b, a) * (-1.0)).simplify(PAULI_TOL * max(
        a.max_abs_coeff() * b.max_abs_coeff(), 1e-300))


def _total(L: int, letter: str) -> PauliSum:
    one = np.int64(1) << np.arange(L, dtype=np.int64)
    zero = np.zeros(L, np.int64)
    x, z = {"x": (one, zero), "y": (one, one), "z": (zero, one)}[letter]
    return PauliSum(L, x, z, np.full(L, 0.5, complex))


def conserves_total_spin(H: PauliSum) -> bool:
    """[H, S^x_tot] = [H, S^z_tot] = 0 exactly (then [H, S^2] = 0)."""
    L = H.n_sites
    return len(commutator(H, _total(L, "x"))) == 0 and len(commutator(H, _total(L, "z"))) == 0


def total_spin_squared(L: int) -> PauliSum:
    """S^2 = (S^x)^2 + (S^y)^2 + (S^z)^2 with S^a = sum_i sigma^a_i / 2 (eigenvalues S(S + 1))."""
    out = None
    for a in "xyz":
        t = _total(L, a)
        p = pauli_product(t, t)
        out = p if out is None else out + p
    return out.simplify()
