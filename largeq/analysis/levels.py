"""Level statistics in fully resolved blocks, and total-spin resolution of dense blocks.

A block of one 1-d character of the symmetry group (``largeq.basis.blocks``) is fully resolved only if
no other conserved quantity is left: when H conserves the total spin S^2 (SU(2)-symmetric chains,
``problem.symmetries['total_spin']``), each block splits further into S = n_up-sector minimum ... L/2
sub-blocks, and <r> must be taken per (block, S) (mixing independent spectra drifts <r> towards Poisson;
Y. Y. Atas et al., PRL 110, 084101 (2013)).

The S of each eigenvector is read from <v|S^2|v> = S(S + 1); inside a degenerate H-eigenspace S^2 is
diagonalized first (it commutes with H, so it can be).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg

from largeq.analysis.equilibrium_formulas import level_spacing_ratio
from largeq.basis.blocks import Block, SymmetryGroup, symmetry_blocks, symmetry_group
from largeq.constants import MAX_DENSE_DIM
from largeq.model.symmetry import total_spin_squared
from largeq.operators.pauli_operator import PauliOperator

__all__ = ["SpinResolved", "spin_resolve", "spin_of", "resolved_level_ratio", "resolved_level_statistics",
           "level_ratios_by_spin", "spin_squared_csr"]

#: Levels closer than this (relative to max(1, |E|)) are treated as one eigenspace when S is assigned.
SPIN_DEGENERACY_TOL = 1e-9


def spin_of(s2_value: float) -> float:
    """S from S(S + 1) (half-integer steps)."""
    return 0.5 * round(2.0 * (-0.5 + np.sqrt(0.25 + max(float(s2_value), 0.0))))


@dataclass(frozen=True, eq=False)
class SpinResolved:
    """Eigen-decomposition of a block with a total spin S attached to every eigenvector."""

    energies: np.ndarray
    vectors: np.ndarray
    spins: np.ndarray


def spin_resolve(h_block: np.ndarray, s2_block, *, vectors: bool = True) -> SpinResolved:
    """Diagonalize H in a block and give each eigenvector its S (S^2 diagonalized in degenerate levels).

    Raises ValueError when <v|S^2|v> is not S(S + 1) to 1e-6 (H does not conserve S^2).
    """
    e, v = scipy.linalg.eigh(h_block, check_finite=False)
    s2v = s2_block @ v
    tol = SPIN_DEGENERACY_TOL * max(1.0, float(np.max(np.abs(e))) if e.size else 1.0)
    starts = np.flatnonzero(np.concatenate([[True], np.diff(e) > tol]))
    ends = np.append(starts[1:], e.size)
    vals = np.empty(e.size)
    for a, b in zip(starts, ends):
        m = v[:, a:b].conj().T @ s2v[:, a:b]
        if b - a == 1:
            vals[a] = float(np.real(m[0, 0]))
        else:
            w, u = scipy.linalg.eigh(0.5 * (m + m.conj().T))
            vals[a:b] = w
            v[:, a:b] = v[:, a:b] @ u
    spins = np.array([spin_of(x) for x in vals])
    if np.max(np.abs(spins * (spins + 1) - vals), initial=0.0) > 1e-6:
        raise ValueError("S^2 is not diagonal in the eigenbasis of H: H does not conserve the total spin")
    return SpinResolved(e, v if vectors else None, spins)


def spin_squared_csr(problem):
    """S^2 on the problem's basis (CSR)."""
    return PauliOperator(total_spin_squared(problem.n_sites), problem.basis).to_csr()


def _s2_block(problem, blk, s2=None):
    s2 = spin_squared_csr(problem) if s2 is None else s2
    m = (blk.q.conj().T @ (s2 @ blk.q)).toarray()
    return m.real if np.iscomplexobj(m) and np.max(np.abs(m.imag), initial=0.0) < 1e-13 else m


def level_ratios_by_spin(problem, blk, *, central_fraction: float = 0.5, min_levels: int = 20) -> dict:
    """{S: (SpacingRatio, number of levels)} in the (block, S) sub-blocks with at least ``min_levels`` levels."""
    h = problem.operator.to_csr()
    res = spin_resolve(blk.hamiltonian(h), _s2_block(problem, blk), vectors=True)
    out = {}
    for s in np.unique(res.spins):
        e = res.energies[res.spins == s]
        if e.size >= min_levels:
            try:
                out[float(s)] = (level_spacing_ratio(e, central_fraction=central_fraction), int(e.size))
            except ValueError:
                pass
    return out


def resolved_level_ratio(problem, *, which: str | dict = "trivial", central_fraction: float = 0.5,
                         max_dim: int = MAX_DENSE_DIM, group: SymmetryGroup | None = None,
                         resolve_total_spin: bool | None = None):
    """<r> in one fully resolved block (default: the trivial character, k = 0 and all parities +1).

    When H conserves the total spin (``resolve_total_spin`` None: from ``problem.symmetries``), the block
    is split by S and the largest (block, S) sub-block is used.

    Returns
    -------
    (SpacingRatio, Block, SymmetryGroup)
        The spacing ratio, the block (its label says which S when resolved) and the group.
    """
    ratio, blk, group, _ = resolved_level_statistics(problem, which=which, central_fraction=central_fraction,
                                                     max_dim=max_dim, group=group,
                                                     resolve_total_spin=resolve_total_spin)
    return ratio, blk, group


def resolved_level_statistics(problem, *, which: str | dict = "trivial", central_fraction: float = 0.5,
                              max_dim: int = MAX_DENSE_DIM, group: SymmetryGroup | None = None,
                              resolve_total_spin: bool | None = None):
    """As :func:`resolved_level_ratio`, plus {S: (SpacingRatio, levels)} for every (block, S) sub-block
    with at least 10 levels (empty when S is not resolved)."""
    group = group or symmetry_group(problem)
    blocks = symmetry_blocks(problem, group=group, which=which)
    if not blocks:
        raise ValueError(f"the block {which!r} is empty for this basis")
    blk = blocks[0]
    if blk.dim > max_dim:
        raise ValueError(f"block {blk.label} has dimension {blk.dim:,} > max_dim = {max_dim:,}")
    if resolve_total_spin is None:
        resolve_total_spin = bool(problem.symmetries.get("total_spin", False))
    per = {}
    if resolve_total_spin:
        per = level_ratios_by_spin(problem, blk, central_fraction=central_fraction, min_levels=10)
        if per:
            s, (ratio, n) = max(per.items(), key=lambda kv: kv[1][1])
            blk = Block(f"{blk.label}, total spin S = {s:g} ({n} levels)", blk.quantum_numbers, blk.q)
            return ratio, blk, group, per
        # too few levels in every S: the block's <r> mixes independent S spectra (biased towards Poisson)
        blk = Block(f"{blk.label}, total spin NOT resolved (fewer than 10 levels per S; <r> biased low)",
                    blk.quantum_numbers, blk.q)
    h = problem.operator.to_csr()
    e = scipy.linalg.eigvalsh(blk.hamiltonian(h), check_finite=False)
    return level_spacing_ratio(e, central_fraction=central_fraction), blk, group, per
