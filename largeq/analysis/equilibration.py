"""Equilibration quantities of a problem: exact (dense) and estimated (KPM, typicality).

Three library functions on a :class:`~largeq.operators.problem.Problem` (hbar = 1; energies in the scenario's
units; observables are Pauli operators):

* :func:`exact_equilibration` -- full diagonalization: weights p_E, d_eff = 1 / sum_E p_E^2 (degenerate
  levels grouped), per observable the diagonal-ensemble value, the exact infinite-time variance
  sigma_A^2 (degenerate gaps handled), the fluctuation bound and sigma_A^2 / bound, the largest gap
  degeneracy N(0) = D_G and the mean level-spacing ratio <r> in one fully resolved symmetry block.
  Bound: sigma_A^2 <= D_G ||A||^2 / d_eff and the tighter D_G (a_max - a_min)^2 / (4 d_eff)
  (P. Reimann, PRL 101, 190403 (2008); A. J. Short, New J. Phys. 13, 053009 (2011);
  A. J. Short & T. C. Farrelly, New J. Phys. 14, 013063 (2012)).
* :func:`estimate_deff` -- d_eff from the KPM local density of states of the initial state and the
  density of states of the symmetric subspace it lives in, sum |c|^4 ~ eta int rho_psi^2 / rho dE
  (random-matrix reasoning, F. M. Izrailev, Phys. Rep. 196, 299 (1990)), with a flag for narrow
  distributions, known-integrable models and Poisson-like level statistics; plus the survival-probability
  plateau as a second rough estimate.  The formula is the *raw* estimate; the *calibrated* one
  (:func:`calibrate_deff`) multiplies it by the ratio exact / raw measured at the exact sizes of the same
  scenario, fitted against L and extrapolated with a prediction interval, and is called reliable only
  when leaving the largest exact size out and predicting it from the smaller ones succeeds.
* :func:`thermal_values` -- canonical (thermal pure quantum states, beta solved for <H>_beta = E;
  S. Sugiura & A. Shimizu, PRL 108, 240401 (2012); PRL 111, 010401 (2013)) and microcanonical values.
  :func:`exact_thermal_values` gives the same from the dense spectrum of every symmetry block of the
  basis (small sizes), for the cross-check.

Symmetry blocks.  H is block diagonal in the 1-d characters of its symmetry group (all products of
translations, reflection and spin flip that commute with H; ``largeq.model.symmetry``).
``exact_equilibration`` splits the state over the blocks it touches, diagonalizes each on its own and
joins them with cross-block matrix elements of the observables, levels degenerate across blocks grouped
into one eigenspace (``largeq.engines.exact_split``): the results equal those of the whole basis, and the
largest touched block -- not the basis -- decides feasibility.  Where H conserves the total spin, <r> and
the exact thermal values are resolved in S as well (``largeq.analysis.levels``).

Symmetric subspace.  The initial state's dynamics never leaves range(P_lambda), the subspace fixed by
the symmetry operations that leave psi invariant up to a phase (``largeq.basis.blocks``).
``estimate_deff`` uses the density of states of that subspace: with the DOS of the whole basis the
estimate would count levels the state can never occupy (too large by about the number of symmetry
sectors).
"""

from __future__ import annotations

import copy
import time
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg
import scipy.optimize

from largeq.analysis.equilibrium_formulas import (GOE_R, POISSON_R, DeffEstimate, SpacingRatio, amplitude_eta,
                                                   deff_from_densities, fluctuation_bound, survival_plateau)
from largeq.analysis.fits import LinearFit, Prediction, constant_fit, linear_fit, prediction_interval
from largeq.engines.bounds import spectral_bounds
from largeq.engines.exact import ExactQuench, Spectrum
from largeq.engines.kpm import (chebyshev_moments, chebyshev_scale, kernel_factors, local_density,
                                reconstruct_cumulative, reconstruct_density)
from largeq.engines.typical import canonical_averages, microcanonical_average, random_state, solve_beta
from largeq.analysis.levels import resolved_level_statistics
from largeq.basis.blocks import (StateBlock, SymmetryGroup, state_blocks, state_subspace,
                                 symmetry_blocks, symmetry_group)
from largeq.engines.exact_split import quench_split, split_memory_bytes
from largeq.constants import BOUNDS_SEED, MAX_DENSE_DIM
from largeq.machine import available_bytes

__all__ = [
    "DenseLimitError",
    "ObservableEquilibration",
    "ExactEquilibration",
    "exact_equilibration",
    "ExactPlan",
    "exact_plan",
    "SubspaceDensity",
    "DeffResult",
    "estimate_deff",
    "CalibrationPoint",
    "DeffCalibration",
    "calibrate_deff",
    "calibration_points",
    "integrability_warning",
    "ThermalValues",
    "thermal_values",
    "ExactThermal",
    "exact_thermal_values",
    "conserved_left_out",
    "BOUNDS_SEED",
    "default_bounds",
]

#: Fixed seed of the Lanczos start vector for spectral bounds (bounds are reproducible).
#: Above this many (group elements x basis states) the symmetry permutations are not built.
MAX_PERMUTATION_ENTRIES = 200_000_000


def default_bounds(op):
    """Spectral bounds for KPM and propagation: 150 Lanczos steps (fixed seed), 2 % padding.

    More steps than the engine default: at small dimensions with many symmetry sectors a short run can
    miss an extreme sector, and the Chebyshev propagator then stops on norm drift.
    """
    return spectral_bounds(op, steps=min(150, op.shape[0]), margin=0.02, rng=np.random.default_rng(BOUNDS_SEED))


class DenseLimitError(ValueError):
    """Dense diagonalization refused: the (sub)space is larger than ``max_dim``."""


# --------------------------------------------------------------------------------------------- helpers
def _initial(problem, psi):
    if psi is None:
        psi, _ = problem.initial_vector()
    psi = np.asarray(psi, dtype=complex)
    n = float(np.linalg.norm(psi))
    if not n > 0:
        raise ValueError("the initial state has zero weight in the basis")
    return psi / n


def _group_or_none(problem, group=None):
    if group is not None:
        return group
    if problem.basis.dim * 4 * problem.n_sites > MAX_PERMUTATION_ENTRIES:
        return None
    return symmetry_group(problem, check=problem.basis.dim <= 2**20)


def _compress(q, a_csr) -> np.ndarray:
    m = (q.conj().T @ (a_csr @ q)).toarray()
    if np.iscomplexobj(m) and np.max(np.abs(m.imag), initial=0.0) <= 1e-14 * max(np.max(np.abs(m), initial=0.0), 1e-300):
        m = m.real
    return 0.5 * (m + m.conj().T)


# --------------------------------------------------------------------------------------------- exact
@dataclass(frozen=True)
class ObservableEquilibration:
    """Exact equilibration numbers of one observable A (units of A; variances in units of A^2).

    Attributes
    ----------
    name : str
    initial : float
        <psi|A|psi>.
    equilibrium : float
        Diagonal-ensemble value <A>_inf = sum_E <psi_E|A|psi_E>.
    variance : float
        Exact infinite-time variance sigma_A^2 (gaps grouped, degenerate gaps handled).
    variance_nondegenerate : float
        sum_{E != E'} |<psi_E|A|psi_E'>|^2 (equal to ``variance`` without degenerate gaps).
    norm, a_min, a_max : float
        ||A|| and the extreme eigenvalues of A on the whole space (exact, from the model layer).
    bound_norm : float
        D_G ||A||^2 / d_eff.
    bound_range : float
        D_G (a_max - a_min)^2 / (4 d_eff) (the tighter one).
    gap_factor : float
        D_G used in both bounds (1 without degenerate gaps).
    ratio : float
        variance / bound_range (<= 1 when the bound holds).
    holds : bool
        variance <= bound_range (to rounding, relative 1e-10).
    reference : str
    """

    name: str
    initial: float
    equilibrium: float
    variance: float
    variance_nondegenerate: float
    norm: float
    a_min: float
    a_max: float
    bound_norm: float
    bound_range: float
    gap_factor: float
    ratio: float
    holds: bool
    reference: str


@dataclass(frozen=True, eq=False)
class ExactEquilibration:
    """Exact equilibration analysis of a problem's quench (full diagonalization).

    Attributes
    ----------
    n_sites, basis_dim : int
        Chain length and dimension of the problem's basis.
    dim : int
        Dimension actually diagonalized (sum of the blocks the state touches when reduced).
    subspace : str
        Which subspace, in words.
    d_eff, ipr : float
        1 / sum_E p_E^2 and sum_E p_E^2 (degenerate levels grouped).
    n_levels, n_occupied : int
        Distinct levels of the diagonalized space; levels with p_E > 1e-14.
    energy_mean, energy_variance : float
        <H> and <H^2> - <H>^2 of the initial state.
    gap_degeneracy : int
        N(0) = D_G, largest number of occupied level pairs sharing one nonzero gap.
    n_degenerate_gaps : int
    observables : dict name -> ObservableEquilibration
    level_ratio : SpacingRatio or None
        <r> in one fully resolved block (None if no block with enough levels fits).
    level_block : str
        Label and dimension of that block, and the symmetries resolved.
    energies : ndarray
        Eigenvalues of the diagonalized space (ascending).
    quench : ExactQuench
        The engine's full result (survival(), weights; curve() only up to dimension 3000).
    seconds : float
    block_dims : tuple of int
        Dimensions of the blocks diagonalized one by one.
    level_ratios_by_spin : dict S -> dict
        <r> (mean, stderr, n, levels) in every (block, S) sub-block of the level-statistics block with
        at least 10 levels, when H conserves the total spin.
    """

    n_sites: int
    basis_dim: int
    dim: int
    subspace: str
    d_eff: float
    ipr: float
    n_levels: int
    n_occupied: int
    energy_mean: float
    energy_variance: float
    gap_degeneracy: int
    n_degenerate_gaps: int
    observables: dict
    level_ratio: SpacingRatio | None
    level_block: str
    energies: np.ndarray = field(repr=False)
    quench: ExactQuench = field(repr=False)
    seconds: float = 0.0
    block_dims: tuple = ()
    level_ratios_by_spin: dict = field(default_factory=dict)

    def summary(self) -> dict:
        """Plain numbers for JSON (no arrays)."""
        return {
            "sites": self.n_sites, "basis_dimension": self.basis_dim, "diagonalized_dimension": self.dim,
            "subspace": self.subspace, "d_eff": self.d_eff, "n_levels": self.n_levels,
            "n_occupied": self.n_occupied, "energy_mean": self.energy_mean,
            "energy_variance": self.energy_variance, "gap_degeneracy_N0": self.gap_degeneracy,
            "n_degenerate_gaps": self.n_degenerate_gaps,
            "level_ratio": None if self.level_ratio is None else {
                "mean": self.level_ratio.mean_r, "stderr": self.level_ratio.stderr, "n": self.level_ratio.n,
                "block": self.level_block, "goe": GOE_R, "poisson": POISSON_R,
                "by_total_spin": {str(k): v for k, v in self.level_ratios_by_spin.items()}},
            "observables": {n: o.__dict__.copy() for n, o in self.observables.items()},
            "block_dimensions": list(self.block_dims), "seconds": self.seconds,
        }


@dataclass(frozen=True)
class ExactPlan:
    """What exact equilibration would diagonalize, known before anything large is allocated.

    Attributes
    ----------
    blocks : list of StateBlock
        The symmetry blocks the state touches (label, dimension, weight), or one whole-basis entry.
    largest : int
        Largest block dimension (decides feasibility, not the basis dimension).
    memory_bytes : int
        Forecast peak: the dense work (``largeq.engines.exact_split.split_memory_bytes``) plus H in CSR,
        the group's permutation tables and the temporaries of one block basis.
    complex_valued : bool
    description : str
    """

    blocks: list
    largest: int
    memory_bytes: int
    complex_valued: bool
    description: str

    @property
    def dims(self) -> list:
        return [b.dim for b in self.blocks]


def exact_plan(problem, *, psi=None, group: SymmetryGroup | None = None, reduce: bool = True) -> ExactPlan:
    """The blocks the state touches with their dimensions and weights, and the memory forecast.

    Costs one pass per symmetry element over the basis (no block is built).
    """
    psi = _initial(problem, psi)
    basis = problem.basis
    group = _group_or_none(problem, group) if reduce else None
    real_h = bool(problem.symmetries.get("real", False))
    real_psi = bool(np.max(np.abs(psi.imag), initial=0.0) == 0.0)
    if group is not None:
        blocks = state_blocks(problem, psi, group=group)
        complex_valued = (not real_h) or (not real_psi) or any(
            abs(complex(v).imag) > 1e-14 for b in blocks for v in b.character.values())
        desc = (f"{len(blocks)} symmetry block(s) touched by the initial state (dimensions "
                f"{', '.join(f'{b.dim:,}' for b in blocks)} of {basis.dim:,}; {group.describe()})")
    else:
        blocks = [StateBlock(f"whole basis ({basis.label})", {}, int(basis.dim), 1.0)]
        complex_valued = (not real_h) or (not real_psi)
        desc = f"whole basis ({basis.label})"
    dims = [b.dim for b in blocks]
    # besides the dense work: H in CSR on the basis (plus one product in the compression), the permutation
    # tables of the group and the temporaries of one block basis Q (rows, columns, values per element)
    nnz = basis.dim * (len(problem.hamiltonian.groups()) + 1)
    tables = 2 * 12 * nnz + 16 * basis.dim * 4
    if group is not None:
        tables += 8 * basis.dim * group.order + 24 * basis.dim * max(len(b.character) for b in blocks)
    mem = split_memory_bytes(dims, complex_valued) + tables
    return ExactPlan(blocks, max(dims), int(mem), complex_valued, desc)


def exact_equilibration(problem, *, max_dim: int = MAX_DENSE_DIM, reduce: bool = True, psi=None,
                        level_statistics: bool = True, group: SymmetryGroup | None = None,
                        observables=None, memory_limit: int | None = None,
                        plan: ExactPlan | None = None) -> ExactEquilibration:
    """Exact d_eff, <A>_inf, sigma_A^2, fluctuation bounds, N(0) and <r> by dense diagonalization.

    d_eff = 1 / sum_E p_E^2 with p_E = ||P_E psi||^2; sigma_A^2 <= D_G (a_max - a_min)^2 / (4 d_eff).

    The state is split over the symmetry blocks it touches (1-d characters of the symmetry group of H,
    products of T, R, F included); each block is diagonalized on its own, observables enter with their
    cross-block matrix elements, and levels degenerate across blocks are grouped into one eigenspace
    (``largeq.engines.exact_split.quench_split``).  All results equal those of the whole basis.

    Parameters
    ----------
    problem : Problem
    max_dim : int
        Largest block diagonalized densely (default 13000, about 1.4 GB real and minutes on 2 cores);
        a larger block raises :class:`DenseLimitError` before anything is allocated.
    reduce : bool
        Split over symmetry blocks (default); False diagonalizes the problem's whole basis.
    psi : ndarray, optional
        Initial state in the basis (default: the scenario's).
    level_statistics : bool
        Compute <r> in the fully resolved block k = 0, all parities +1 (and one total spin S when H
        conserves S^2).
    group : SymmetryGroup, optional
        Reuse an already built symmetry group.
    observables : sequence of str, optional
        Names to analyse (default all of the scenario's; ``[]`` for d_eff, N(0) and <r> only, much faster).
    memory_limit : int, optional
        Bytes the dense work may use (default 90 % of MemAvailable); a larger forecast raises
        :class:`DenseLimitError`.
    plan : ExactPlan, optional
        From :func:`exact_plan` (reused).

    Returns
    -------
    ExactEquilibration
    """
    t0 = time.perf_counter()
    psi = _initial(problem, psi)
    basis = problem.basis
    group = _group_or_none(problem, group) if (reduce or level_statistics) else group
    if plan is None:
        plan = exact_plan(problem, psi=psi, group=group, reduce=reduce)
    dim = int(sum(plan.dims))
    if plan.largest > max_dim:
        raise DenseLimitError(
            f"dense diagonalization of a block of dimension {plan.largest:,} refused (max_dim = {max_dim:,}; "
            f"{plan.description}); it would need about {plan.memory_bytes / 2**30:.1f} GiB and O(D^3) time. "
            "Use a smaller chain or the KPM estimate.")
    limit = int(0.9 * available_bytes()) if memory_limit is None else int(memory_limit)
    if plan.memory_bytes > limit:
        raise DenseLimitError(
            f"exact equilibration refused: forecast {plan.memory_bytes / 2**30:.1f} GiB > limit "
            f"{limit / 2**30:.1f} GiB ({plan.description}); max_dim = {max_dim:,}")
    names = list(problem.observables) if observables is None else list(observables)
    for name in names:
        if name not in problem.observables:
            raise ValueError(f"observable {name!r} is not in the scenario ({', '.join(problem.observables)})")
    h = problem.operator.to_csr()
    sectors, qs = [], []
    whole = len(plan.blocks) == 1 and not plan.blocks[0].character
    for blk in plan.blocks:
        if whole:
            q, vec = None, psi
            hm = h.toarray()
        else:
            q, vec = blk.build(group, psi)
            hm = _compress(q, h)
        # hm is Hermitian by construction (_compress); eigh overwrites it (peak: hm + eigenvectors)
        if np.iscomplexobj(hm) and not np.any(hm.imag):
            hm = np.ascontiguousarray(hm.real)
        e_b, v_b = scipy.linalg.eigh(hm, overwrite_a=True, check_finite=False)
        spec = Spectrum(e_b, v_b)
        del hm, e_b, v_b
        sectors.append((spec, vec))
        qs.append(q)
    del h
    obs = {}
    for name in names:
        a = problem.observable_operator(name).to_csr()
        blocks = {}
        for s in range(len(qs)):
            for r in range(s, len(qs)):
                if qs[s] is None:
                    m = a
                else:
                    m = (qs[s].conj().T @ (a @ qs[r])).tocsr()
                    m.eliminate_zeros()
                    if m.nnz and float(abs(m).max()) < 1e-14:
                        m = None
                if m is not None and m.nnz:
                    if np.iscomplexobj(m) and float(abs(m.imag).max() if m.nnz else 0.0) == 0.0:
                        m = m.real
                    blocks[(s, r)] = m
        obs[name] = blocks
    energies = np.sort(np.concatenate([sp_.energies for sp_, _ in sectors]))
    eq = quench_split(sectors, obs, consume=True, keep_level_matrices=dim <= 3000)
    del sectors, obs
    results = {}
    for name in names:
        o = problem.observables[name]
        oq = eq.observables[name]
        bn = fluctuation_bound(o.norm, eq.d_eff, gap_degeneracy=eq.gap_degeneracy)
        br = fluctuation_bound(o.norm, eq.d_eff, a_min=o.a_min, a_max=o.a_max, gap_degeneracy=eq.gap_degeneracy)
        results[name] = ObservableEquilibration(
            name=name, initial=oq.initial, equilibrium=oq.equilibrium, variance=oq.variance,
            variance_nondegenerate=oq.variance_nondegenerate, norm=float(o.norm), a_min=float(o.a_min),
            a_max=float(o.a_max), bound_norm=bn.value, bound_range=br.value, gap_factor=br.gap_factor,
            ratio=oq.variance / br.value if br.value > 0 else float("inf"), holds=br.holds(oq.variance),
            reference=br.reference,
        )
    ratio, block_desc, per_spin = None, "not computed", {}
    if level_statistics and group is not None:
        try:
            ratio, blk, _, per = resolved_level_statistics(problem, group=group, max_dim=max_dim)
            block_desc = f"{blk.label} (dimension {blk.dim:,}; {group.describe()})"
            per_spin = {s: {"mean": r.mean_r, "stderr": r.stderr, "n": r.n, "levels": n} for s, (r, n) in per.items()}
        except ValueError as exc:
            block_desc = f"not available: {exc}"
    occupied = int(np.count_nonzero(eq.level_weights > 1e-14))
    return ExactEquilibration(
        n_sites=problem.n_sites, basis_dim=int(basis.dim), dim=dim, subspace=plan.description, d_eff=eq.d_eff,
        ipr=eq.ipr, n_levels=int(eq.level_energies.size), n_occupied=occupied, energy_mean=eq.energy_mean,
        energy_variance=eq.energy_variance, gap_degeneracy=int(eq.gap_degeneracy),
        n_degenerate_gaps=int(eq.n_degenerate_gaps), observables=results, level_ratio=ratio,
        level_block=block_desc, energies=energies, quench=eq, seconds=time.perf_counter() - t0,
        block_dims=tuple(plan.dims), level_ratios_by_spin=per_spin,
    )


# --------------------------------------------------------------------------------------------- d_eff estimate
@dataclass(frozen=True, eq=False)
class SubspaceDensity:
    """KPM density of states of the symmetric subspace the state lives in (states per energy unit).

    Attributes
    ----------
    energies, density, density_err : ndarray
        Grid (ascending), density (integrates to ``trace``) and its standard error over the vectors.
    cumulative, cumulative_err : ndarray
        Exact integral of the damped series from the lower end of the rescaled interval.
    trace : float
        Tr P exactly (the subspace dimension; the moments are rescaled so that mu_0 = Tr P).
    moments : ndarray
        Mean undamped moments (mu_0 = trace).
    kernel_factors : ndarray; scale, shift : float; n_moments, n_vectors : int
    resolution_center : float
        pi a / N, the Jackson width at the band centre (energy units).
    """

    energies: np.ndarray
    density: np.ndarray
    density_err: np.ndarray
    cumulative: np.ndarray
    cumulative_err: np.ndarray
    trace: float
    moments: np.ndarray
    kernel_factors: np.ndarray
    scale: float
    shift: float
    n_moments: int
    n_vectors: int
    resolution_center: float
    samples: np.ndarray | None = field(default=None, repr=False)


def _projected_dos(op, elements, chars, trace, n_moments, n_vectors, rng, bounds, n_points, eps=0.01):
    """Stochastic trace of P delta(E - H) with P = (1/|G|) sum chi(g)^* g, Gaussian vectors."""
    dim = op.shape[0]
    a, b = chebyshev_scale(bounds, eps)
    g = kernel_factors("jackson", n_moments)
    moments = np.empty((n_vectors, n_moments))
    children = rng.spawn(n_vectors)
    tmp = np.empty(dim, dtype=complex)
    for i in range(n_vectors):
        r = random_state(dim, children[i], kind="gaussian", dtype=complex, normalize=False)
        if elements is None:
            pr = r
        else:
            pr = np.zeros(dim, dtype=complex)
            for perm, c in zip(elements, chars):
                tmp[perm] = r
                pr += np.conj(c) * tmp
            pr /= len(elements)
        moments[i] = chebyshev_moments(op, pr, n_moments, bounds, eps=eps)
    # ratio estimator: the exact trace fixes the normalisation, the vectors the shape
    moments *= trace / moments[:, 0].mean()
    x, rho_i = reconstruct_density(moments * g, n_points)
    _, cum_i = reconstruct_cumulative(moments * g, n_points)
    R = n_vectors
    err = rho_i.std(axis=0, ddof=1) / np.sqrt(R) if R > 1 else np.full(x.size, np.nan)
    cerr = cum_i.std(axis=0, ddof=1) / np.sqrt(R) if R > 1 else np.full(x.size, np.nan)
    return SubspaceDensity(
        energies=a * x + b, density=rho_i.mean(axis=0) / a, density_err=err / a, cumulative=cum_i.mean(axis=0),
        cumulative_err=cerr, trace=float(trace), moments=moments.mean(axis=0), kernel_factors=g, scale=a,
        shift=b, n_moments=n_moments, n_vectors=R, resolution_center=float(np.pi * a / n_moments),
        samples=rho_i / a,
    )


def _jackknife_log_err(energies, ldos, dos, eta, resolution) -> float:
    """Jackknife standard error of ln d_eff over the DOS random vectors (NaN with fewer than 2 vectors).

    sigma^2 = (R - 1)/R sum_i (ln d_(i) - mean)^2, d_(i) the estimate with vector i left out (the usual
    delete-one jackknife; B. Efron, "The jackknife, the bootstrap and other resampling plans", SIAM 1982).
    """
    if dos.samples is None or dos.samples.shape[0] < 2:
        return float("nan")
    R = dos.samples.shape[0]
    total = dos.samples.sum(axis=0)
    vals = []
    for i in range(R):
        rho = (total - dos.samples[i]) / (R - 1)
        vals.append(np.log(deff_from_densities(energies, ldos, rho, eta=eta, resolution=resolution).d_eff))
    vals = np.asarray(vals)
    return float(np.sqrt((R - 1) / R * np.sum((vals - vals.mean()) ** 2)))


def _paired_fraction(group, els, chars, keys, trace) -> float:
    """Share of Tr P in momenta k != 0, L/2 whose levels pair with -k (reflection in H, not in G_psi).

    Tr(P P_0) and Tr(P P_{L/2}) from fixed points of g T^j; 0 when no pairing applies.
    """
    if not ("translation" in group.generators and "reflection" in group.generators):
        return 0.0
    if any(k[1] for k in keys):
        return 0.0  # the state's subspace holds one combination of k and -k per pair
    L = group.n_sites
    shifts = {k[0]: p for k, p in group.elements if k[1] == 0 and k[2] == 0}
    idx = np.arange(els[0].size)
    t0 = tpi = 0.0
    for p, c in zip(els, chars):
        for j, tj in shifts.items():
            fixed = float(np.count_nonzero(p[tj] == idx))
            val = float(np.real(np.conj(c))) * fixed
            t0 += val
            tpi += val * (-1.0) ** j
    n = len(els) * L
    t0 /= n
    tpi = tpi / n if L % 2 == 0 else 0.0
    return float(max(0.0, (trace - t0 - tpi) / trace))


def integrability_warning(scenario) -> str | None:
    """A sentence when the scenario is a known integrable or localised model, else None.

    Known cases (from the presets' parameters): the XX chain (free fermions after Jordan-Wigner), the
    J1-J2 ring at j2 = 0 (XXZ chain, Bethe ansatz), the mixed-field Ising chain with g = 0 or h = 0
    (classical, or transverse-field Ising = free fermions), the random-field Heisenberg chain at w = 0
    (integrable) or w >= 4 (strong disorder: localised, amplitudes not random-matrix-like).
    """
    m = getattr(scenario, "model", None)
    if m is None:
        return None
    p = dict(m.params)
    if m.name == "xx_chain":
        return "the XX chain is integrable (free fermions): eigenvector amplitudes are not random"
    if m.name == "j1j2_ring" and p.get("j2", 0.0) == 0.0:
        return "the J1-J2 ring with j2 = 0 is the integrable XXZ chain (Bethe ansatz)"
    if m.name == "mixed_field_ising" and (p.get("g", 0.0) == 0.0 or p.get("h", 0.0) == 0.0):
        return "the Ising chain with g = 0 or h = 0 is integrable"
    if m.name == "random_field_heisenberg":
        if p.get("w", 0.0) == 0.0:
            return "the Heisenberg chain without fields is integrable (Bethe ansatz)"
        if p.get("w", 0.0) >= 4.0:
            return "strong disorder (w >= 4): localised regime, amplitudes are not random-matrix-like"
    return None


@dataclass(frozen=True, eq=False)
class DeffResult:
    """KPM estimate of d_eff (dimensionless) with its assumption and flags.

    Attributes
    ----------
    d_eff : float
        1 / (eta int rho_psi^2 / rho dE).
    d_eff_low, d_eff_high : float
        Range from the DOS error bars (stochastic trace, all shifted together: a generous range); it does
        not include the error of the random-matrix assumption itself.
    eta : float
        3 real amplitudes, 2 complex, 3 - 4w(1 - w) in between (``amplitude_eta``), plus ``paired_fraction``.
    paired_fraction : float
        Share of the subspace in momenta k != 0, L/2 whose levels are exactly degenerate with -k
        (reflection-symmetric ring, state not reflection symmetric): such pairs are grouped into one
        eigenspace, E p_E^2 = 2 mu^2 (eta + 1), so eta -> eta + paired_fraction.
    narrow : bool
        LDOS width < 3 x KPM resolution: estimate unreliable.
    reliable : bool
        True only when a calibration against exact sizes of the same scenario was done, its leave-out
        validation passed, and no warning applies; ``reasons`` says why not.
    warnings : tuple of str
        Narrow distribution, known integrable model, Poisson-like <r>, unresolved symmetries, survival
        plateau disagreeing with the estimate by more than both errors.
    reasons : tuple of str
        Every reason the estimate is not reliable (calibration missing or failed, plus the warnings).
    log_err : float
        Jackknife standard error of ln d_eff over the DOS random vectors (NaN with one vector).
    calibration : DeffCalibration or None
        The calibrated estimate (``calibrated``, ``calibrated_low``, ``calibrated_high`` repeat its numbers;
        NaN without calibration).
    assumption : str
    estimate : DeffEstimate
        The analysis layer's result (ldos width, masked weight, ...).
    ldos : SpectralDensity
        KPM LDOS of the initial state (integrates to 1).
    dos : SubspaceDensity
        KPM DOS of the state's symmetric subspace (integrates to ``subspace_dim``).
    subspace_dim : float
        Tr P, the dimension of that subspace.
    subspace : str
    plateau_d_eff, plateau_low, plateau_high : float or None
        1 / (late-time mean of the survival probability) and its range (mean -+ 1 stderr), when a
        survival curve was given.
    plateau_window : tuple or None
    seconds : float
    """

    d_eff: float
    d_eff_low: float
    d_eff_high: float
    eta: float
    paired_fraction: float
    narrow: bool
    reliable: bool
    warnings: tuple
    assumption: str
    estimate: DeffEstimate = field(repr=False)
    ldos: object = field(repr=False)
    dos: SubspaceDensity = field(repr=False)
    subspace_dim: float = 0.0
    subspace: str = ""
    plateau_d_eff: float | None = None
    plateau_low: float | None = None
    plateau_high: float | None = None
    plateau_window: tuple | None = None
    seconds: float = 0.0
    reasons: tuple = ()
    calibration: DeffCalibration | None = field(default=None, repr=False)
    log_err: float = float("nan")

    @property
    def calibrated(self) -> float:
        return float("nan") if self.calibration is None else self.calibration.d_eff

    @property
    def calibrated_low(self) -> float:
        return float("nan") if self.calibration is None else self.calibration.d_eff_low

    @property
    def calibrated_high(self) -> float:
        return float("nan") if self.calibration is None else self.calibration.d_eff_high

    def best(self) -> tuple[float, float, float, str]:
        """(value, low, high, method): the calibrated estimate where one exists, else the raw one."""
        if self.calibration is not None and np.isfinite(self.calibration.d_eff):
            return self.calibrated, self.calibrated_low, self.calibrated_high, "kpm-calibrated"
        return self.d_eff, self.d_eff_low, self.d_eff_high, "kpm-raw"

    def summary(self) -> dict:
        return {
            "d_eff": self.d_eff, "d_eff_low": self.d_eff_low, "d_eff_high": self.d_eff_high, "eta": self.eta, "paired_fraction": self.paired_fraction,
            "d_eff_raw": self.d_eff, "d_eff_calibrated": self.calibrated,
            "d_eff_calibrated_low": self.calibrated_low, "d_eff_calibrated_high": self.calibrated_high,
            "calibration": None if self.calibration is None else self.calibration.summary(),
            "reasons": list(self.reasons),
            "narrow": self.narrow, "reliable": self.reliable, "warnings": list(self.warnings),
            "assumption": self.assumption, "subspace_dimension": self.subspace_dim, "subspace": self.subspace,
            "ldos_width": self.estimate.ldos_width, "resolution": self.estimate.resolution,
            "n_moments": self.dos.n_moments, "n_vectors": self.dos.n_vectors,
            "plateau_d_eff": self.plateau_d_eff, "plateau_range": [self.plateau_low, self.plateau_high],
            "plateau_window": self.plateau_window, "seconds": self.seconds,
        }


def estimate_deff(problem, *, n_moments: int = 256, n_vectors: int = 20, rng: np.random.Generator,
                  psi=None, bounds=None, resolve_symmetries: bool = True, survival=None,
                  level_ratio: SpacingRatio | None = None, group: SymmetryGroup | None = None,
                  calibration=None, calibration_max_dim: int = MAX_DENSE_DIM) -> DeffResult:
    """d_eff ~ 1 / (eta int rho_psi(E)^2 / rho(E) dE) from KPM densities (dimensionless).

    rho_psi: KPM LDOS of the initial state (exact moments); rho: KPM DOS of the subspace the state lives
    in (stochastic trace of P delta(E - H) with projected Gaussian vectors, normalised to Tr P exactly).
    Assumption: chaotic eigenvectors (amplitudes independent, Porter-Thomas for real, eta = 3, or complex
    Gaussian, eta = 2) and an LDOS broad and smooth on the scale of the KPM resolution pi a / N.

    Parameters
    ----------
    problem : Problem
    n_moments : int
        Chebyshev moments N of both densities (resolution ~ pi a / N at the band centre).
    n_vectors : int
        Random vectors R of the DOS trace (>= 2 for error bars).
    rng : numpy.random.Generator
    psi : ndarray, optional
        Initial state in the basis (default: the scenario's).
    bounds : SpectralBounds, optional
        Spectral interval (default: Lanczos with a fixed seed).
    resolve_symmetries : bool
        Use the DOS of the state's symmetric subspace (default); False: of the whole basis (a warning is
        added when the state is confined to a smaller subspace).
    survival : (times, values), optional
        Survival probability |<psi|psi(t)>|^2 on a time grid; its last-half mean gives a second rough
        d_eff (reached only near the Heisenberg time).
    level_ratio : SpacingRatio, optional
        <r> of a resolved block; closer to Poisson than to GOE adds a warning.
    group : SymmetryGroup, optional
    calibration : sequence of CalibrationPoint, or "auto", optional
        Exact and raw d_eff of the same scenario at smaller sizes (see :func:`calibrate_deff`); "auto"
        measures them here (:func:`calibration_points`, dense diagonalizations up to
        ``calibration_max_dim``).  Without it the result is never ``reliable``.
    calibration_max_dim : int

    Returns
    -------
    DeffResult
    """
    t0 = time.perf_counter()
    if int(n_vectors) != n_vectors or n_vectors < 1:
        raise ValueError(f"n_vectors must be an integer >= 1, got {n_vectors!r}")
    psi = _initial(problem, psi)
    op = problem.operator
    if bounds is None:
        bounds = default_bounds(op)
    warnings = []
    elements = chars = None
    paired = 0.0
    trace = float(problem.basis.dim)
    sub_desc = f"whole basis ({problem.basis.label})"
    real_amplitudes = bool(problem.symmetries.get("real", False))
    grp = _group_or_none(problem, group)
    if grp is None:
        warnings.append("symmetries not resolved (basis too large for permutation tables): the DOS of the "
                        "whole basis may count levels the state cannot occupy")
    else:
        sub = state_subspace(problem, psi, group=grp)
        if sub.n_elements > 1:
            els, chs, keys = [], [], []
            for key, p in grp.elements:
                gpsi = np.zeros_like(psi)
                gpsi[p] = psi
                lam = np.vdot(psi, gpsi)
                if abs(abs(lam) - 1.0) < 1e-9:
                    els.append(p)
                    chs.append(lam / abs(lam))
                    keys.append(key)
            if resolve_symmetries:
                elements, chars = els, np.asarray(chs)
                fixed = np.array([np.count_nonzero(p == np.arange(p.size)) for p in els], dtype=float)
                trace = float(np.real(np.sum(np.conj(chars) * fixed)) / len(els))
                sub_desc = sub.description
                if np.any(np.abs(chars.imag) > 1e-12):
                    real_amplitudes = False  # complex characters: eigenvectors in the block are complex
                paired = _paired_fraction(grp, els, chars, keys, trace)
            else:
                warnings.append(f"the state lives in a subspace of dimension {sub.dim:,} of {problem.basis.dim:,}; "
                                "the DOS of the whole basis overestimates d_eff")
    if grp is not None and sub.n_elements == 1 and resolve_symmetries:
        paired = _paired_fraction(grp, [grp.elements[0][1]], np.ones(1), [grp.elements[0][0]], trace)
    eta0 = amplitude_eta(psi, real_amplitudes)
    # levels of momenta k and -k (k != 0, L/2) are exactly degenerate when H has reflection symmetry and the
    # state does not: an eigenspace of multiplicity 2 has E p_E^2 = 2 mu^2 (eta + 1), i.e. eta + 1 per state
    eta = eta0 + paired
    ldos = local_density(op, psi, n_moments, bounds)
    dos = _projected_dos(op, elements, chars, trace, n_moments, n_vectors, rng, bounds, 2 * n_moments)
    res = float(np.interp(ldos.mean_exact, ldos.energies, ldos.resolution))
    est = deff_from_densities(dos.energies, ldos.density, dos.density, eta=eta,
                              dos_err=None if n_vectors < 2 else dos.density_err, resolution=res)
    log_err = _jackknife_log_err(dos.energies, ldos.density, dos, eta, res)
    if est.narrow:
        warnings.append(f"narrow energy distribution: LDOS width {est.ldos_width:.3g} < 3 x KPM resolution "
                        f"{res:.3g}; the estimate is unreliable (more moments help only if the LDOS is smooth)")
    integ = integrability_warning(problem.scenario)
    if integ:
        warnings.append(integ + "; the random-matrix assumption behind the estimate fails (expect factors 2-6)")
    if level_ratio is not None and level_ratio.mean_r < 0.5 * (GOE_R + POISSON_R):
        warnings.append(f"level statistics Poisson-like (<r> = {level_ratio.mean_r:.3f} +- {level_ratio.stderr:.3f}); "
                        "the random-matrix assumption is doubtful")
    cal = None
    if calibration is not None:
        if isinstance(calibration, str):
            if calibration != "auto":
                raise ValueError(f"calibration must be 'auto' or a sequence of CalibrationPoint, got {calibration!r}")
            calibration = calibration_points(problem.scenario, problem.n_sites, n_moments=n_moments,
                                             n_vectors=n_vectors, seed=int(rng.integers(2**62)),
                                             max_dim=calibration_max_dim)
        cal = calibrate_deff(list(calibration), problem.n_sites, est.d_eff, est.d_eff_low, est.d_eff_high,
                             raw_log_err=log_err)
    pl = (None, None, None, None)
    if survival is not None:
        times, values = (np.asarray(x, dtype=float) for x in survival)
        win = (0.5 * (times[0] + times[-1]), float(times[-1]))
        p = survival_plateau(times, values, window=win)
        lo_ipr, hi_ipr = p.mean - p.stderr, p.mean + p.stderr
        pl = (1.0 / p.mean if p.mean > 0 else float("inf"), 1.0 / hi_ipr,
              1.0 / lo_ipr if lo_ipr > 0 else float("inf"), win)
        if cal is not None and np.isfinite(cal.d_eff):
            what, lo, hi = "calibrated estimate", cal.d_eff_low, cal.d_eff_high
        else:
            what, lo, hi = "raw estimate", est.d_eff_low, est.d_eff_high
        if pl[1] > hi or pl[2] < lo:
            warnings.append(f"the survival plateau ({pl[0]:.4g}, range [{pl[1]:.4g}, {pl[2]:.4g}] over t in "
                            f"[{win[0]:.3g}, {win[1]:.3g}]) disagrees with the {what} [{lo:.4g}, {hi:.4g}] by more "
                            "than both errors")
    reasons = (list(cal.reasons) if cal is not None else
               ["no exact sizes of this scenario were given to calibrate against (the raw formula alone is not "
                "validated)"]) + warnings
    reliable = cal is not None and cal.validated and not warnings
    return DeffResult(
        d_eff=est.d_eff, d_eff_low=est.d_eff_low, d_eff_high=est.d_eff_high, eta=eta, paired_fraction=paired, narrow=est.narrow,
        reliable=bool(reliable), warnings=tuple(warnings), assumption=est.assumption, estimate=est, ldos=ldos,
        dos=dos, subspace_dim=trace, subspace=sub_desc, plateau_d_eff=pl[0], plateau_low=pl[1],
        plateau_high=pl[2], plateau_window=pl[3], seconds=time.perf_counter() - t0, reasons=tuple(reasons),
        calibration=cal, log_err=log_err,
    )


# --------------------------------------------------------------------------------------------- calibration
#: Two-sided level of the calibrated interval (a prediction interval; common practice: 90 %).
CALIBRATION_LEVEL = 0.9
#: At most this many exact sizes (the largest ones below the target) enter the ratio fit.
CALIBRATION_POINTS = 4
#: Floor on the log error of one raw estimate (the DOS error bar can be zero with one vector).
MIN_LOG_ERR = 0.01


@dataclass(frozen=True)
class CalibrationPoint:
    """Exact and raw (KPM) d_eff of the same scenario at one chain length (dimensionless).

    ``raw_low`` / ``raw_high`` are the raw estimate's range from the DOS error bars; ``raw_log_err`` the
    jackknife error of ln raw over the random vectors (``DeffResult.log_err``), used as the fit weight.
    """

    sites: int
    exact: float
    raw: float
    raw_low: float
    raw_high: float
    raw_log_err: float | None = None

    @property
    def log_ratio(self) -> float:
        return float(np.log(self.exact / self.raw))

    @property
    def log_err(self) -> float:
        """The jackknife error of ln raw when known, else half the log width of the raw range."""
        if self.raw_log_err is not None and np.isfinite(self.raw_log_err):
            return float(max(self.raw_log_err, MIN_LOG_ERR))
        return _log_err(self.raw, self.raw_low, self.raw_high)


def _log_err(raw, low, high) -> float:
    e = 0.5 * (np.log(max(high, raw)) - np.log(max(min(low, raw), 1e-300)))
    return float(max(e, MIN_LOG_ERR)) if np.isfinite(e) else MIN_LOG_ERR


@dataclass(frozen=True, eq=False)
class DeffCalibration:
    """Calibrated d_eff at ``target`` sites: raw x exp(fitted ln(exact / raw)), with a prediction interval.

    Attributes
    ----------
    target : int
    raw, raw_low, raw_high : float
        The raw KPM estimate at the target and its range.
    points : tuple of CalibrationPoint
        Every exact size given (smaller than the target).
    used : tuple of int
        The sizes that entered the fit (the ``CALIBRATION_POINTS`` largest).
    model : str
        'ln(exact/raw) = a + b / L' (3 or more sizes), 'ln(exact/raw) = c' (2) or 'one size' (1).
    fit : LinearFit or None
    prediction : Prediction or None
        ln(exact/raw) predicted at the target (its own raw error included).
    d_eff, d_eff_low, d_eff_high : float
        The calibrated estimate and its interval at ``level`` (NaN without exact sizes).
    level : float
    validation : dict or None
        Leave-out check: the largest exact size predicted from the smaller ones, with ``sites``,
        ``predicted``, ``low``, ``high``, ``exact``, ``rel_error`` and ``passed``.
    reasons : tuple of str
        Why the calibrated estimate is not reliable (empty when the validation passed).
    """

    target: int
    raw: float
    raw_low: float
    raw_high: float
    points: tuple
    used: tuple
    model: str
    fit: LinearFit | None
    prediction: Prediction | None
    d_eff: float
    d_eff_low: float
    d_eff_high: float
    level: float
    validation: dict | None
    reasons: tuple

    @property
    def validated(self) -> bool:
        return bool(self.validation is not None and self.validation["passed"])

    def summary(self) -> dict:
        return {
            "target_sites": self.target, "d_eff": self.d_eff, "d_eff_low": self.d_eff_low,
            "d_eff_high": self.d_eff_high, "level": self.level, "model": self.model, "sizes_used": list(self.used),
            "points": [{"sites": p.sites, "exact": p.exact, "raw": p.raw, "raw_low": p.raw_low,
                        "raw_high": p.raw_high, "ratio": p.exact / p.raw} for p in self.points],
            "ratio_at_target": None if self.prediction is None else float(np.exp(self.prediction.value)),
            "fit": None if self.fit is None else self.fit.as_dict(), "validation": self.validation,
            "validated": self.validated, "reasons": list(self.reasons),
        }


def _ratio_prediction(points, target, raw_log_err, max_points, level):
    pts = sorted(points, key=lambda p: p.sites)[-max_points:]
    L = np.array([p.sites for p in pts], float)
    y = np.array([p.log_ratio for p in pts])
    s = np.array([p.log_err for p in pts])
    x0 = 1.0 / float(target)
    if len(pts) >= 3 and np.ptp(L) > 0:
        fit, model = linear_fit(1.0 / L, y, s, absolute="inflate"), "ln(exact/raw) = a + b / L"
        pred = prediction_interval(fit, x0, raw_log_err, level=level)
        # model-form error: half the difference to the constant fit of the same points, in quadrature
        # (a common practice for finite-size extrapolations: quote the spread over fit forms)
        alt = prediction_interval(constant_fit(y, s, absolute="inflate"), x0, raw_log_err, level=level)
        err = float(np.hypot(pred.err, 0.5 * (pred.value - alt.value)))
        pred = Prediction(pred.x, pred.value, err, pred.value - pred.quantile * err, pred.value + pred.quantile * err,
                          pred.level, pred.quantile, pred.dof)
    elif len(pts) == 2:
        fit, model = constant_fit(y, s, absolute="inflate"), "ln(exact/raw) = c"
        pred = prediction_interval(fit, x0, raw_log_err, level=level)
    else:
        fit, model = constant_fit(y, s, absolute=True), "one size"
        pred = prediction_interval(fit, x0, raw_log_err, level=level)
    return fit, model, pred, tuple(int(p.sites) for p in pts)


def calibrate_deff(points, target: int, raw: float, raw_low: float, raw_high: float, *, raw_log_err=None,
                   max_points: int = CALIBRATION_POINTS, level: float = CALIBRATION_LEVEL) -> DeffCalibration:
    """Calibrated d_eff = raw(L*) exp(q(L*)), q(L) the fitted ln(exact / raw) of the exact sizes (dimensionless).

    The ratio exact / raw is measured at each exact size of the same scenario and fitted (weighted by the
    raw estimate's log error, errors inflated by the scatter, ``fits.linear_fit(absolute="inflate")``):
    ln(exact / raw) = a + b / L with 3 or more sizes (the ``max_points`` largest), a constant with 2.  The
    1/L form lets the ratio settle to a constant as L grows (the raw formula's systematic error, from
    amplitude statistics that are not yet random-matrix-like and from the KPM resolution in small subspaces,
    is taken to converge; a finite-size ansatz, common practice); a line in L was tried and extrapolated
    the fast drop at small L too far (-17 % at L = 14 for the +y state of the mixed-field Ising ring).  The interval is the
    fit's prediction interval at ``level`` (Student-t when the scatter entered), including the target's
    own raw error, and, for the line, half the difference between the line's and the constant's prediction
    as a model-form error (added in quadrature).  Validation: the largest exact size is left out, predicted
    from the others the same way, and must fall inside its interval.

    Parameters
    ----------
    points : sequence of CalibrationPoint
        Exact sizes of the same scenario, all with sites < target (others are ignored).
    target : int
    raw, raw_low, raw_high : float
        Raw estimate at the target and its range.
    raw_log_err : float, optional
        Jackknife error of ln raw at the target.
    max_points : int
    level : float

    Returns
    -------
    DeffCalibration
    """
    pts = [p for p in points if p.sites < target and p.exact > 0 and p.raw > 0]
    reasons = []
    nan = float("nan")
    if not pts:
        reasons.append("no exact sizes of this scenario below the target to calibrate against (the raw formula "
                       "alone is not validated)")
        return DeffCalibration(int(target), raw, raw_low, raw_high, (), (), "none", None, None, nan, nan, nan,
                               level, None, tuple(reasons))
    own = CalibrationPoint(int(target), 1.0, raw, raw_low, raw_high, raw_log_err).log_err
    fit, model, pred, used = _ratio_prediction(pts, target, own, max_points, level)
    d, lo, hi = (float(raw * np.exp(v)) for v in (pred.value, pred.low, pred.high))
    validation = None
    if len(pts) >= 3:
        left = max(pts, key=lambda p: p.sites)
        rest = [p for p in pts if p is not left]
        _, vmodel, vp, vused = _ratio_prediction(rest, left.sites, left.log_err, max_points, level)
        vd, vlo, vhi = (float(left.raw * np.exp(v)) for v in (vp.value, vp.low, vp.high))
        passed = bool(vlo <= left.exact <= vhi)
        validation = {"sites": int(left.sites), "from_sizes": list(vused), "model": vmodel, "predicted": vd,
                      "low": vlo, "high": vhi, "exact": float(left.exact),
                      "rel_error": (vd - left.exact) / left.exact, "passed": passed}
        if not passed:
            reasons.append(f"validation failed: the exact d_eff at L = {left.sites} ({left.exact:.4g}) lies outside "
                           f"the interval [{vlo:.4g}, {vhi:.4g}] predicted from L = "
                           f"{', '.join(map(str, vused))} (prediction {vd:.4g})")
    else:
        reasons.append(f"only {len(pts)} exact size(s) below the target: the leave-out validation needs 3")
    return DeffCalibration(int(target), float(raw), float(raw_low), float(raw_high), tuple(pts), used, model, fit,
                           pred, d, lo, hi, level, validation, tuple(reasons))


def calibration_points(scenario, target: int, *, n_moments: int = 256, n_vectors: int = 20, seed: int = 0,
                       max_dim: int = MAX_DENSE_DIM, n_sizes: int = CALIBRATION_POINTS + 1, min_sites: int = 6,
                       step: int | None = None) -> list[CalibrationPoint]:
    """Exact and raw d_eff of ``scenario.with_length(L)`` for the ``n_sizes`` largest L < target that fit.

    Sizes that the scenario cannot take (odd L for a Neel start, ...) or whose state subspace exceeds
    ``max_dim`` are skipped; L goes down from target - 1 in steps of ``step`` (default 1) to ``min_sites``.
    Each size's KPM run uses the generator ``default_rng([seed, L])``.
    """
    from largeq.operators.problem import build_problem
    from largeq.scenario.spec import ScenarioError

    out = []
    L = int(target) - (step or 1)
    while L >= min_sites and len(out) < n_sizes:
        try:
            sc = scenario.with_length(L)
        except ScenarioError:
            L -= step or 1
            continue
        pr = build_problem(sc)
        psi = _initial(pr, None)
        grp = _group_or_none(pr)
        try:
            ex = exact_equilibration(pr, max_dim=max_dim, psi=psi, group=grp, observables=[],
                                     level_statistics=False)
        except DenseLimitError:
            L -= step or 1
            continue
        est = estimate_deff(pr, n_moments=n_moments, n_vectors=n_vectors, rng=np.random.default_rng([seed, L]),
                            psi=psi, group=grp)
        out.append(CalibrationPoint(L, float(ex.d_eff), float(est.d_eff), float(est.d_eff_low),
                                    float(est.d_eff_high), est.log_err))
        L -= step or 1
    return sorted(out, key=lambda p: p.sites)


# --------------------------------------------------------------------------------------------- thermal
@dataclass(frozen=True)
class ThermalValues:
    """Thermal predictions at one energy (units of each observable).

    Attributes
    ----------
    energy : float
        Target energy E (energy units), usually <psi|H|psi>.
    beta, beta_err : float
        Inverse temperature with <H>_beta = E and its error (inverse energy units).
    canonical, canonical_err : dict name -> float
        <A>_beta from thermal pure quantum states (jackknife errors).
    microcanonical, microcanonical_err : dict name -> float
        <A> in a Gaussian energy window of standard deviation ``width`` around E.
    width : float
        Microcanonical window sigma (energy units).
    n_vectors, dimension : int
    seconds : float
    """

    energy: float
    beta: float
    beta_err: float
    canonical: dict
    canonical_err: dict
    microcanonical: dict
    microcanonical_err: dict
    width: float
    n_vectors: int
    dimension: int
    seconds: float
    left_out: str = ""


def conserved_left_out(problem) -> str:
    """The conserved quantities that canonical / microcanonical ensembles on the problem's basis leave out
    (empty when none is known): the ensemble fixes the magnetization sector, not the total spin."""
    if problem.symmetries.get("total_spin", False):
        return ("total spin S^2: H is SU(2) symmetric, the ensemble fixes only the magnetization sector and mixes "
                "all S, while the state's weights over S are conserved (compare with the diagonal ensemble "
                "keeping this in mind, or use the exact per-S ensemble at small sizes)")
    return ""


def thermal_values(problem, energy: float, *, n_vectors: int = 10, rng: np.random.Generator,
                   width: float | None = None, bounds=None, tol: float = 1e-10,
                   microcanonical: bool = True) -> ThermalValues:
    """Canonical <A>_beta with <H>_beta = E (TPQ) and microcanonical <A>_E, per observable.

    Canonical: a beta grid (doubled until it brackets E), ``solve_beta``, then the TPQ average at that
    beta with the same random vectors. Microcanonical: Gaussian-filtered random states,
    w(E_m) = exp(-(E_m - E)^2 / (2 width^2)), width default 2 % of the spectral range.

    Parameters
    ----------
    problem : Problem
    energy : float
        Target energy (energy units).
    n_vectors : int
        Random vectors (>= 2 for errors).
    rng : numpy.random.Generator
    width : float, optional
    bounds : SpectralBounds, optional
    tol : float
        Chebyshev truncation tolerance.
    microcanonical : bool
        Also compute the microcanonical values.

    Returns
    -------
    ThermalValues
        ``left_out`` names a conserved quantity the ensemble does not fix (total spin for SU(2)-symmetric H).
    """
    t0 = time.perf_counter()
    op = problem.operator
    if bounds is None:
        bounds = default_bounds(op)
    obs = {n: problem.observable_operator(n) for n in problem.observables}
    a, _ = chebyshev_scale(bounds)
    child = rng.spawn(2)
    scale = 4.0 / a
    for _ in range(8):
        betas = np.linspace(-scale, scale, 33)
        grid = canonical_averages(op, None, betas, n_vectors, copy.deepcopy(child[0]), bounds, tol)
        if grid.energy.min() <= energy <= grid.energy.max():
            break
        scale *= 2.0
    beta, beta_err = solve_beta(grid, energy)
    at = canonical_averages(op, obs, np.array([beta]), n_vectors, copy.deepcopy(child[0]), bounds, tol)
    can = {n: float(at.values[n][0]) for n in obs}
    can_err = {n: float(at.errors[n][0]) for n in obs}
    if width is None:
        width = 0.02 * (bounds.e_max - bounds.e_min)
    mc, mc_err = {}, {}
    if microcanonical:
        m = microcanonical_average(op, obs, energy, width, n_vectors, child[1], bounds)
        mc, mc_err = dict(m.values), dict(m.errors)
    return ThermalValues(float(energy), float(beta), float(beta_err), can, can_err, mc, mc_err, float(width),
                         int(n_vectors), int(problem.basis.dim), time.perf_counter() - t0, conserved_left_out(problem))


@dataclass(frozen=True)
class ExactThermal:
    """Exact thermal values from the dense spectrum of every symmetry block of the basis.

    Attributes
    ----------
    energy, beta : float
        Target energy and the exact beta with Tr(H e^{-beta H}) / Z = E.
    canonical, microcanonical : dict name -> float
        Tr(A e^{-beta H}) / Z and sum_m w_m A_mm / sum_m w_m, w_m = exp(-(E_m - E)^2 / (2 width^2));
        when the total spin is resolved: sum_S w_S <A>_S, each S ensemble at the state's energy in S.
    width : float
    n_blocks : int
    energies : ndarray
        The whole basis spectrum (ascending).
    ensemble : str
        What the ensemble fixes (and what it leaves out).
    canonical_mixed, microcanonical_mixed : dict name -> float
        The values of the ensemble over the whole basis (all S mixed); equal to ``canonical`` /
        ``microcanonical`` when S is not resolved.
    spin_weights : dict S -> float
        The state's weight ||P_S psi||^2 in each total spin S (empty when not resolved).
    spin_energies, spin_betas : dict S -> float
        The state's mean energy in each S and the beta of that S ensemble.
    """

    energy: float
    beta: float
    canonical: dict
    microcanonical: dict
    width: float
    n_blocks: int
    energies: np.ndarray = field(repr=False)
    ensemble: str = "canonical and microcanonical ensembles of the basis"
    canonical_mixed: dict = field(default_factory=dict)
    microcanonical_mixed: dict = field(default_factory=dict)
    spin_weights: dict = field(default_factory=dict)
    spin_energies: dict = field(default_factory=dict)
    spin_betas: dict = field(default_factory=dict)


def _solve_beta_exact(e: np.ndarray, energy: float) -> float:
    """beta with sum_m e^{-beta E_m} E_m / Z = energy (+-inf at or beyond the spectrum's ends)."""
    if energy <= e[0]:
        return float("inf")
    if energy >= e[-1]:
        return float("-inf")

    def mean_e(beta):
        w = np.exp(-beta * (e - e[0] if beta >= 0 else e - e[-1]))
        return float(np.dot(w, e) / w.sum())

    lo, hi = -1.0, 1.0
    while mean_e(hi) > energy:
        hi *= 2.0
    while mean_e(lo) < energy:
        lo *= 2.0
    return float(scipy.optimize.brentq(lambda b: mean_e(b) - energy, lo, hi, xtol=1e-14))


def _canonical_weights(e: np.ndarray, beta: float) -> np.ndarray:
    if beta == float("inf"):
        return (e <= e[0] + 1e-9 * max(1.0, abs(e[0]))).astype(float)
    if beta == float("-inf"):
        return (e >= e[-1] - 1e-9 * max(1.0, abs(e[-1]))).astype(float)
    return np.exp(-beta * (e - e[0] if beta >= 0 else e - e[-1]))


def exact_thermal_values(problem, energy: float, *, width: float | None = None, max_dim: int = MAX_DENSE_DIM,
                         group: SymmetryGroup | None = None, psi=None,
                         resolve_total_spin: bool | None = None, progress=None) -> ExactThermal:
    """Canonical and microcanonical values from full diagonalization, block by block.

    Tr(A f(H)) = sum_b Tr(Q_b^dagger A Q_b f(H_b)) holds for every A because the ensemble is
    symmetric: Q_b^dagger g A g^{-1} Q_b = Q_b^dagger A Q_b for 1-d representations.

    Total spin.  When H conserves S^2 (``resolve_total_spin`` None: from ``problem.symmetries``) and the
    initial state ``psi`` is given, each eigenvector gets its S (``largeq.analysis.levels.spin_resolve``) and
    the ensemble is resolved in S: for every S with weight w_S = ||P_S psi||^2 > 1e-12, a canonical (beta_S
    fixed by the state's mean energy in S) and a microcanonical ensemble (window at that energy) over the
    levels of that S, combined as sum_S w_S <A>_S -- the ensemble that keeps the conserved weights over S.

    Parameters
    ----------
    problem : Problem
    energy : float
    width : float, optional
        Microcanonical sigma (default 2 % of the exact spectral range).
    max_dim : int
        Largest block diagonalized.
    group : SymmetryGroup, optional
    psi : ndarray, optional
        Initial state in the basis (needed to resolve the total spin).
    resolve_total_spin : bool, optional
        Resolve the ensemble in the total spin (default: when H conserves it and psi is given).
    progress : callable, optional
        Called as ``progress(i, n_blocks)`` after each block is diagonalized.
    """
    from largeq.analysis.levels import _s2_block, spin_resolve, spin_squared_csr

    group = _group_or_none(problem, group)
    if group is None:
        raise DenseLimitError("basis too large for the symmetry tables")
    if resolve_total_spin is None:
        resolve_total_spin = bool(problem.symmetries.get("total_spin", False)) and psi is not None
    if resolve_total_spin and psi is None:
        raise ValueError("resolving the total spin needs the initial state psi")
    blocks = symmetry_blocks(problem, group=group)
    h = problem.operator.to_csr()
    a_csr = {n: problem.observable_operator(n).to_csr() for n in problem.observables}
    if psi is not None:
        psi = _initial(problem, psi)
    es, spins, pw, diags = [], [], [], {n: [] for n in a_csr}
    s2 = spin_squared_csr(problem) if resolve_total_spin else None
    for blk in blocks:
        if blk.dim > max_dim:
            raise DenseLimitError(f"block {blk.label} has dimension {blk.dim:,} > max_dim = {max_dim:,}")
        if resolve_total_spin:
            res = spin_resolve(blk.hamiltonian(h), _s2_block(problem, blk, s2))
            e, v = res.energies, res.vectors
            spins.append(res.spins)
        else:
            e, v = scipy.linalg.eigh(blk.hamiltonian(h), check_finite=False)
        es.append(e)
        if resolve_total_spin:
            pw.append(np.abs(v.conj().T @ (blk.q.conj().T @ psi)) ** 2)
        for n, a in a_csr.items():
            ab = (blk.q.conj().T @ (a @ blk.q)).toarray()
            diags[n].append(np.real(np.einsum("im,im->m", v.conj(), ab @ v)))
        if progress is not None:
            progress(len(es), len(blocks))
    e = np.concatenate(es)
    order = np.argsort(e)
    e = e[order]
    dm = {n: np.concatenate(d)[order] for n, d in diags.items()}
    if not (e[0] < energy < e[-1]):
        raise ValueError(f"energy {energy} outside the spectrum [{e[0]}, {e[-1]}]")
    beta = _solve_beta_exact(e, energy)
    w = _canonical_weights(e, beta)
    can = {n: float(np.dot(w, d) / w.sum()) for n, d in dm.items()}
    if width is None:
        width = 0.02 * (e[-1] - e[0])
    wm = np.exp(-((e - energy) ** 2) / (2.0 * width**2))
    mc = {n: float(np.dot(wm, d) / wm.sum()) for n, d in dm.items()}
    if not resolve_total_spin:
        return ExactThermal(float(energy), beta, can, mc, float(width), len(blocks), e,
                            canonical_mixed=dict(can), microcanonical_mixed=dict(mc))
    sp_all = np.concatenate(spins)[order]
    p_all = np.concatenate(pw)[order]
    can_s = {n: 0.0 for n in dm}
    mc_s = {n: 0.0 for n in dm}
    weights, energies_s, betas = {}, {}, {}
    for s_val in np.unique(sp_all):
        sel = sp_all == s_val
        ws = float(p_all[sel].sum())
        if ws <= 1e-12:
            continue
        es_ = e[sel]
        e_s = float(np.dot(p_all[sel], es_) / ws)
        b_s = _solve_beta_exact(es_, e_s) if es_.size > 1 else float("inf")
        wc = _canonical_weights(es_, b_s)
        wmc = np.exp(-((es_ - e_s) ** 2) / (2.0 * width**2))
        if not wmc.sum() > 0:
            wmc = wc
        for n, d in dm.items():
            can_s[n] += ws * float(np.dot(wc, d[sel]) / wc.sum())
            mc_s[n] += ws * float(np.dot(wmc, d[sel]) / wmc.sum())
        weights[float(s_val)] = ws
        energies_s[float(s_val)] = e_s
        betas[float(s_val)] = b_s
    tot = sum(weights.values())
    can_s = {n: v / tot for n, v in can_s.items()}
    mc_s = {n: v / tot for n, v in mc_s.items()}
    ens = ("canonical and microcanonical ensembles resolved in the conserved total spin S: one ensemble per S at "
           "the state's energy in S, weighted by the state's weight in S")
    return ExactThermal(float(energy), beta, can_s, mc_s, float(width), len(blocks), e, ensemble=ens,
                        canonical_mixed=can, microcanonical_mixed=mc, spin_weights=weights,
                        spin_energies=energies_s, spin_betas=betas)
