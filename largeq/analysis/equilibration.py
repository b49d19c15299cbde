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
  plateau as a second rough estimate.
* :func:`thermal_values` -- canonical (thermal pure quantum states, beta solved for <H>_beta = E;
  S. Sugiura & A. Shimizu, PRL 108, 240401 (2012); PRL 111, 010401 (2013)) and microcanonical values.
  :func:`exact_thermal_values` gives the same from the dense spectrum of every symmetry block of the
  basis (small sizes), for the cross-check.

Symmetric subspace.  The initial state's dynamics never leaves range(P_lambda), the subspace fixed by
the symmetry operations that leave psi invariant up to a phase (``largeq.basis.blocks``).  All exact
quench quantities computed there equal those of the whole basis (eigenspace projectors commute with
P_lambda), so ``exact_equilibration`` diagonalizes only that subspace (``reduce=True``, default), and
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

from largeq.analysis.bounds import (GOE_R, POISSON_R, DeffEstimate, SpacingRatio, amplitude_eta, level_spacing_ratio,
                                    deff_from_densities, fluctuation_bound, survival_plateau)
from largeq.engines.bounds import spectral_bounds
from largeq.engines.exact import ExactQuench, diagonalize, quench_exact
from largeq.engines.kpm import (chebyshev_moments, chebyshev_scale, kernel_factors, local_density,
                                reconstruct_cumulative, reconstruct_density)
from largeq.engines.typical import canonical_averages, microcanonical_average, random_state, solve_beta
from largeq.basis.blocks import (StateSubspace, SymmetryGroup, state_subspace,
                                 symmetry_blocks, symmetry_group)
from largeq.constants import BOUNDS_SEED, MAX_DENSE_DIM

__all__ = [
    "DenseLimitError",
    "ObservableEquilibration",
    "ExactEquilibration",
    "exact_equilibration",
    "SubspaceDensity",
    "DeffResult",
    "estimate_deff",
    "integrability_warning",
    "ThermalValues",
    "thermal_values",
    "ExactThermal",
    "exact_thermal_values",
    "BOUNDS_SEED",
    "default_bounds",
]

#: Fixed seed of the Lanczos start vector for spectral bounds (bounds are reproducible).
#: Above this many (group elements x basis states) the symmetry permutations are not built.
MAX_PERMUTATION_ENTRIES = 200_000_000


def resolved_level_ratio(problem, *, which: str | dict = "trivial", central_fraction: float = 0.5,
                         max_dim: int = MAX_DENSE_DIM, group: SymmetryGroup | None = None):
    """<r> in one fully resolved block (default k = 0 and all parities +1).

    Returns
    -------
    (SpacingRatio, Block, SymmetryGroup)
        The spacing ratio of the block's eigenvalues (central fraction of the spectrum), the block
        (its label and dimension) and the group (which symmetries were resolved).
    """
    group = group or symmetry_group(problem)
    blocks = symmetry_blocks(problem, group=group, which=which)
    if not blocks:
        raise ValueError(f"the block {which!r} is empty for this basis")
    blk = blocks[0]
    if blk.dim > max_dim:
        raise ValueError(f"block {blk.label} has dimension {blk.dim:,} > max_dim = {max_dim:,}")
    h = problem.operator.to_csr()
    e = scipy.linalg.eigvalsh(blk.hamiltonian(h), check_finite=False)
    return level_spacing_ratio(e, central_fraction=central_fraction), blk, group


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
        Dimension actually diagonalized (the state's symmetric subspace when reduced).
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
        The engine's full result (curve(), survival(), weights).
    seconds : float
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
                "block": self.level_block, "goe": GOE_R, "poisson": POISSON_R},
            "observables": {n: o.__dict__.copy() for n, o in self.observables.items()},
            "seconds": self.seconds,
        }


def exact_equilibration(problem, *, max_dim: int = MAX_DENSE_DIM, reduce: bool = True, psi=None,
                        level_statistics: bool = True, group: SymmetryGroup | None = None,
                        observables=None) -> ExactEquilibration:
    """Exact d_eff, <A>_inf, sigma_A^2, fluctuation bounds, N(0) and <r> by dense diagonalization.

    d_eff = 1 / sum_E p_E^2 with p_E = ||P_E psi||^2; sigma_A^2 <= D_G (a_max - a_min)^2 / (4 d_eff).

    Parameters
    ----------
    problem : Problem
    max_dim : int
        Largest dimension diagonalized densely (default 13000, about 4 GB and minutes on 2 cores);
        larger raises :class:`DenseLimitError`.
    reduce : bool
        Diagonalize only the symmetric subspace that holds the state (exactly the same results,
        see the module docstring); False uses the problem's whole basis.
    psi : ndarray, optional
        Initial state in the basis (default: the scenario's).
    level_statistics : bool
        Compute <r> in the fully resolved block k = 0, all parities +1.
    group : SymmetryGroup, optional
        Reuse an already built symmetry group.
    observables : sequence of str, optional
        Names to analyse (default all of the scenario's; ``[]`` for d_eff, N(0) and <r> only, much faster).

    Returns
    -------
    ExactEquilibration
    """
    t0 = time.perf_counter()
    psi = _initial(problem, psi)
    basis = problem.basis
    group = _group_or_none(problem, group) if (reduce or level_statistics) else group
    if reduce and group is not None:
        sub: StateSubspace = state_subspace(problem, psi, group=group)
        q, vec, desc = sub.q, sub.psi, sub.description
    else:
        q, vec, desc = None, psi, f"whole basis ({basis.label})"
    dim = basis.dim if q is None else q.shape[1]
    if dim > max_dim:
        raise DenseLimitError(
            f"dense diagonalization of dimension {dim:,} refused (max_dim = {max_dim:,}; {desc}); it would need "
            f"about {3 * dim * dim * 8 / 2**30:.1f} GiB and O(D^3) time. Use a smaller chain or the KPM estimate."
        )
    h = problem.operator.to_csr()
    hm = h.toarray() if q is None else _compress(q, h)
    spec = diagonalize(hm)
    del hm
    names = list(problem.observables) if observables is None else list(observables)
    for name in names:
        if name not in problem.observables:
            raise ValueError(f"observable {name!r} is not in the scenario ({', '.join(problem.observables)})")
    obs = {}
    for name in names:
        a = problem.observable_operator(name).to_csr()
        obs[name] = a.toarray() if q is None else _compress(q, a)
    eq = quench_exact(spec, vec, obs, observable_extremes=False)
    del obs
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
    ratio, block_desc = None, "not computed"
    if level_statistics and group is not None:
        try:
            ratio, blk, _ = resolved_level_ratio(problem, group=group, max_dim=max_dim)
            block_desc = f"{blk.label} (dimension {blk.dim:,}; {group.describe()})"
        except ValueError as exc:
            block_desc = f"not available: {exc}"
    occupied = int(np.count_nonzero(eq.level_weights > 1e-14))
    return ExactEquilibration(
        n_sites=problem.n_sites, basis_dim=int(basis.dim), dim=int(dim), subspace=desc, d_eff=eq.d_eff,
        ipr=eq.ipr, n_levels=int(eq.level_energies.size), n_occupied=occupied, energy_mean=eq.energy_mean,
        energy_variance=eq.energy_variance, gap_degeneracy=int(eq.gap_degeneracy),
        n_degenerate_gaps=int(eq.n_degenerate_gaps), observables=results, level_ratio=ratio,
        level_block=block_desc, energies=spec.energies, quench=eq, seconds=time.perf_counter() - t0,
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
    )


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
        Range from the DOS error bars (stochastic trace); it does not include the error of the
        random-matrix assumption itself.
    eta : float
        3 real amplitudes, 2 complex, 3 - 4w(1 - w) in between (``amplitude_eta``), plus ``paired_fraction``.
    paired_fraction : float
        Share of the subspace in momenta k != 0, L/2 whose levels are exactly degenerate with -k
        (reflection-symmetric ring, state not reflection symmetric): such pairs are grouped into one
        eigenspace, E p_E^2 = 2 mu^2 (eta + 1), so eta -> eta + paired_fraction.
    narrow : bool
        LDOS width < 3 x KPM resolution: estimate unreliable.
    reliable : bool
        Not narrow and no warning.
    warnings : tuple of str
        Narrow distribution, known integrable model, Poisson-like <r>, unresolved symmetries.
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

    def summary(self) -> dict:
        return {
            "d_eff": self.d_eff, "d_eff_low": self.d_eff_low, "d_eff_high": self.d_eff_high, "eta": self.eta, "paired_fraction": self.paired_fraction,
            "narrow": self.narrow, "reliable": self.reliable, "warnings": list(self.warnings),
            "assumption": self.assumption, "subspace_dimension": self.subspace_dim, "subspace": self.subspace,
            "ldos_width": self.estimate.ldos_width, "resolution": self.estimate.resolution,
            "n_moments": self.dos.n_moments, "n_vectors": self.dos.n_vectors,
            "plateau_d_eff": self.plateau_d_eff, "plateau_range": [self.plateau_low, self.plateau_high],
            "plateau_window": self.plateau_window, "seconds": self.seconds,
        }


def estimate_deff(problem, *, n_moments: int = 256, n_vectors: int = 20, rng: np.random.Generator,
                  psi=None, bounds=None, resolve_symmetries: bool = True, survival=None,
                  level_ratio: SpacingRatio | None = None, group: SymmetryGroup | None = None) -> DeffResult:
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
    if est.narrow:
        warnings.append(f"narrow energy distribution: LDOS width {est.ldos_width:.3g} < 3 x KPM resolution "
                        f"{res:.3g}; the estimate is unreliable (more moments help only if the LDOS is smooth)")
    integ = integrability_warning(problem.scenario)
    if integ:
        warnings.append(integ + "; the random-matrix assumption behind the estimate fails (expect factors 2-6)")
    if level_ratio is not None and level_ratio.mean_r < 0.5 * (GOE_R + POISSON_R):
        warnings.append(f"level statistics Poisson-like (<r> = {level_ratio.mean_r:.3f} +- {level_ratio.stderr:.3f}); "
                        "the random-matrix assumption is doubtful")
    pl = (None, None, None, None)
    if survival is not None:
        times, values = (np.asarray(x, dtype=float) for x in survival)
        win = (0.5 * (times[0] + times[-1]), float(times[-1]))
        p = survival_plateau(times, values, window=win)
        lo_ipr, hi_ipr = p.mean - p.stderr, p.mean + p.stderr
        pl = (1.0 / p.mean if p.mean > 0 else float("inf"), 1.0 / hi_ipr,
              1.0 / lo_ipr if lo_ipr > 0 else float("inf"), win)
    return DeffResult(
        d_eff=est.d_eff, d_eff_low=est.d_eff_low, d_eff_high=est.d_eff_high, eta=eta, paired_fraction=paired, narrow=est.narrow,
        reliable=not warnings, warnings=tuple(warnings), assumption=est.assumption, estimate=est, ldos=ldos,
        dos=dos, subspace_dim=trace, subspace=sub_desc, plateau_d_eff=pl[0], plateau_low=pl[1],
        plateau_high=pl[2], plateau_window=pl[3], seconds=time.perf_counter() - t0,
    )


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
                         int(n_vectors), int(problem.basis.dim), time.perf_counter() - t0)


@dataclass(frozen=True)
class ExactThermal:
    """Exact thermal values from the dense spectrum of every symmetry block of the basis.

    Attributes
    ----------
    energy, beta : float
        Target energy and the exact beta with Tr(H e^{-beta H}) / Z = E.
    canonical, microcanonical : dict name -> float
        Tr(A e^{-beta H}) / Z and sum_m w_m A_mm / sum_m w_m, w_m = exp(-(E_m - E)^2 / (2 width^2)).
    width : float
    n_blocks : int
    energies : ndarray
        The whole basis spectrum (ascending).
    """

    energy: float
    beta: float
    canonical: dict
    microcanonical: dict
    width: float
    n_blocks: int
    energies: np.ndarray = field(repr=False)


def exact_thermal_values(problem, energy: float, *, width: float | None = None, max_dim: int = MAX_DENSE_DIM,
                         group: SymmetryGroup | None = None, progress=None) -> ExactThermal:
    """Canonical and microcanonical values from full diagonalization, block by block.

    Tr(A f(H)) = sum_b Tr(Q_b^dagger A Q_b f(H_b)) holds for every A because the ensemble is
    symmetric: Q_b^dagger g A g^{-1} Q_b = Q_b^dagger A Q_b for 1-d representations.

    Parameters
    ----------
    problem : Problem
    energy : float
    width : float, optional
        Microcanonical sigma (default 2 % of the exact spectral range).
    max_dim : int
        Largest block diagonalized.
    group : SymmetryGroup, optional
    progress : callable, optional
        Called as ``progress(i, n_blocks)`` after each block is diagonalized.
    """
    group = _group_or_none(problem, group)
    if group is None:
        raise DenseLimitError("basis too large for the symmetry tables")
    blocks = symmetry_blocks(problem, group=group)
    h = problem.operator.to_csr()
    a_csr = {n: problem.observable_operator(n).to_csr() for n in problem.observables}
    es, diags = [], {n: [] for n in a_csr}
    for blk in blocks:
        if blk.dim > max_dim:
            raise DenseLimitError(f"block {blk.label} has dimension {blk.dim:,} > max_dim = {max_dim:,}")
        e, v = scipy.linalg.eigh(blk.hamiltonian(h), check_finite=False)
        es.append(e)
        for n, a in a_csr.items():
            ab = (blk.q.conj().T @ (a @ blk.q)).toarray()
            diags[n].append(np.real(np.einsum("im,im->m", v.conj(), ab @ v)))
        if progress is not None:
            progress(len(es), len(blocks))
    e = np.concatenate(es)
    order = np.argsort(e)
    e = e[order]
    dm = {n: np.concatenate(d)[order] for n, d in diags.items()}

    def mean_e(beta):
        w = np.exp(-beta * (e - e[0] if beta >= 0 else e - e[-1]))
        return float(np.dot(w, e) / w.sum())

    if not (e[0] < energy < e[-1]):
        raise ValueError(f"energy {energy} outside the spectrum [{e[0]}, {e[-1]}]")
    lo, hi = -1.0, 1.0
    while mean_e(hi) > energy:
        hi *= 2.0
    while mean_e(lo) < energy:
        lo *= 2.0
    beta = float(scipy.optimize.brentq(lambda b: mean_e(b) - energy, lo, hi, xtol=1e-14))
    w = np.exp(-beta * (e - e[0] if beta >= 0 else e - e[-1]))
    can = {n: float(np.dot(w, d) / w.sum()) for n, d in dm.items()}
    if width is None:
        width = 0.02 * (e[-1] - e[0])
    wm = np.exp(-((e - energy) ** 2) / (2.0 * width**2))
    mc = {n: float(np.dot(wm, d) / wm.sum()) for n, d in dm.items()}
    return ExactThermal(float(energy), beta, can, mc, float(width), len(blocks), e)
