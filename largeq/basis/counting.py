"""Exact dimensions of symmetry sectors by Burnside's lemma with characters (no enumeration).

The dimension of the chi-isotypic part of a permutation representation of a finite group G is

    dim_chi = (1/|G|) sum_{g in G} conj(chi(g)) fix_N(g)

for a one-dimensional character chi, where fix_N(g) counts the basis states with n_up = N that g
leaves unchanged (Burnside's lemma weighted by characters; the plain lemma, chi = 1, counts orbits).
A state fixed by a site permutation pi is constant on every cycle of pi; with a spin flip combined
it alternates along every cycle, so every cycle must be even and holds exactly half up spins:

    fix_N(pi)      = [x^N] prod_cycles (1 + x^len),
    fix_N(pi F)    = [x^N] prod_cycles (2 x^{len/2}) (zero if a cycle is odd).

Translations T^j (cycles: gcd(j, L) of length L / gcd(j, L)) are grouped by d = gcd(j, L) and the
character sum over j with gcd(j, L) = d is the Ramanujan sum c_{L/d}(m), an integer, so the
count is exact integer arithmetic at every L.  Reflections enter only at k = 0, pi (real characters).
"""

from __future__ import annotations

from math import comb, gcd

__all__ = ["fixed_count", "sector_dimension", "orbit_count", "ramanujan_sum", "magnetization_dimension"]


def _mobius(n: int) -> int:
    res, p = 1, 2
    while p * p <= n:
        if n % p == 0:
            n //= p
            if n % p == 0:
                return 0
            res = -res
        p += 1
    return -res if n > 1 else res


def ramanujan_sum(q: int, m: int) -> int:
    """c_q(m) = sum_{1 <= a <= q, gcd(a, q) = 1} e^{2 pi i a m / q} = sum_{d | gcd(q, m)} mu(q/d) d."""
    g = gcd(q, m) if m else q
    return sum(_mobius(q // d) * d for d in range(1, g + 1) if g % d == 0)


def _poly_mul(a: list[int], b: list[int]) -> list[int]:
    out = [0] * (len(a) + len(b) - 1)
    for i, x in enumerate(a):
        if x:
            for j, y in enumerate(b):
                out[i + j] += x * y
    return out


def fixed_count(cycles: list[int], n_up: int, flip: bool = False) -> int:
    """Number of states with ``n_up`` up spins fixed by a site permutation with these cycle lengths
    (composed with the global spin flip when ``flip``)."""
    poly = [1]
    for c in cycles:
        if flip:
            if c % 2:
                return 0
            term = [0] * (c // 2) + [2]
        else:
            term = [1] + [0] * (c - 1) + [1]
        poly = _poly_mul(poly, term)
    return poly[n_up] if n_up < len(poly) else 0


def _cycles(perm: list[int]) -> list[int]:
    seen, out = [False] * len(perm), []
    for i in range(len(perm)):
        if not seen[i]:
            n, j = 0, i
            while not seen[j]:
                seen[j] = True
                j = perm[j]
                n += 1
            out.append(n)
    return out


def sector_dimension(n_sites: int, n_up: int, *, momentum: int | None = 0, reflection: int | None = None,
                     flip: int | None = None) -> int:
    """Dimension of the sector (momentum m, reflection parity, flip parity) of the n_up sector.

    Same arguments as :func:`largeq.basis.sectors.symmetric_sector`; ``None`` leaves a generator out.
    """
    L = int(n_sites)
    if flip is not None and 2 * n_up != L:
        raise ValueError("spin flip needs n_up = L/2")
    if reflection is not None and momentum is not None and (2 * momentum) % L:
        raise ValueError("reflection parity needs k = 0 or pi")
    m = 0 if momentum is None else momentum % L
    sf = flip or 1
    sr = reflection or 1
    total = 0
    t_range = range(L) if momentum is not None else (0,)
    order = len(t_range) * (2 if reflection is not None else 1) * (2 if flip is not None else 1)
    # translations (and translation x flip): grouped by d = gcd(j, L)
    if momentum is not None:
        for d in range(1, L + 1):
            if L % d:
                continue
            cyc = [L // d] * d  # T^j with gcd(j, L) = d: d cycles of length L/d
            c = ramanujan_sum(L // d, m)  # sum of e^{-ikj} over those j (real)
            total += c * fixed_count(cyc, n_up)
            if flip is not None:
                total += c * sf * fixed_count(cyc, n_up, flip=True)
    else:
        total += fixed_count([1] * L, n_up)
        if flip is not None:
            total += sf * fixed_count([1] * L, n_up, flip=True)
    # reflections T^j R (real characters: (+-1)^j at k = 0, pi)
    if reflection is not None:
        for j in t_range:
            perm = [(j + L - 1 - i) % L for i in range(L)]
            cyc = _cycles(perm)
            ch = (1 if (m * j) % L == 0 else -1) * sr
            total += ch * fixed_count(cyc, n_up)
            if flip is not None:
                total += ch * sf * fixed_count(cyc, n_up, flip=True)
    if total % order:
        raise ArithmeticError(f"character sum {total} not divisible by |G| = {order} (bug)")
    return total // order


def orbit_count(n_sites: int, n_up: int, *, translation: bool = True, reflection: bool = False,
                spin_flip: bool = False) -> int:
    """Number of orbits (Burnside's lemma, chi = 1): the number of representatives."""
    return _orbits(n_sites, n_up, translation, reflection, spin_flip)


def _orbits(L, n_up, translation, reflection, spin_flip) -> int:
    total, order = 0, 0
    for j in (range(L) if translation else (0,)):
        for p in ((0, 1) if reflection else (0,)):
            perm = [((L - 1 - i) if p else i) for i in range(L)]
            perm = [(q + j) % L for q in perm]
            cyc = _cycles(perm)
            for f in ((False, True) if spin_flip else (False,)):
                total += fixed_count(cyc, n_up, flip=f)
                order += 1
    return total // order


def magnetization_dimension(n_sites: int, n_up: int) -> int:
    return comb(n_sites, n_up)
