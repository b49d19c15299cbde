"""Time evolution of a state split over symmetry sectors: one loop, used by the main command, the
tests and the benchmark.

A product state (z-basis or tilted) is a sum of symmetric components, psi = sum_s psi_s, one per sector s
it touches (:func:`largeq.operators.sector_operator.split_start`).  H maps no sector into another, so
each component evolves on its own with :func:`largeq.engines.propagate.evolve` on the sector's operator;
:func:`advance_sectors` drives all components through the output grid block by block (one Chebyshev
expansion per block per sector), hands the components at every output time to a callback (observables
are evaluated across sectors there) and offers the block ends as checkpoint points.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from largeq.engines.bounds import spectral_bounds
from largeq.engines.propagate import evolve
from largeq.model.pauli import PauliSum
from largeq.operators.sector_operator import (SectorComponent, SymmetricOperator, is_invariant, sector_observables,
                                              split_start, observables_for_start)

__all__ = ["SectorProgress", "advance_sectors", "evolve_split"]


@dataclass
class SectorProgress:
    """Where a sector evolution stands: index of the last output reached, states there, cost so far."""

    index: int
    states: list
    matvecs: int = 0
    errors: list = field(default_factory=list)

    @property
    def max_error_estimate(self) -> float:
        return max(self.errors, default=0.0)

    @property
    def total_error_estimate(self) -> float:
        return float(sum(self.errors))


def advance_sectors(ops, states: list, times, *, bounds: list, tol: float = 1e-10, block: int = 1,
                    start_index: int = 0, on_outputs: Callable[[int, list], None],
                    on_block_end: Callable[[SectorProgress], None] | None = None,
                    matvecs: int = 0) -> SectorProgress:
    """Evolve every sector component from ``times[start_index]`` to the last output time, in lockstep.

    Parameters
    ----------
    ops : list of LinearOperator
        One Hamiltonian operator per sector.
    states : list of ndarray
        The components at ``times[start_index]`` (not modified).
    times : array of float
        Output grid (inverse energy units).
    bounds : list of SpectralBounds
        Spectral bounds per sector operator.
    tol : float
        Truncation tolerance of each Chebyshev expansion.
    block : int
        Output times sharing one expansion (block boundaries aligned to absolute indices, as in ``evolve``).
    on_outputs : callable(i, components)
        Called at every output index i > start_index with the list of sector components psi_s(t_i).
    on_block_end : callable(progress) or None
        Called after each block that is not the last (a checkpoint point).
    matvecs : int
        Products already spent (counted on into the returned progress).

    Returns
    -------
    SectorProgress at the last output time.
    """
    times = np.asarray(times, float)
    last = times.size - 1
    progress = SectorProgress(start_index, list(states), int(matvecs))
    i = start_index
    while i < last:
        j_end = min(last, (i // block + 1) * block)
        outs = [[None] * (j_end - i) for _ in ops]
        for a, op in enumerate(ops):
            def keep(idx, t, psi, a=a, i=i):
                outs[a][idx - i - 1] = np.array(psi)
            st = evolve(op, progress.states[a], times[: j_end + 1], bounds=bounds[a], tol=tol, block=block,
                        on_output=keep, start_index=i, emit_start=False)
            progress.matvecs += st.matvecs
            progress.errors.append(st.max_error_estimate)
        for k in range(j_end - i):
            on_outputs(i + 1 + k, [outs[a][k] for a in range(len(ops))])
        progress.states = [outs[a][-1] for a in range(len(ops))]
        progress.index = i = j_end
        if i < last and on_block_end is not None:
            on_block_end(progress)
    return progress


def _sector_info(c: SectorComponent) -> dict:
    return {"label": c.sector.label, "key": c.sector.key, "dimension": c.sector.dim, "weight": c.weight}


def evolve_split(H: PauliSum, start, times, observables: dict[str, PauliSum], *, translation: bool = True,
                 reflection: bool = False, spin_flip: bool = False, lookup: str = "block", tol: float = 1e-10,
                 store_matrix: bool = True, block: int = 1, tables: bool = False, store_observables: bool = False,
                 conserve_magnetization: bool | None = None) -> dict:
    """Relaxation curves of any Hermitian Pauli-sum observables from a product state, sector by sector
    (:func:`advance_sectors`).

    ``start``: a z-basis integer or spinors of shape (L, 2) (tilted states; see
    :func:`~largeq.operators.sector_operator.split_start`; ``conserve_magnetization`` None asks H).
    The curves come from :func:`~largeq.operators.sector_operator.sector_observables` (cross terms
    included; ``tables`` as there, ``store_observables`` its ``store``); for a z-basis start each observable
    is evaluated as its average over the symmetry operations fixing the start (the same curve; see
    :func:`~largeq.operators.sector_operator.observables_for_start`), as ``relax`` does.  ``store_matrix`` (default True) stores each sector matrix as CSR
    (see :class:`~largeq.operators.sector_operator.StoredSectorMatrix`); False keeps the evolution fully
    matrix-free (vectors and O(dim) tables only).

    Returns a dict with ``curves`` {name: array}, ``sectors`` (labels, weights, dims), ``note``,
    ``equivalences`` {name: text} where an observable equals its stabiliser average for this state
    (z-basis starts with a fixed n_up), ``table_bytes``, ``bounds`` and ``matvecs``.
    """
    times = np.asarray(times, float)
    comps, note = split_start(H, start, translation=translation, reflection=reflection, spin_flip=spin_flip,
                              lookup=lookup, conserve_magnetization=conserve_magnetization)
    sectors = [c.sector for c in comps]
    group = sectors[0].group
    bad = [k for k, v in is_invariant(H, group).items() if not v]
    if bad:
        raise ValueError(f"H is not invariant under {', '.join(bad)}")
    equivalences = {}
    if isinstance(start, (int, np.integer)):
        observables, equivalences = observables_for_start(observables, int(start), group)
    cross = sector_observables(sectors, observables, tables=tables, store=store_observables)
    ops = [SymmetricOperator(H, c.sector, check=False) for c in comps]
    if store_matrix:
        ops = [op.stored() for op in ops]
    bounds = [spectral_bounds(op) for op in ops]
    curves = {n: np.zeros(times.size) for n in cross.names}

    def record(i, vecs):
        for n, v in cross(vecs).items():
            curves[n][i] = v

    states = [c.vector.copy() for c in comps]
    record(0, states)
    progress = advance_sectors(ops, states, times, bounds=bounds, tol=tol, block=block, on_outputs=record)
    return {"curves": curves, "sectors": [_sector_info(c) for c in comps], "note": note,
            "equivalences": equivalences, "table_bytes": cross.table_bytes(), "bounds": bounds,
            "matvecs": progress.matvecs}
